"""The labelled holdout: good/ and defective/ folders (sub-folders of defective/ are defect classes), optional
masks matched to defective images by relative path and stem, and scoring it all into a HoldoutResult."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from knowngood.training.data import min_side_for, read_image
from knowngood.training.detector import Detector
from knowngood.training.errors import BadDataset, BadImage
from knowngood.training.folders import ImageFiles, list_images, load_folder
from knowngood.training.report import HoldoutResult


def defect_class(path: Path, defective_dir: Path) -> str:
    rel = path.relative_to(defective_dir)
    return rel.parts[0] if len(rel.parts) > 1 else "defective"


def find_mask(path: Path, defective_dir: Path, masks_dir: Path | None) -> np.ndarray | None:
    """The mask with the same relative path and stem (any image suffix), as a bool (H, W) array, or None."""
    if masks_dir is None:
        return None
    rel = path.relative_to(defective_dir).with_suffix("")
    for candidate in list_images(masks_dir / rel.parent) if (masks_dir / rel.parent).is_dir() else []:
        if candidate.stem == rel.name:
            return read_image(candidate).max(0) > 0.5
    return None


def load_holdout(
    det: Detector, good_dir: Path, defective_dir: Path, masks_dir: Path | None = None, *, skip_bad: bool = False
) -> HoldoutResult:
    """Reads and scores the whole holdout as batches. Labels: 0 good, 1 defective. Images are held to the
    model's smallest side (`min_side_for`), as the service holds them. Each image is decoded to check it, then
    left in its file (`ImageFiles`) until it is scored or shown: only the heatmaps and masks are held."""
    limits = {"min_side": min_side_for(det.cfg.size)}
    good = load_folder(good_dir, skip_bad=skip_bad, min_count=0, in_files=True, **limits)
    bad = load_folder(defective_dir, skip_bad=skip_bad, min_count=0, in_files=True, **limits)
    for option, folder, found in (("--good", good_dir, good), ("--defective", defective_dir, bad)):
        if not found.images:  # before any scoring: the threshold and the report need both kinds
            skipped = f" ({len(found.skipped)} unreadable, skipped)" if found.skipped else ""
            raise BadDataset(
                f"{option} {folder}: no readable images{skipped}; the holdout needs good and defective images"
            )
    masks = [None] * len(good.images)
    for path, (h, w) in zip(bad.paths, bad.shapes):
        m = find_mask(path, defective_dir, masks_dir)
        if m is not None and m.shape != (h, w):
            raise BadImage(f"{path}: mask is {m.shape[1]} x {m.shape[0]}, image is {w} x {h}")
        masks.append(m)
    if masks_dir is not None and all(m is None for m in masks):
        raise BadDataset(f"{masks_dir}: no mask matches any defective image (same relative path and stem)")
    images = ImageFiles(good.paths + bad.paths, limits)
    results = det.inspect(images)
    return HoldoutResult(
        paths=good.paths + bad.paths,
        labels=np.array([0] * len(good.images) + [1] * len(bad.images)),
        classes=["good"] * len(good.images) + [defect_class(p, defective_dir) for p in bad.paths],
        scores=np.array([r.score for r in results]),
        images=images,
        heatmaps=[r.heatmap for r in results],
        masks=masks,
        skipped=good.skipped + bad.skipped,
    )
