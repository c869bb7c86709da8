"""One image at a time: a good part, or the same part with one defect, from an rng."""

from __future__ import annotations

from dataclasses import dataclass
from types import ModuleType

import numpy as np

from demo_parts import bracket, bracket_defects, weave, weave_defects
from demo_parts.fields import to_uint8

_KINDS: dict[str, tuple[ModuleType, dict]] = {
    "bracket": (bracket, bracket_defects.DEFECTS),
    "weave": (weave, weave_defects.DEFECTS),
}
PART_KINDS: tuple[str, ...] = tuple(_KINDS)
DEFECT_KINDS: dict[str, tuple[str, ...]] = {kind: tuple(d) for kind, (_, d) in _KINDS.items()}
MIN_SIZE = 32  # below this the holes and threads are only a pixel or two wide


@dataclass(frozen=True)
class Rendering:
    image: np.ndarray  # uint8, (H, W) gray or (H, W, 3) RGB
    mask: np.ndarray  # bool (H, W); all False for a good part
    part: np.ndarray  # bool (H, W), where the part is


def render(kind: str, defect: str | None, rng: np.random.Generator, size: int = 128) -> Rendering:
    """The scene is drawn first and the defect after, so a defective image equals the good image from
    the same rng state everywhere outside its mask."""
    module, defects = _lookup(kind)
    if defect is not None and defect not in defects:
        raise ValueError(f"unknown defect {defect!r} for {kind}; expected one of {', '.join(defects)}")
    if int(size) < MIN_SIZE:
        raise ValueError(f"size must be at least {MIN_SIZE} px, got {size}")
    scene = module.sample(rng, int(size))
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
