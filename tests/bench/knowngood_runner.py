"""knowngood itself in the benchmark: train a bundle through the real `train_bundle` path from in-memory images,
then score a test set with the loaded `Detector`, exactly as `knowngood inspect` would."""

from __future__ import annotations

import dataclasses
import hashlib
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from training.config import ModelConfig, TrainConfig
from training.data import ImageSet
from training.detector import Detector
from training.fit import split_indices
from training.scoring import ScoringGraph
from training.train import train_bundle

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
    channels: int = 1,
    seed: int = 0,
) -> KnowngoodRun:
    """Trains on known-good images (C, H, W) within `minutes` (or exactly `steps` steps when minutes is None)."""
    model = ModelConfig(size=SIZE, channels=channels)
    tcfg = TrainConfig(steps=steps or 10**9, minutes=minutes or 0.0, seed=seed)
    start = time.monotonic()
    det = train_bundle(
        ArrayImageSet(paths=[], images=images), out, model=model, train=tcfg, progress=False, resume=False
    )
    seconds = time.monotonic() - start
    info = det.manifest["training"]
    return KnowngoodRun(det, out, seconds, float(info["seconds"]), int(info["steps_done"]))


def score(det: Detector, x: torch.Tensor) -> tuple[np.ndarray, np.ndarray, float]:
    """x (N, C, S, S) -> scores (N,) (higher = less like known-good), heatmaps (N, S, S), ms per image."""
    start = time.perf_counter()
    scores, heats = det.score_batch(x)
    ms = (time.perf_counter() - start) * 1000 / len(x)
    return scores, heats.numpy(), ms


def without_perceptual(det: Detector, x: torch.Tensor) -> Detector:
    """The same trained generator, encoder and critic scored with the GAN terms only (the ablation the benchmark
    reports beside knowngood): standardised again on the very held-out images `train_bundle` used; x (N, C, S, S)
    are the training images in the bundle's working size and colour mode, in the order `train_bundle` saw them."""
    cfg = dataclasses.replace(det.cfg, perceptual=0.0)
    g = det.graph
    graph = ScoringGraph(cfg, g.encoder, g.generator, g.critic)
    train_cfg = det.manifest["training"]["config"]
    _, std_idx, _ = split_indices(len(x), train_cfg["holdout_share"], train_cfg["seed"])
    graph.fit_standardisation(x[std_idx])
    return Detector(cfg=cfg, graph=graph, threshold=det.threshold, manifest=det.manifest)
