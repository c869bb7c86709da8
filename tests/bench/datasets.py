"""The benchmark's named datasets: known-good training images, a labelled test set and, where they exist, masks.

Splits (fixed; every method sees exactly the same images):

- **elpv** (electroluminescence images of solar-cell modules' cells, 300 x 300 px gray; Buerhop-Lutz et al. 2018,
  "A benchmark for visual identification of defective solar cells in electroluminescence imagery", loaded with
  `elpv_dataset.utils.load_dataset`, 2624 cells, each labelled with a defect probability 0, 1/3, 2/3 or 1 and a
  type 'mono' or 'poly'). A cell is *functional* when its probability is 0. The functional cells of the chosen
  type(s), in the dataset's own order, are shuffled with `numpy.random.default_rng(0).permutation`; the first
  `int(0.8 * n)` are the known-good training images, the rest are the good test images. The defective test
  images are all cells of the chosen type(s) whose probability is at least the dataset's floor; cells between 0
  and the floor are left out. Cells are resized once to 128 x 128 with `training.data.to_model_input`.

  | name | types | defective = probability | train good | test good | test defective |
  | --- | --- | --- | --- | --- | --- |
  | elpv-mono | mono | = 1 | 470 | 118 | 313 |
  | elpv-poly | poly | = 1 | 736 | 184 | 402 |
  | elpv-pooled | mono + poly | = 1 | 1206 | 302 | 715 |
  | elpv-pooled-p67 | mono + poly | >= 2/3 | 1206 | 302 | 821 |

- **demo-bracket**, **demo-weave**, **demo-casting**: the invented demo parts of
  `demo_parts.render_scenario(dir, seed=0)` (128 px; 240 known-good training images, 60 good and 12 defective per
  defect kind in the test set), rendered once into a cache folder. Train = `<kind>/train/good`; test =
  `<kind>/holdout/good` (label 0) and every image under `<kind>/holdout/defective/<defect>/` (label 1); the mask
  of a defective image is the file with the same defect folder and stem under `<kind>/holdout/masks/`; good
  images have all-False masks. Images keep the resolution they were rendered at.

- **demo-casting-large**: the casting at the camera's own scale, `demo_parts.render_large("casting", ...)` at
  1024 x 1024 px (grains and defects keep their 128 px render's pixel sizes, so a defect is a few px in a
  megapixel image): 60 known-good training images, 20 good and 20 defective (4 per defect kind) test images,
  with masks, in the same folder layout, rendered once into the cache. Each image's rng is keyed by what it is
  (`large_rng`, like `demo_parts.scenario.image_rng`), so a count change leaves the other images as they were.
  knowngood trains a tiled model on it (`Dataset.tile` = 128: 128 px tiles, the camera's scale); the peers see
  the whole image at 128 px, as they see every dataset.

- **demo-casting-640**: the casting at 640 x 640 px with grains and defects four times their 128 px render's pixel
  sizes (`render_large(..., grain_scale=4)`): defects of about 10-30 px in a 640 px image, the case of a camera
  image that the default 128 px working size shrinks five times. 120 known-good training images, 30 good and 40
  defective (8 per defect kind) test images, with masks; rendered once, keyed like the large set. knowngood trains
  with `train`'s default working size for these images (`train.auto_size`: 256 px); the ablation adds the same
  recipe at 128 px (what the working size buys). The peers see 128 px, as everywhere.

  | name | train good | test good | test defective | side | knowngood |
  | --- | --- | --- | --- | --- | --- |
  | demo-bracket, demo-weave, demo-casting | 240 | 60 | 60 (5 defect kinds x 12) | 128 | whole image |
  | demo-casting-large | 60 | 20 | 20 (5 x 4) | 1024 | 128 px tiles |
  | demo-casting-640 | 120 | 30 | 40 (5 x 8) | 640 | whole image at 256 px |
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from knowngood.training.data import to_model_input
from knowngood.training.folders import load_folder
from knowngood.training.holdout import find_mask
from PIL import Image

ELPV = {
    "elpv-mono": (("mono",), 1.0),
    "elpv-poly": (("poly",), 1.0),
    "elpv-pooled": (("mono", "poly"), 1.0),
    "elpv-pooled-p67": (("mono", "poly"), 2 / 3),
}
DEMO = {"demo-bracket": "bracket", "demo-weave": "weave", "demo-casting": "casting"}
LARGE = "demo-casting-large"
MID = "demo-casting-640"
NAMES = (*ELPV, *DEMO, MID, LARGE)
LARGE_SIZE = 1024
LARGE_TILE = 128  # the 128 px render's pixel scale: a tile sees what a whole 128 px image shows
LARGE_COUNTS = {"train": 60, "good": 20, "per_defect": 4}
MID_SIZE, MID_GRAIN = 640, 4.0
MID_COUNTS = {"train": 120, "good": 30, "per_defect": 8}
_LARGE_KEY = 1024  # keeps the large images' random streams apart from the 128 px scenario's
ELPV_SIZE = 128
TRAIN_SHARE = 0.8
SPLIT_SEED = 0
PROBA_TOL = 1e-6  # the probabilities are stored as 0.3333.., 0.6666..


@dataclass
class Dataset:
    """Images are (C, H, W) float32 in [0, 1]. labels: 0 good / 1 defective. masks: one bool (H, W) per test image
    (all False for good ones), or None when the dataset has no masks."""

    name: str
    train: list[np.ndarray]
    test: list[np.ndarray]
    labels: np.ndarray
    masks: list[np.ndarray] | None
    source: str
    tile: int = 0  # knowngood's tile size on this dataset (0: the whole image at the working size)

    @property
    def channels(self) -> int:
        return 3 if any(im.shape[0] == 3 for im in self.train) else 1

    def summary(self) -> dict:
        return {
            "train_good": len(self.train),
            "test_good": int((self.labels == 0).sum()),
            "test_defective": int((self.labels == 1).sum()),
            "masks": self.masks is not None,
            "image_shape": list(self.test[0].shape),
            "knowngood_tile": self.tile,
            "source": self.source,
        }


def load(name: str, cache: Path) -> Dataset:
    if name in ELPV:
        return load_elpv(name)
    if name in DEMO:
        return load_demo(name, cache)
    if name == LARGE:
        return load_large(cache)
    if name == MID:
        return load_mid(cache)
    raise KeyError(f"unknown dataset {name!r}; expected one of {', '.join(NAMES)}")


# ---------------------------------------------------------------------------------------------------- elpv


def _elpv_raw():
    from elpv_dataset.utils import load_dataset

    return load_dataset()  # images (2624, 300, 300) uint8, probabilities (2624,), types (2624,) 'mono' / 'poly'


def elpv_split(name: str, probs: np.ndarray, types: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Indices into the elpv arrays: (train good, test good, test defective), as in the module docstring."""
    kinds, floor = ELPV[name]
    chosen = np.isin(types, kinds)
    functional = np.flatnonzero(chosen & (probs == 0))
    order = functional[np.random.default_rng(SPLIT_SEED).permutation(len(functional))]
    n_train = int(TRAIN_SHARE * len(functional))
    defective = np.flatnonzero(chosen & (probs >= floor - PROBA_TOL))
    return order[:n_train], order[n_train:], defective


def _cells(images: np.ndarray, idx: np.ndarray, size: int | None) -> list[np.ndarray]:
    out = []
    for start in range(0, len(idx), 256):  # chunks: the 300 px float copies of a whole split are large
        chunk = [images[i][None].astype(np.float32) / 255.0 for i in idx[start : start + 256]]
        if size is not None:
            chunk = list(to_model_input(chunk, size=size, channels=1).numpy())
        out.extend(chunk)
    return out


def load_elpv(name: str, size: int | None = ELPV_SIZE) -> Dataset:
    images, probs, types = _elpv_raw()
    train, good, bad = elpv_split(name, probs, types)
    test = _cells(images, good, size) + _cells(images, bad, size)
    labels = np.array([0] * len(good) + [1] * len(bad))
    return Dataset(name, _cells(images, train, size), test, labels, None, "elpv (Buerhop-Lutz et al. 2018)")


def elpv_reduced(n_train: int, n_test: int, seed: int = 0, size: int = ELPV_SIZE) -> Dataset:
    """A small fixed split of elpv-pooled (probability 1) for the default test suite: the first `n_train` of the
    benchmark's training cells, the first `n_test` of its good test cells, and `n_test` defective cells drawn
    with `default_rng(seed)`. Same images every run."""
    images, probs, types = _elpv_raw()
    train, good, bad = elpv_split("elpv-pooled", probs, types)
    bad = np.sort(np.random.default_rng(seed).choice(bad, size=n_test, replace=False))
    good = good[:n_test]
    test = _cells(images, good, size) + _cells(images, bad, size)
    labels = np.array([0] * len(good) + [1] * len(bad))
    return Dataset(
        "elpv-pooled-reduced",
        _cells(images, train[:n_train], size),
        test,
        labels,
        None,
        "elpv (Buerhop-Lutz et al. 2018), reduced split",
    )


# ---------------------------------------------------------------------------------------------------- demo


def demo_root(cache: Path, seed: int = 0) -> Path:
    """Renders the demo scenario into `cache/demo-seed<seed>` once; later calls reuse it (rendered again when a
    part kind the benchmark uses is missing, e.g. a cache from before the casting)."""
    root = Path(cache) / f"demo-seed{seed}"
    done = root / ".complete"
    if not done.exists() or not all((root / kind).is_dir() for kind in DEMO.values()):
        from knowngood.demo_parts import render_scenario

        root.mkdir(parents=True, exist_ok=True)
        render_scenario(root, seed=seed)
        done.write_text("rendered by tests/bench/datasets.py\n")
    return root


def _mask_for(path: Path, defective: Path, masks: Path) -> np.ndarray:
    mask = find_mask(path, defective, masks)  # as `tune` finds it
    if mask is None:
        raise FileNotFoundError(f"{path}: no mask with the same stem under {masks}")
    return mask


def _load_kind(kind_dir: Path) -> tuple[list, list, np.ndarray, list]:
    """train, test images, labels and masks of one part kind's folders (the layout of `render_scenario`)."""
    train = load_folder(kind_dir / "train" / "good").images
    good = load_folder(kind_dir / "holdout" / "good").images
    defective_dir = kind_dir / "holdout" / "defective"
    bad = load_folder(defective_dir)
    masks = [np.zeros(im.shape[-2:], dtype=bool) for im in good]
    masks += [_mask_for(p, defective_dir, kind_dir / "holdout" / "masks") for p in bad.paths]
    labels = np.array([0] * len(good) + [1] * len(bad.images))
    return train, good + bad.images, labels, masks


def load_demo(name: str, cache: Path) -> Dataset:
    train, test, labels, masks = _load_kind(demo_root(cache) / DEMO[name])
    return Dataset(name, train, test, labels, masks, f"demo_parts.render_scenario seed 0, {DEMO[name]}")


# ---------------------------------------------------------------------------------------------------- large


def large_rng(seed: int, split: int, defect_index: int, index: int, size: int) -> np.random.Generator:
    """The random stream of one large casting image, keyed by what it is (split 0 train, 1 good test, 2 defective
    test; the defect's index in `DEFECT_KINDS`; its number) and the image size."""
    from knowngood.demo_parts import PART_KINDS

    return np.random.default_rng([seed, _LARGE_KEY, PART_KINDS.index("casting"), split, defect_index, index, size])


def _save_png(path: Path, array: np.ndarray) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(array).save(path, format="PNG")


def large_root(
    cache: Path, *, seed: int = 0, size: int = LARGE_SIZE, counts: dict = LARGE_COUNTS, grain_scale: float = 1.0
) -> Path:
    """Renders the large casting set into a cache folder named for its seed, size, counts and grain scale, once
    (the layout of `render_scenario`'s part-kind folders); later calls reuse it. About a second per 1024 px image."""
    from knowngood.demo_parts import DEFECT_KINDS, render_large

    n_train, n_good, n_bad = counts["train"], counts["good"], counts["per_defect"]
    grains = "" if grain_scale == 1.0 else f"-grain{grain_scale:g}"
    root = Path(cache) / f"casting-large-{size}px{grains}-seed{seed}-{n_train}-{n_good}-{n_bad}"
    done = root / ".complete"
    if done.exists():
        return root
    jobs = [("train/good", None, 0, 0, i) for i in range(n_train)]
    jobs += [("holdout/good", None, 1, 0, i) for i in range(n_good)]
    jobs += [(defect, defect, 2, d, i) for d, defect in enumerate(DEFECT_KINDS["casting"]) for i in range(n_bad)]
    for folder, defect, split, d, i in jobs:
        out = render_large("casting", defect, large_rng(seed, split, d, i, size), size, grain_scale=grain_scale)
        if defect is None:
            _save_png(root / folder / f"{i:04d}.png", out.image)
        else:
            _save_png(root / "holdout/defective" / defect / f"{i:04d}.png", out.image)
            _save_png(root / "holdout/masks" / defect / f"{i:04d}.png", np.where(out.mask, 255, 0).astype(np.uint8))
    done.write_text("rendered by tests/bench/datasets.py\n")
    return root


def load_large(cache: Path, *, size: int = LARGE_SIZE, counts: dict = LARGE_COUNTS) -> Dataset:
    train, test, labels, masks = _load_kind(large_root(cache, size=size, counts=counts))
    source = f"demo_parts.render_large casting, {size} px, seed 0"
    return Dataset(LARGE, train, test, labels, masks, source, tile=LARGE_TILE)


def load_mid(cache: Path) -> Dataset:
    root = large_root(cache, size=MID_SIZE, counts=MID_COUNTS, grain_scale=MID_GRAIN)
    train, test, labels, masks = _load_kind(root)
    source = f"demo_parts.render_large casting, {MID_SIZE} px, grain scale {MID_GRAIN:g}, seed 0"
    return Dataset(MID, train, test, labels, masks, source)


def native_images(name: str, cache: Path, split: str, n: int | None = None) -> list[np.ndarray]:
    """The `split` ('train' or 'test') images of a dataset at their own resolution (elpv: 300 px), the first n."""
    if name in ELPV:
        images, probs, types = _elpv_raw()
        train, good, bad = elpv_split(name, probs, types)
        idx = train if split == "train" else np.concatenate([good, bad])
        return _cells(images, idx[:n], None)
    ds = load(name, cache)
    return (ds.train if split == "train" else ds.test)[:n]
