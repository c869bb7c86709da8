"""Quality section: knowngood and the peers on one dataset, every method on exactly the same images.

Metrics come from `training.metrics` (image AUROC and average precision through scikit-learn; pixel AUROC and
PRO up to 30 % false-positive rate, Bergmann et al. 2020), so the benchmark and `knowngood tune` agree.
"""

from __future__ import annotations

import hashlib
import time
from pathlib import Path

import numpy as np
import torch

from tests.bench import knowngood_runner
from tests.bench.datasets import Dataset
from tests.bench.peers import AutoEncoderPeer, simple_peers
from training import metrics
from training.data import to_model_input
from training.scoring import resize_maps

SIZE = knowngood_runner.SIZE
METHODS = ("knowngood", "knowngood-gan-only", "nearest-neighbour", "pca", "autoencoder", "mean-grey")
OURS = ("knowngood", "knowngood-gan-only")  # the second: the same nets without the perceptual term (ablation)


def _row(ds: Dataset, scores: np.ndarray, maps: np.ndarray | None, **extra) -> dict:
    row = {
        "image_auroc": metrics.image_auroc(ds.labels, scores),
        "average_precision": metrics.average_precision(ds.labels, scores),
        "pixel_auroc": None,
        "pro": None,
    }
    if ds.masks is not None and maps is not None:
        full = resize_maps(torch.from_numpy(np.asarray(maps, dtype=np.float32)), [m.shape for m in ds.masks])
        row["pixel_auroc"] = metrics.pixel_auroc(ds.masks, full)
        row["pro"] = metrics.pro_score(ds.masks, full)
    row.update(extra)
    return {k: round(v, 4) if isinstance(v, float) else v for k, v in row.items()}


def evaluate(
    ds: Dataset, *, minutes: float, bundle_dir: Path, fitted: dict | None = None, log=print
) -> tuple[dict, Path]:
    """{method: metrics row} for one dataset, and the path of the knowngood bundle trained on it.

    `fitted` caches trained models by training set: datasets that share one (elpv-pooled and elpv-pooled-p67)
    train each method once and are scored on their own test sets."""
    c = ds.channels
    x_train = to_model_input(ds.train, size=SIZE, channels=c)
    x_test = to_model_input(ds.test, size=SIZE, channels=c)
    fitted = {} if fitted is None else fitted
    key = hashlib.sha256(x_train.numpy().tobytes()).hexdigest()
    models = fitted.setdefault(key, {})
    rows = {}

    if "knowngood" not in models:
        log(f"[{ds.name}] knowngood: training for {minutes:g} min on {len(ds.train)} known-good images")
        bundle_dir.mkdir(parents=True, exist_ok=True)
        run = knowngood_runner.train(ds.train, bundle_dir / f"{ds.name}.kgm", minutes=minutes, channels=c)
        models["knowngood"] = (run, knowngood_runner.without_perceptual(run.detector, x_train))
    run, gan_only = models["knowngood"]
    for name, det in zip(OURS, (run.detector, gan_only)):
        scores, maps, ms = knowngood_runner.score(det, x_test)
        rows[name] = _row(
            ds,
            scores,
            maps,
            train_seconds=run.train_seconds,
            fit_seconds=run.fit_seconds,
            steps=run.steps,
            inspect_ms_per_image=ms,
        )
        _log_row(log, ds.name, name, rows[name])

    # the auto-encoder gets the CPU time knowngood's fitting loop actually used on this dataset
    for peer in [*simple_peers(), AutoEncoderPeer(seconds=run.fit_seconds)]:
        if peer.name not in models:
            start = time.monotonic()
            peer.fit(x_train)
            models[peer.name] = (peer, time.monotonic() - start)
        peer, train_seconds = models[peer.name]
        start = time.perf_counter()
        scores, maps = peer.score(x_test)
        ms = (time.perf_counter() - start) * 1000 / len(x_test)
        extra = {"steps": peer.steps_done} if hasattr(peer, "steps_done") else {}
        rows[peer.name] = _row(ds, scores, maps, train_seconds=train_seconds, inspect_ms_per_image=ms, **extra)
        _log_row(log, ds.name, peer.name, rows[peer.name])
    return {m: rows[m] for m in METHODS}, run.bundle


def _log_row(log, dataset: str, method: str, row: dict) -> None:
    pix = "" if row["pixel_auroc"] is None else f"  pixel AUROC {row['pixel_auroc']:.3f}  PRO {row['pro']:.3f}"
    log(
        f"[{dataset}] {method:18s} image AUROC {row['image_auroc']:.3f}  AP {row['average_precision']:.3f}{pix}"
        f"  train {row['train_seconds']:.0f} s  inspect {row['inspect_ms_per_image']:.2f} ms/image"
    )


def best_peers(quality: dict) -> dict:
    """Per dataset: the peer with the highest image AUROC and knowngood's margin over it (positive = ahead)."""
    out = {}
    for name, rows in quality.items():
        peers = {m: r["image_auroc"] for m, r in rows.items() if m not in OURS}
        best = max(peers, key=peers.get)
        out[name] = {
            "best_peer": best,
            "best_peer_auroc": peers[best],
            "knowngood_auroc": rows["knowngood"]["image_auroc"],
            "margin": round(rows["knowngood"]["image_auroc"] - peers[best], 4),
        }
    return out


def markdown_table(quality: dict) -> str:
    """Datasets x methods, image AUROC; the best of each row in bold."""
    lines = ["| dataset | " + " | ".join(METHODS) + " |", "| --- |" + " ---: |" * len(METHODS)]
    for name, rows in quality.items():
        best = max(r["image_auroc"] for r in rows.values())
        cells = [
            f"**{rows[m]['image_auroc']:.3f}**" if rows[m]["image_auroc"] == best else f"{rows[m]['image_auroc']:.3f}"
            for m in METHODS
        ]
        lines.append(f"| {name} | " + " | ".join(cells) + " |")
    return "\n".join(lines)
