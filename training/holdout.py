"""The labelled holdout: good/ and defective/ folders (sub-folders of defective/ are defect classes), optional
masks matched to defective images by relative path and stem, and scoring it all into a HoldoutResult."""

from __future__ import annotations

from collections.abc import Container
from pathlib import Path

import numpy as np
from knowngood.training.data import IMAGE_SUFFIXES, min_side_for, read_image, resized
from knowngood.training.detector import Detector
from knowngood.training.errors import BadDataset, BadImage
from knowngood.training.folders import ImageFiles, load_folder, subset
from knowngood.training.report import HoldoutResult

MAP_PIXELS = 2**20  # the most pixels of a heatmap (and its mask) the holdout holds per image
SCORE_CHUNK = 16  # images scored per pass: a pass's native heatmaps are held until they are reduced


def held_shape(shape: tuple[int, int]) -> tuple[int, int]:
    """(H, W) of the heatmap the holdout holds for an image of (H, W) `shape`: its own up to `MAP_PIXELS` pixels,
    else reduced to about `MAP_PIXELS` with the aspect ratio kept. A 5 MP image's float32 map is 20 MB: 100 of
    them, twice with `tune --compare`, were 4 GB before any metric; at 1 MP a defect of 10-30 px stays 4-14 px."""
    h, w = shape
    if h * w <= MAP_PIXELS:
        return (h, w)
    scale = (MAP_PIXELS / (h * w)) ** 0.5
    return (max(1, round(h * scale)), max(1, round(w * scale)))


def held_map(heat: np.ndarray) -> np.ndarray:
    """A heatmap as the holdout holds it (`held_shape`): reduced by the one resize inputs get (antialiased)."""
    shape = held_shape(heat.shape)
    return heat if shape == heat.shape else resized(heat[None], shape)[0]


def held_mask(mask: np.ndarray | None) -> np.ndarray | None:
    """A mask at its image's `held_shape`: a reduced pixel is a defect pixel when defects cover a quarter of it,
    so a 1 px scratch survives a reduction by 2-3x (a 5 MP image's)."""
    if mask is None or held_shape(mask.shape) == mask.shape:
        return mask
    return resized(mask[None].astype(np.float32), held_shape(mask.shape))[0] >= 0.25


def score_holdout(det: Detector, images) -> tuple[np.ndarray, list[np.ndarray]]:
    """Scores and held heatmaps (`held_map`) of `images` (a list, or `ImageFiles`), `SCORE_CHUNK` at a time, so
    at most one pass's native heatmaps are held at once."""
    scores, maps = [], []
    for start in range(0, len(images), SCORE_CHUNK):
        idx = range(start, min(len(images), start + SCORE_CHUNK))
        for r in det.inspect(subset(images, idx)):
            scores.append(r.score)
            maps.append(held_map(r.heatmap))
    return np.array(scores), maps


def defect_class(path: Path, defective_dir: Path) -> str:
    rel = path.relative_to(defective_dir)
    return rel.parts[0] if len(rel.parts) > 1 else "defective"


MASK_SUFFIXES = ("", "_mask", "-mask", "_gt")  # a mask's stem: the image's, or the image's with one of these
MASK_NAMING = (
    f"the same relative path and stem, or that stem followed by {', '.join(MASK_SUFFIXES[1:-1])} or {MASK_SUFFIXES[-1]}"
)


Listings = dict[Path, dict[str, list[Path]]]  # (resolved) folder -> its image files by stem, each folder listed once


def files_by_stem(folder: Path, listings: Listings | None = None) -> dict[str, list[Path]]:
    """A folder's image files by stem, sorted (3.bmp before 3.png, on every machine); {} if it is no folder. Kept in
    `listings` where given, so a holdout lists each folder once for all its images."""
    key = folder.resolve()
    if listings is not None and key in listings:
        return listings[key]
    by_stem: dict[str, list[Path]] = {}
    for c in sorted(_images_in(folder)) if folder.is_dir() else ():
        by_stem.setdefault(c.stem, []).append(c)
    if listings is not None:
        listings[key] = by_stem
    return by_stem


def find_mask(
    path: Path, defective_dir: Path, masks_dir: Path | None, listings: Listings | None = None
) -> np.ndarray | None:
    """The mask with the same relative path and stem (any image suffix), or that stem followed by one of
    `MASK_SUFFIXES` (`crack/007.png` -> `crack/007_mask.png`, as many labelling tools write them), as a bool (H, W)
    array (`mask_pixels`), or None. The plain stem wins where both exist. `listings`: see `files_by_stem`."""
    if masks_dir is None:
        return None
    rel = path.relative_to(defective_dir).with_suffix("")
    by_stem = files_by_stem(masks_dir / rel.parent, listings)
    for suffix in MASK_SUFFIXES:
        for c in by_stem.get(rel.name + suffix, ()):
            if suffix or c.resolve() != path.resolve():  # masks beside their images: an image is not its own mask
                return mask_pixels(read_image(c))
    return None


def _left_out(good_dir: Path, defective_dir: Path, masks_dir: Path | None, listings: Listings):
    """Which files under --good and --defective are not holdout images, as two predicates. A holdout laid out as
    test/good + test/<defect class>/ may be given as --good test/good --defective test: test/good is left out of the
    defective images. A masks folder inside --good or --defective is left out of it; masks beside their images
    (--masks the defective folder itself: crack/007.png and crack/007_mask.png) are left out of the defective
    images by name (`is_mask_beside`; the folders listed into `listings`, which `find_mask` then reuses)."""
    good, defective = Path(good_dir).resolve(), Path(defective_dir).resolve()
    masks = None if masks_dir is None else Path(masks_dir).resolve()

    def within(folder: Path | None, outer: Path) -> bool:  # a folder strictly inside another
        return folder is not None and folder != outer and folder.is_relative_to(outer)

    def good_out(path: Path) -> bool:
        return within(masks, good) and path.resolve().is_relative_to(masks)

    def bad_out(path: Path) -> bool:
        p = path.resolve()
        if p.is_relative_to(good):
            return True
        if masks == defective:
            return is_mask_beside(p.stem, files_by_stem(p.parent, listings).keys())
        return within(masks, defective) and p.is_relative_to(masks)

    return good_out, bad_out


def is_mask_beside(stem: str, stems: Container[str]) -> bool:
    """Whether a file of `stem` is named as the mask of an image beside it, of one of `stems` (its folder's): that
    stem followed by one of `MASK_SUFFIXES` (crack/007_mask.png beside crack/007.png)."""
    return any(stem.endswith(sfx) and stem[: -len(sfx)] in stems for sfx in MASK_SUFFIXES[1:])


def _images_in(folder: Path) -> list[Path]:
    return [c for c in folder.iterdir() if c.suffix.lower() in IMAGE_SUFFIXES and c.is_file()]


def mask_pixels(mask: np.ndarray) -> np.ndarray:
    """A decoded mask (C, H, W) in [0, 1] -> bool (H, W): defect where it is brighter than half its own maximum, so
    masks written 0 / 255 and masks written 0 / 1 (label images, 8 or 16 bit) both work; an all-black mask is
    no defect pixel."""
    m = mask.max(0)
    top = float(m.max())
    return m > top / 2 if top > 0 else np.zeros(m.shape, bool)


def load_holdout(
    det: Detector, good_dir: Path, defective_dir: Path, masks_dir: Path | None = None, *, skip_bad: bool = False
) -> HoldoutResult:
    """Reads and scores the whole holdout as batches. Labels: 0 good, 1 defective. Images are held to the
    model's smallest side (`min_side_for`), as the service holds them. Each image is decoded to check it, then
    left in its file (`ImageFiles`) until it is scored or shown: only the heatmaps and masks are held, those of
    images over `MAP_PIXELS` reduced to about that many pixels (`held_shape`), so the pixel metrics of
    multi-megapixel images are measured at about 1 MP."""
    limits = {"min_side": min_side_for(det.cfg.size)}
    if Path(defective_dir).resolve().is_relative_to(Path(good_dir).resolve()):
        raise BadDataset(f"--defective {defective_dir} is inside --good {good_dir}: its images would count as good")
    listings: Listings = {}
    good_out, bad_out = _left_out(good_dir, defective_dir, masks_dir, listings)
    good = load_folder(good_dir, skip_bad=skip_bad, min_count=0, in_files=True, leave_out=good_out, **limits)
    bad = load_folder(defective_dir, skip_bad=skip_bad, min_count=0, in_files=True, leave_out=bad_out, **limits)
    named_good = [p for p in bad.paths if defect_class(p, defective_dir).lower() == "good"]
    if named_good:  # good parts among the defective ones: every figure of the holdout would be wrong
        raise BadDataset(
            f"--defective {defective_dir}: {len(named_good)} images in a defect class named good "
            f"({named_good[0].parent}); pass that folder as --good (then it is left out of the defective images)"
        )
    for option, folder, found in (("--good", good_dir, good), ("--defective", defective_dir, bad)):
        if not found.images:  # before any scoring: the threshold and the report need both kinds
            skipped = f" ({len(found.skipped)} unreadable, skipped)" if found.skipped else ""
            raise BadDataset(
                f"{option} {folder}: no readable images{skipped}; the holdout needs good and defective images"
            )
    masks = [None] * len(good.images)
    for path, (h, w) in zip(bad.paths, bad.shapes):
        m = find_mask(path, defective_dir, masks_dir, listings)
        if m is not None and m.shape != (h, w):
            raise BadImage(f"{path}: mask is {m.shape[1]} x {m.shape[0]}, image is {w} x {h}")
        masks.append(held_mask(m))
    if masks_dir is not None and all(m is None for m in masks):
        raise BadDataset(f"{masks_dir}: no mask matches any defective image ({MASK_NAMING})")
    images = ImageFiles(good.paths + bad.paths, limits)
    scores, heatmaps = score_holdout(det, images)
    return HoldoutResult(
        paths=good.paths + bad.paths,
        labels=np.array([0] * len(good.images) + [1] * len(bad.images)),
        classes=["good"] * len(good.images) + [defect_class(p, defective_dir) for p in bad.paths],
        scores=scores,
        images=images,
        heatmaps=heatmaps,
        masks=masks,
        skipped=good.skipped + bad.skipped,
        maps_reduced=sum(held_shape(shape) != shape for shape in good.shapes + bad.shapes),
    )
