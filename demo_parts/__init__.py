"""Invented inspection scenario, rendered deterministically from a seed.

Three part kinds: `bracket` (grayscale stamped metal plate), `weave` (RGB woven fabric) and `casting`
(grayscale grit-blasted cast surface with no fixed layout; `render_large` draws it at the camera's own
pixel scale), each with known-good images and several defect kinds with pixel masks. A defective image is
its good twin (same rng state) plus one defect, so it differs from that twin only inside, or right next to,
its mask.
"""

from knowngood.demo_parts.render import DEFECT_KINDS, PART_KINDS, render_defective, render_good, render_large
from knowngood.demo_parts.scenario import render_scenario

__all__ = ["DEFECT_KINDS", "PART_KINDS", "render_defective", "render_good", "render_large", "render_scenario"]
