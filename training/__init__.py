"""knowngood model side: data, networks, fitting, scoring, tuning, bundle and command line."""

__version__ = "0.1.0"
