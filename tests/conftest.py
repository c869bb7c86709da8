"""Shared fixtures: a tiny model bundle (built once per session) and its known-good images."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch
from knowngood.training import bundle
from knowngood.training.config import ModelConfig
from knowngood.training.detector import Detector
from knowngood.training.perceptual import load_pretrained


def _tiny_good_images(n: int, size: int, seed: int = 0) -> list[np.ndarray]:
    """Smooth gray blobs with a little noise: cheap stand-ins for known-good parts."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:size, 0:size] / size
    out = []
    for _ in range(n):
        cx, cy = 0.5 + rng.normal(0, 0.02, 2)
        img = 0.2 + 0.6 * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / 0.05) + rng.normal(0, 0.01, (size, size))
        out.append(np.clip(img, 0, 1).astype(np.float32)[None])
    return out


@pytest.fixture(scope="session")
def tiny_good_images() -> list[np.ndarray]:
    return _tiny_good_images(24, 32)


@pytest.fixture(scope="session")
def tiny_bundle(tmp_path_factory, tiny_good_images) -> Path:
    """A 32 px grayscale bundle with every term: untrained GAN and feature-critic weights, the pretrained net,
    the memory of half the tiny good images, standardised on all of them; loads in ms."""
    perceptual = load_pretrained()  # before seeding: the GAN weights below are the same with or without it
    torch.manual_seed(0)
    cfg = ModelConfig(size=32, channels=1, width=8, z_channels=4, memory_size=256)
    graph = bundle.new_graph(cfg, perceptual)
    x = torch.from_numpy(np.stack(tiny_good_images))
    graph.fit_features(x[:12])  # the memory holds other images than those the spread is measured on, as in train
    graph.fit_standardisation(x)
    det = Detector(
        cfg=cfg,
        graph=graph,
        threshold=3.0,
        manifest={"model": {**cfg.__dict__}, "threshold": {"method": "fixed", "value": 3.0}},
    )
    feats = det.embed(x)
    frechet = {"train_mu": feats.mean(0), "train_sigma": np.cov(feats, rowvar=False), "holdout_features": feats}
    path = tmp_path_factory.mktemp("bundle") / "tiny.kgm"
    bundle.save(det, frechet, path)
    return path
