"""knowngood itself in the benchmark: train a bundle through the real `train_bundle` path from in-memory images,
then score a test set with the loaded `Detector`, exactly as `knowngood inspect` would."""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
from knowngood.training.config import ModelConfig, TrainConfig
from knowngood.training.data import shapes_of
from knowngood.training.detector import Detector
from knowngood.training.folders import ImageSet
from knowngood.training.train import auto_size, train_bundle

SIZE = 128


class ArrayImageSet(ImageSet):
    """An `ImageSet` whose images never were files: the fingerprint hashes the pixels instead of file bytes."""

    def fingerprint(self) -> str:
        h = hashlib.sha256()
        for im in self.images:
            h.update(np.ascontiguousarray(im).tobytes())
        return h.hexdigest()


@dataclass
class KnowngoodRun:
    detector: Detector
    bundle: Path
    train_seconds: float  # wall time of train_bundle: fitting, standardisation, calibration, writing
    fit_seconds: float  # the fitting loop alone (what the time budget caps)
    steps: int


def train(
    images: list[np.ndarray],
    out: Path,
    *,
    minutes: float | None,
    steps: int | None = None,
    channels: int | None = None,
    seed: int = 0,
    tile: int = 0,
    size: int | None = None,
) -> KnowngoodRun:
    """Trains on known-good images (C, H, W) within `minutes` (or exactly `steps` steps when minutes is None);
    `tile` > 0: a tiled model, tiles of that many native px at the working size `SIZE`. A whole-image model works
    at `size`, or (None) at `train`'s default for these images (`auto_size`: 128 px unless they are large). The
    colour mode is `channels`, or (None) `train`'s for these images: colour if any image has colour."""
    if tile:
        size = SIZE
    good = ArrayImageSet(paths=[], images=images)
    channels = good.channels if channels is None else channels
    model = ModelConfig(size=auto_size(shapes_of(images)) if size is None else size, channels=channels, tile=tile)
    tcfg = TrainConfig(steps=steps or 10**9, minutes=minutes or 0.0, seed=seed)
    start = time.monotonic()
    det = train_bundle(good, out, model=model, train=tcfg, progress=False, resume=False)
    seconds = time.monotonic() - start
    info = det.manifest["training"]
    return KnowngoodRun(det, out, seconds, float(info["seconds"]), int(info["steps_done"]))


def score(det: Detector, x: torch.Tensor) -> tuple[np.ndarray, np.ndarray, float]:
    """x (N, C, h, w) at the working shape -> scores (N,) (higher = less like known-good), heatmaps (N, h, w),
    ms per image, after one warm-up image (the first call's one-off costs are not per image). Whole-image models
    only."""
    det.score_batch(x[:1])
    start = time.perf_counter()
    scores, heats = det.score_batch(x)
    ms = (time.perf_counter() - start) * 1000 / len(x)
    return scores, heats.numpy(), ms


def score_images(det: Detector, images: list[np.ndarray]) -> tuple[np.ndarray, list[np.ndarray], float]:
    """Native-resolution images (C, H, W) -> scores (N,) (higher = less like known-good), heatmaps (H, W) at each
    image's own resolution, ms per image (after one warm-up image, as `score`): `Detector.score_images`, tiling
    included."""
    det.score_images(images[:1])
    start = time.perf_counter()
    scores, heats, _ = det.score_images(images)
    ms = (time.perf_counter() - start) * 1000 / len(images)
    return scores, heats, ms
