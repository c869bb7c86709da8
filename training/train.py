"""From a folder of known-good images to a saved bundle: split, fit, standardise, calibrate, write."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import torch

from training import bundle
from training.config import ModelConfig, TrainConfig, to_dict
from training.data import ImageSet, to_model_input
from training.detector import Detector
from training.errors import BadDataset
from training.fit import fit, split_indices
from training.frechet import gaussian_stats
from training.perceptual import load_pretrained
from training.scoring import ScoringGraph
from training.tuning import conformal_threshold

MIN_IMAGES = 12
SCORE_DEFINITION = (
    "heatmap = max(0, z_pixel, kappa * z_feature, perceptual * z_perceptual), where z_* are smoothed maps "
    "standardised per pixel against held-out known-good images: the image residual |x - G(E(x))| at the "
    "best-matching reconstruction pixel within `residual_shift` px, the "
    "critic-feature residual |f(x) - f(G(E(x)))|^2 and the perceptual term, the mean squared standardised "
    "deviation of pretrained EfficientNet-Lite0 features of x from those of the known-good images at the "
    "best-matching nearby position; score = mean of the top `top_fraction` of the heatmap. Higher = less like "
    "known-good; flag when score > threshold."
)


def train_bundle(
    good: ImageSet, out: Path, *, model: ModelConfig, train: TrainConfig, progress: bool = True, resume: bool = True
) -> Detector:
    """Trains on `good`, keeps `train.holdout_share` of it out for standardisation and the conformal threshold,
    and writes the bundle to `out`. A checkpoint beside `out` lets an interrupted run resume."""
    if len(good.images) < MIN_IMAGES:
        raise BadDataset(f"need at least {MIN_IMAGES} known-good images to train, got {len(good.images)}")
    perceptual = load_pretrained() if model.perceptual > 0 else None  # before the fit: fail fast without it
    x = to_model_input(good.images, size=model.size, channels=model.channels)
    fit_idx, std_idx, cal_idx = split_indices(len(x), train.holdout_share, train.seed)
    hold = torch.cat([x[std_idx], x[cal_idx]])
    ckpt = Path(str(out) + ".ckpt")
    if not resume and ckpt.exists():
        ckpt.unlink()
    result = fit(x[fit_idx], hold, model, train, checkpoint=ckpt, progress=progress)
    graph = ScoringGraph(model, result.encoder, result.generator, result.critic, perceptual=perceptual)
    graph.fit_features(x[fit_idx])
    graph.fit_standardisation(x[std_idx])
    det = Detector(cfg=model, graph=graph, threshold=float("inf"))
    cal_scores, _ = det.score_batch(x[cal_idx])
    choice = conformal_threshold(cal_scores, train.target_false_reject)
    det.threshold = float(choice.value)
    train_feats = det.embed(x[fit_idx])
    mu, sigma = gaussian_stats(train_feats)
    det.manifest = _manifest(good, model, train, result, choice, len(fit_idx), len(std_idx), len(cal_idx))
    frechet = {"train_mu": mu, "train_sigma": sigma, "holdout_features": det.embed(hold)}
    bundle.save(det, frechet, out)
    if ckpt.exists():
        ckpt.unlink()
    return bundle.load(out)[0]  # what was written, with its model id and sha256


def _manifest(good, model, train, result, choice, n_fit, n_std, n_cal) -> dict:
    return {
        "created": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        "preprocessing": {
            "size": model.size,
            "channels": model.channels,
            "colour_mode": "RGB" if model.channels == 3 else "grayscale (ITU-R BT.601 luma)",
            "resize": "stretch to size x size, bilinear with antialiasing",
            "range": [0.0, 1.0],
        },
        "model": to_dict(model),
        "score": {
            "definition": SCORE_DEFINITION,
            "kappa": model.kappa,
            "perceptual": model.perceptual,
            "unit": "held-out known-good std",
            "direction": "higher = less like known-good; flagged when score > threshold",
        },
        "training": {
            "config": to_dict(train),
            "steps_done": result.steps_done,
            "seconds": round(result.seconds, 1),
            "chosen_step": result.chosen_step,
            "chosen_by": "lowest held-out reconstruction error",
            "history": result.history,
            "images": {"fit": n_fit, "standardise": n_std, "calibrate": n_cal, "skipped": len(good.skipped)},
        },
        "threshold": {
            **choice.to_dict(),
            "set_by": "train",
            "set_at": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        },
        "fingerprints": {"training": good.fingerprint(), "holdout": None},
    }
