"""Writes a whole inspection scenario to disk: known-good training images and a labelled holdout set."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
from knowngood.demo_parts.render import DEFECT_KINDS, PART_KINDS, render
from PIL import Image

# Seeds are keyed by what an image is, not by how many came before it, so changing one count never
# changes the other images.
_TRAIN, _HOLDOUT_GOOD, _HOLDOUT_DEFECTIVE = 0, 1, 2
_STEM = re.compile(r"^\d+\.png$")


def image_rng(seed: int, kind: str, split: int, defect_index: int, index: int) -> np.random.Generator:
    return np.random.default_rng([seed, PART_KINDS.index(kind), split, defect_index, index])


def render_scenario(
    out_dir: Path,
    *,
    seed: int = 0,
    size: int = 128,
    n_train: int = 240,
    n_holdout_good: int = 60,
    n_holdout_defective_per_kind: int = 12,
) -> dict[str, Path]:
    """Writes, per part kind:
       out_dir/<kind>/train/good/NNNN.png             (known-good training images)
       out_dir/<kind>/holdout/good/NNNN.png
       out_dir/<kind>/holdout/defective/<defect>/NNNN.png
       out_dir/<kind>/holdout/masks/<defect>/NNNN.png  (same stem as its image; 255 = defect)
    Numbered PNGs left in those folders by an earlier, larger render are removed; nothing else is.
    Returns {kind: out_dir/<kind>}."""
    if seed < 0:
        raise ValueError(f"seed must be non-negative, got {seed}")
    for name, n in (
        ("n_train", n_train),
        ("n_holdout_good", n_holdout_good),
        ("n_holdout_defective_per_kind", n_holdout_defective_per_kind),
    ):
        if n < 0:
            raise ValueError(f"{name} must be non-negative, got {n}")
    out_dir = Path(out_dir)
    roots = {}
    for kind in PART_KINDS:
        root = out_dir / kind
        _write_good(root / "train" / "good", kind, seed, size, _TRAIN, n_train)
        _write_good(root / "holdout" / "good", kind, seed, size, _HOLDOUT_GOOD, n_holdout_good)
        for d_index, defect in enumerate(DEFECT_KINDS[kind]):
            n = n_holdout_defective_per_kind
            _write_defective(root / "holdout", kind, defect, d_index, seed, size, n)
        roots[kind] = root
    return roots


def _stem(i: int) -> str:
    return f"{i:04d}.png"


def _fresh_folder(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    for old in folder.iterdir():
        if old.is_file() and _STEM.match(old.name):
            old.unlink()
    return folder


def _save(path: Path, array: np.ndarray) -> None:
    Image.fromarray(array).save(path, format="PNG")


def _write_good(folder: Path, kind: str, seed: int, size: int, split: int, n: int) -> None:
    folder = _fresh_folder(folder)
    for i in range(n):
        _save(folder / _stem(i), render(kind, None, image_rng(seed, kind, split, 0, i), size).image)


def _write_defective(holdout: Path, kind: str, defect: str, d_index: int, seed: int, size: int, n: int):
    images = _fresh_folder(holdout / "defective" / defect)
    masks = _fresh_folder(holdout / "masks" / defect)
    for i in range(n):
        out = render(kind, defect, image_rng(seed, kind, _HOLDOUT_DEFECTIVE, d_index, i), size)
        _save(images / _stem(i), out.image)
        _save(masks / _stem(i), np.where(out.mask, 255, 0).astype(np.uint8))
