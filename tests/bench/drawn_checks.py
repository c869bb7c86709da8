"""What the checks with drawn defects share (`texture_check.py`, `lineart_check.py`): image AUROC per defect kind,
and the command line that measures each named set in turn and writes the JSON after each."""

from __future__ import annotations

import argparse
import json
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np
import torch
from knowngood.training.data import to_model_input
from knowngood.training.metrics import pixel_auroc
from sklearn.metrics import roc_auc_score

from tests.bench import knowngood_runner
from tests.bench.peers import PatchMemoryPeer, patch_memory_at

PEER_SIZE = 128  # the patch-memory peer's working size, as in the bench


def chw(im: np.ndarray) -> np.ndarray:
    """(H, W) gray or (H, W, 3) colour -> (C, H, W)."""
    return im[None] if im.ndim == 2 else im.transpose(2, 0, 1)


def test_set(good: Sequence[np.ndarray], bad: Sequence[np.ndarray], masks: Sequence[np.ndarray]):
    """Good then defective (H, W) or (H, W, 3) images -> (test images as (C, H, W), labels 0 / 1, masks: all
    False for the good)."""
    labels = np.r_[np.zeros(len(good)), np.ones(len(bad))]
    gt = [np.zeros(im.shape[:2], bool) for im in good] + list(masks)
    return [chw(im) for im in [*good, *bad]], labels, gt


def measure_set(
    train, test, labels, gt, bundle: Path, minutes: float, kinds: tuple[str, ...], size: int | None = None
) -> dict:
    """knowngood trained as `train` does (`knowngood_runner.train`, its default working size, or `size` as `train
    --size` gives it) and the patch-memory peer at `PEER_SIZE` on the same images, and at knowngood's working size
    where that is another: image AUROC overall and per defect kind, knowngood's pixel AUROC, what the choice took,
    training seconds, ms per test image. The bundle is written to `bundle`, its stem followed by -`size` if given."""
    if size:
        bundle = bundle.with_name(f"{bundle.stem}-{size}{bundle.suffix}")
    run = knowngood_runner.train(train, bundle, minutes=minutes, size=size)
    scores, heats, ms = knowngood_runner.score_images(run.detector, test)
    channels = run.detector.cfg.channels  # the peer in knowngood's colour mode
    peer = PatchMemoryPeer().fit(to_model_input(train, size=PEER_SIZE, channels=channels))
    peer_scores, _ = peer.score(to_model_input(test, size=PEER_SIZE, channels=channels))
    shape, same_auroc = run.detector.cfg.shape, None
    if max(shape) != PEER_SIZE:  # knowngood works at a larger size: the peer there too
        same = patch_memory_at(shape, train, channels)
        same_scores, _ = same.score(to_model_input(test, size=shape, channels=channels))
        same_auroc = round(float(roc_auc_score(labels, same_scores)), 4)
    choice = run.detector.manifest["score"]["choice"]
    result = {
        "size": run.detector.cfg.size,
        "knowngood": round(float(roc_auc_score(labels, scores)), 4),
        "knowngood_pixel": round(float(pixel_auroc(gt, heats)), 4),
        "patch_memory": round(float(roc_auc_score(labels, peer_scores)), 4),
        "patch_memory_same_size": same_auroc,
        "chosen": {k: w for k, w in choice["chosen"].items() if w > 0},
        "combine": choice["combine"],
        "train_seconds": round(run.train_seconds),  # train_bundle's wall time, as the bench reports it
        "ms_per_image": round(ms, 1),
    }
    n_good = int((labels == 0).sum())
    return result | per_kind(labels, n_good, kinds, knowngood=scores, patch_memory=peer_scores)


def per_kind(labels: np.ndarray, n_good: int, kinds: tuple[str, ...], **scores) -> dict[str, float]:
    """{"<method>_<kind>": image AUROC of the good images against that kind's defective ones}: the test set is
    `n_good` good images, then the defective ones with kinds in turn (kinds[i % len(kinds)])."""
    n_bad = len(labels) - n_good
    out = {}
    for k, kind in enumerate(kinds):
        idx = np.r_[np.arange(n_good), n_good + np.arange(k, n_bad, len(kinds))]
        for method, s in scores.items():
            out[f"{method}_{kind}"] = round(float(roc_auc_score(labels[idx], np.asarray(s)[idx])), 3)
    return out


def main(
    argv: list[str] | None,
    *,
    description: str,
    names: tuple[str, ...],
    what: str,
    measure: Callable[[str, float, Path, int | None], dict],
    default_out: Path,
    extra: Callable[[argparse.ArgumentParser], None] | None = None,
    before: Callable[[argparse.Namespace], int | None] | None = None,
) -> int:
    """Parses NAME ... [--minutes M] [--size PX] [--out FILE] (plus `extra`'s options), then `measure(name, minutes,
    out dir, size)` for each name (default: all), printing each result and writing them all to --out after each.
    `before` may act on the options first and return an exit code to stop there."""
    ap = argparse.ArgumentParser(description=description)
    ap.add_argument("names", nargs="*", help=f"any of {', '.join(names)} (default: all)")
    ap.add_argument("--minutes", type=float, default=2.5)
    ap.add_argument(
        "--size", type=int, default=None, help="knowngood's working size, as train --size (default: train's)"
    )
    ap.add_argument("--out", type=Path, default=default_out)
    if extra:
        extra(ap)
    args = ap.parse_args(argv)
    unknown = sorted(set(args.names) - set(names))
    if unknown:
        ap.error(f"unknown {what}(s) {', '.join(unknown)}; choose from {', '.join(names)}")
    if before and (code := before(args)) is not None:
        return code
    torch.set_num_threads(2)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    result = {}
    for name in args.names or names:
        result[name] = measure(name, args.minutes, args.out.parent, args.size)
        print(name, json.dumps(result[name]), flush=True)
        args.out.write_text(json.dumps(result, indent=2))
    return 0
