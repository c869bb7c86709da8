"""knowngood: visual inspection from known-good images only.

Installed as one namespace so nothing clashes with other projects' top-level modules: `knowngood.training` (the
model side and the `knowngood` command), `knowngood.service` (the REST service) and `knowngood.demo_parts` (the
invented demo scenario). In the repository the three keep their own folders at the top level.
"""

from knowngood.training import __version__

__all__ = ["__version__"]
