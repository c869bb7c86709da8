"""One image at a time: a good part, or the same part with one defect, from an rng."""

from __future__ import annotations

from dataclasses import dataclass
from types import ModuleType

import numpy as np
from knowngood.demo_parts import bracket, bracket_defects, casting, casting_defects, weave, weave_defects
from knowngood.demo_parts.fields import to_uint8

_KINDS: dict[str, tuple[ModuleType, dict]] = {
    "bracket": (bracket, bracket_defects.DEFECTS),
    "weave": (weave, weave_defects.DEFECTS),
    # New kinds go last: each kind's random streams are keyed by its index here (scenario.image_rng).
    "casting": (casting, casting_defects.DEFECTS),
}
PART_KINDS: tuple[str, ...] = tuple(_KINDS)
DEFECT_KINDS: dict[str, tuple[str, ...]] = {kind: tuple(d) for kind, (_, d) in _KINDS.items()}
MIN_SIZE = 32  # below this the holes and threads are only a pixel or two wide
# Kinds without a fixed layout, which can also be rendered at the camera's own pixel scale (`render_large`);
# the bracket's and weave's layouts are fractions of the frame.
LARGE_KINDS: tuple[str, ...] = ("casting",)
MAX_LARGE_SIZE = 4096  # time and memory grow with size²: 1024 px takes ~1 s, 2048 px ~5 s and 0.5 GB


@dataclass(frozen=True)
class Rendering:
    image: np.ndarray  # uint8, (H, W) gray or (H, W, 3) RGB
    mask: np.ndarray  # bool (H, W); all False for a good part
    part: np.ndarray  # bool (H, W), where the part is


def render(kind: str, defect: str | None, rng: np.random.Generator, size: int = 128) -> Rendering:
    """The scene is drawn first and the defect after, so a defective image equals the good image from
    the same rng state everywhere outside its defect's mask. Features scale with size / 128."""
    return _render(kind, defect, rng, size, scale=None)


def render_large(
    kind: str, defect: str | None, rng: np.random.Generator, size: int = 1024, *, grain_scale: float = 1.0
) -> Rendering:
    """A `size`-px image at the camera's own scale: grains and defects keep the pixel sizes they have in a
    128 px render (times `grain_scale`), so a large image shows more surface, not bigger features. Only
    for kinds without a fixed layout (`LARGE_KINDS`). Same contract as `render` otherwise."""
    if kind not in LARGE_KINDS:
        raise ValueError(f"render_large needs a kind without a fixed layout ({', '.join(LARGE_KINDS)}), got {kind!r}")
    if not MIN_SIZE <= int(size) <= MAX_LARGE_SIZE:
        raise ValueError(f"size must be between {MIN_SIZE} and {MAX_LARGE_SIZE} px, got {size}")
    if not 0.25 <= grain_scale <= 8.0:
        raise ValueError(f"grain_scale must be between 0.25 and 8, got {grain_scale}")
    return _render(kind, defect, rng, size, scale=float(grain_scale))


def _render(kind: str, defect: str | None, rng: np.random.Generator, size: int, scale: float | None):
    module, defects = _lookup(kind)
    if defect is not None and defect not in defects:
        raise ValueError(f"unknown defect {defect!r} for {kind}; expected one of {', '.join(defects)}")
    if int(size) < MIN_SIZE:
        raise ValueError(f"size must be at least {MIN_SIZE} px, got {size}")
    scene = module.sample(rng, int(size)) if scale is None else module.sample(rng, int(size), scale=scale)
    mask = np.zeros((scene.size, scene.size), dtype=bool) if defect is None else defects[defect](scene, rng)
    return Rendering(image=to_uint8(module.compose(scene)), mask=mask, part=module.part_region(scene))


def _lookup(kind: str):
    try:
        return _KINDS[kind]
    except KeyError:
        raise ValueError(f"unknown part kind {kind!r}; expected one of {', '.join(PART_KINDS)}") from None


def render_good(kind: str, rng: np.random.Generator, *, size: int = 128) -> np.ndarray:
    """A known-good part: (H, W) uint8 for gray kinds, (H, W, 3) uint8 for colour kinds."""
    return render(kind, None, rng, size).image


def render_defective(kind: str, defect: str, rng: np.random.Generator, *, size: int = 128):
    """(image, mask): the part with one defect, and a bool mask that is True on the defect."""
    out = render(kind, defect, rng, size)
    return out.image, out.mask
