"""Quality section: knowngood and the peers on one dataset, every method on exactly the same images, and the
ablation: the same trained nets scored with other terms (`ablation.py`) and, on a dataset knowngood tiles or sees
at more than 128 px (`train`'s default for large images), the same recipe trained on the whole image at 128 px
("knowngood-128px", what tiling or the working size buys).

The peers see every image resized to 128 px; where knowngood works at a larger size, the patch-memory peer is
also run at that size (`SAME_SIZE_PEER`) and counts among the peers knowngood is measured against. knowngood scores
a whole-image model on the same kind of batch (its working shape) and a tiled model through
`Detector.score_images` on the native images; either way its heatmaps reach the metrics at each test image's own
resolution, and every method's maps are resized to the masks' shape.
Metrics come from `training.metrics` (image AUROC and average precision through scikit-learn; pixel AUROC and
PRO up to 30 % false-positive rate, Bergmann et al. 2020), so the benchmark and `knowngood tune` agree.
"""

from __future__ import annotations

import hashlib
import time
from pathlib import Path

import numpy as np
import torch
from knowngood.training import metrics
from knowngood.training.data import shapes_of, to_model_input
from knowngood.training.scoring import TERMS, resize_maps, term_weights
from knowngood.training.train import auto_size

from tests.bench import ablation, knowngood_runner
from tests.bench.datasets import Dataset
from tests.bench.peers import AutoEncoderPeer, patch_memory_at, simple_peers

SIZE = knowngood_runner.SIZE
METHODS = ("knowngood", "patch-memory", "nearest-neighbour", "pca", "autoencoder", "mean-grey")
# where knowngood works above 128 px (`train`'s default for large images), the patch-memory peer also at that size,
# with as many entries per image position as at 128 px (`selection.fine_memory_entries`): the peer nearest to
# knowngood's own memory term, compared at the same scale of the image
SAME_SIZE_PEER = "patch-memory-same-size"
PEERS = (*METHODS[1:], SAME_SIZE_PEER)
# the ablation section: the same trained nets with other terms (ablation.py), and on a tiled dataset or one seen
# at more than 128 px the same recipe trained on the whole image at 128 px
TILING_ROW = "knowngood-128px"


def _row(ds: Dataset, scores: np.ndarray, maps, **extra) -> dict:
    """maps: one heatmap per test image, (N, h, w) or a list of (H, W); resized to each mask's shape."""
    row = {
        "image_auroc": metrics.image_auroc(ds.labels, scores),
        "average_precision": metrics.average_precision(ds.labels, scores),
        "pixel_auroc": None,
        "pro": None,
    }
    if ds.masks is not None and maps is not None:
        full = [
            resize_maps(torch.from_numpy(np.asarray(m, dtype=np.float32))[None], [mask.shape])[0]
            for m, mask in zip(maps, ds.masks, strict=True)
        ]
        row["pixel_auroc"] = metrics.pixel_auroc(ds.masks, full)
        row["pro"] = metrics.pro_score(ds.masks, full)
    row.update(extra)
    return {k: round(v, 4) if isinstance(v, float) else v for k, v in row.items()}


def _train(
    ds: Dataset, models: dict, key: str, tile: int, minutes: float, bundle_dir: Path, log, size: int | None = None
):
    """knowngood trained on ds (cached in `models` under `key`): tiled, or whole images at `size` (None: `train`'s
    default for them, `auto_size`)."""
    if key not in models:
        how = f"{tile} px tiles" if tile else f"whole images at {size or auto_size(shapes_of(ds.train))} px"
        log(f"[{ds.name}] {key}: training for {minutes:g} min on {len(ds.train)} known-good images, {how}")
        bundle_dir.mkdir(parents=True, exist_ok=True)
        stem = ds.name if key == "knowngood" else f"{ds.name}-{key.removeprefix('knowngood-')}"
        models[key] = knowngood_runner.train(
            ds.train, bundle_dir / f"{stem}.kgm", minutes=minutes, channels=ds.channels, tile=tile, size=size
        )
    return models[key]


def _score_knowngood(ds: Dataset, run) -> tuple[np.ndarray, list[np.ndarray], float]:
    """Scores, heatmaps at each test image's own resolution, ms per image (eager PyTorch). A tiled model goes
    through `Detector.score_images` on the native images; a whole-image model through the prepared batch."""
    det = run.detector
    if det.cfg.tile:
        return knowngood_runner.score_images(det, ds.test)
    scores, heats, ms = knowngood_runner.score(det, det.prepare(ds.test))
    return scores, resize_maps(torch.from_numpy(heats), [im.shape[-2:] for im in ds.test]), ms


def _knowngood_row(ds: Dataset, run, scores, maps, ms) -> dict:
    evidence = run.detector.manifest.get("score", {}).get("choice", {})
    return _row(
        ds,
        scores,
        maps,
        train_seconds=run.train_seconds,
        fit_seconds=run.fit_seconds,
        steps=run.steps,
        inspect_ms_per_image=ms,
        tile=run.detector.cfg.tile,
        terms=term_weights(run.detector.cfg),
        combine=run.detector.cfg.combine,
        synthetic_image_auroc=evidence.get("image_auroc"),
    )


def evaluate(
    ds: Dataset, *, minutes: float, bundle_dir: Path, fitted: dict | None = None, log=print
) -> tuple[dict, dict, Path]:
    """For one dataset: {method: metrics row} for knowngood and the peers, {variant: metrics row} for the
    ablation (the same nets with other terms; `ablation.py`), and the path of the knowngood bundle trained on it.

    `fitted` caches trained models by training set: datasets that share one (elpv-pooled and elpv-pooled-p67)
    train each method once and are scored on their own test sets."""
    x_train = to_model_input(ds.train, size=SIZE, channels=ds.channels)
    x_test = to_model_input(ds.test, size=SIZE, channels=ds.channels)
    fitted = {} if fitted is None else fitted
    key = hashlib.sha256(x_train.numpy().tobytes()).hexdigest() + f"-tile{ds.tile}"
    models = fitted.setdefault(key, {})

    run = _train(ds, models, "knowngood", ds.tile, minutes, bundle_dir, log)
    scores, maps, ms = _score_knowngood(ds, run)
    rows = {"knowngood": _knowngood_row(ds, run, scores, maps, ms)}
    _log_row(log, ds.name, "knowngood", rows["knowngood"])
    ablated = _ablation_rows(ds, run, models, (scores, maps), log)
    if ds.tile or max(run.detector.cfg.shape) != SIZE:  # what tiling or the larger working size buys: the same
        run128 = _train(ds, models, TILING_ROW, 0, minutes, bundle_dir, log, size=SIZE)  # recipe at 128 px
        ablated[TILING_ROW] = _knowngood_row(ds, run128, *_score_knowngood(ds, run128))
        _log_row(log, ds.name, TILING_ROW, ablated[TILING_ROW])

    shape = run.detector.cfg.shape
    if not ds.tile and max(shape) != SIZE:
        rows[SAME_SIZE_PEER] = same_size_peer_row(ds, shape, models)
        _log_row(log, ds.name, SAME_SIZE_PEER, rows[SAME_SIZE_PEER])

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
    return {m: rows[m] for m in (*METHODS, SAME_SIZE_PEER) if m in rows}, ablated, run.bundle


def same_size_peer_row(ds: Dataset, shape: tuple[int, int], models: dict) -> dict:
    """The patch-memory peer's row with every image at knowngood's working `shape` (H, W) instead of 128 px
    (`patch_memory_at`); fitted once per training set (`models`)."""
    if SAME_SIZE_PEER not in models:
        start = time.monotonic()
        models[SAME_SIZE_PEER] = (patch_memory_at(shape, ds.train, ds.channels), time.monotonic() - start)
    peer, train_seconds = models[SAME_SIZE_PEER]
    start = time.perf_counter()
    x_test = to_model_input(ds.test, size=shape, channels=ds.channels)
    scores, maps = peer.score(x_test)
    ms = (time.perf_counter() - start) * 1000 / len(x_test)
    return _row(ds, scores, maps, train_seconds=train_seconds, inspect_ms_per_image=ms)


def _ablation_rows(ds: Dataset, run, models: dict, reference, log) -> dict:
    """{variant: row} of `ablation.variants`, plus `check`: how closely the graph behind them reproduces the
    bundle with its own weights (differences at float32 rounding mean the variants are the bundle's nets and
    fitted statistics, not a refit)."""
    if "ablation-graph" not in models:
        log(f"[{ds.name}] ablation: fitting every term on the trained nets")
        models["ablation-graph"] = ablation.all_terms_graph(run.detector, ds.train)
    start = time.perf_counter()
    scored, check = ablation.score_variants(
        run.detector, models["ablation-graph"], ds.test, keep_maps=ds.masks is not None, reference=reference
    )
    ms = (time.perf_counter() - start) * 1000 / len(ds.test)
    log(f"[{ds.name}] ablation: {len(scored)} variants in {ms:.1f} ms/image (terms computed once); check {check}")
    out = {}
    for name, (scores, maps) in scored.items():
        out[name] = _row(ds, scores, maps)
        _log_row(log, ds.name, name, out[name])
    out["check"] = check
    return out


def _log_row(log, dataset: str, method: str, row: dict) -> None:
    pix = "" if row["pixel_auroc"] is None else f"  pixel AUROC {row['pixel_auroc']:.3f}  PRO {row['pro']:.3f}"
    cost = ""
    if "train_seconds" in row:
        cost = f"  train {row['train_seconds']:.0f} s  inspect {row['inspect_ms_per_image']:.2f} ms/image"
    log(f"[{dataset}] {method:28s} image AUROC {row['image_auroc']:.3f}  AP {row['average_precision']:.3f}{pix}{cost}")


def best_peers(quality: dict) -> dict:
    """Per dataset: the peer with the highest image AUROC and knowngood's margin over it (positive = ahead)."""
    out = {}
    for name, rows in quality.items():
        peers = {m: r["image_auroc"] for m, r in rows.items() if m in PEERS}
        best = max(peers, key=peers.get)
        out[name] = {
            "best_peer": best,
            "best_peer_auroc": peers[best],
            "knowngood_auroc": rows["knowngood"]["image_auroc"],
            "margin": round(rows["knowngood"]["image_auroc"] - peers[best], 4),
        }
    return out


def markdown_table(quality: dict) -> str:
    """Datasets x methods (knowngood and the peers), image AUROC; the best of each row in bold."""
    lines = ["| dataset | " + " | ".join(METHODS) + " |", "| --- |" + " ---: |" * len(METHODS)]
    for name, rows in quality.items():
        best = max(rows[m]["image_auroc"] for m in METHODS)
        cells = [
            f"**{rows[m]['image_auroc']:.3f}**" if rows[m]["image_auroc"] == best else f"{rows[m]['image_auroc']:.3f}"
            for m in METHODS
        ]
        lines.append(f"| {name} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


def ablation_table(quality: dict, ablated: dict) -> str:
    """Variants x datasets, image AUROC ("–" where a variant does not apply), knowngood's chosen model first,
    then the terms each dataset's model chose."""
    names = list(ablated)
    every = [*ablation.variants(dict.fromkeys(TERMS, 1.0)), TILING_ROW]  # the table's row order
    order = ["knowngood"] + [v for v in every if any(v in rows for rows in ablated.values())]
    lines = ["| variant | " + " | ".join(names) + " |", "| --- |" + " ---: |" * len(names)]
    for variant in order:
        cells = []
        for name in names:
            row = quality.get(name, {}).get(variant) or ablated[name].get(variant)
            cells.append("–" if row is None else f"{row['image_auroc']:.3f}")
        lines.append(f"| {variant} | " + " | ".join(cells) + " |")
    lines.append("")
    for name in names:
        terms = quality.get(name, {}).get("knowngood", {}).get("terms", {})
        lines.append(f"- {name}: chosen terms " + ", ".join(f"{t} {w:g}" for t, w in terms.items()))
    return "\n".join(lines)
