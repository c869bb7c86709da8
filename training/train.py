"""From a folder of known-good images to a saved bundle: split, fit, standardise, calibrate, write."""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path

import numpy as np
import torch
from knowngood.training import bundle
from knowngood.training.config import (
    AUTO_SIZE_MAX,
    SCALE_NOTE_RATIO,
    TERM_FIELDS,
    ModelConfig,
    TrainConfig,
    to_dict,
)
from knowngood.training.data import resized, to_model_input, working_shape
from knowngood.training.detector import Detector, pad_to, tile_boxes
from knowngood.training.errors import BadConfig, BadDataset
from knowngood.training.feature_critic import fit_feature_critic
from knowngood.training.fit import fit, split_indices
from knowngood.training.folders import ImageSet, subset
from knowngood.training.frechet import gaussian_stats
from knowngood.training.perceptual import load_pretrained
from knowngood.training.scoring import ScoringGraph
from knowngood.training.selection import choose_terms
from knowngood.training.tuning import conformal_threshold

MIN_IMAGES = 12
SCORE_DEFINITION = (
    "heatmap = max(0, combine(pixel * z_pixel, kappa * z_critic, perceptual * z_perceptual, memory * z_memory, "
    "adversarial * z_adversarial)) over the terms with a positive weight, combine = their maximum, or their sum "
    "divided by the sum of the weights (model.combine: max or mean), "
    "where z_* are smoothed maps standardised per pixel (per term for a tiled model) "
    "against held-out known-good images: the image residual |x - G(E(x))| at the best-matching reconstruction "
    "pixel within `residual_shift` px, the critic-feature residual |f(x) - f(G(E(x)))|^2, the per-position term "
    "(mean squared standardised deviation of pretrained EfficientNet-Lite0 features of x from those of the "
    "known-good images at the best-matching nearby position), the position-free term (distance of each "
    "patch's features to the nearest known-good patch in a coreset memory), and the feature-space adversarial "
    "term (a critic's score on the pretrained patch features); score = mean of the top "
    "`top_fraction` of the heatmap (tiled: of the worst tile). Higher = less like known-good; flag when "
    "score > threshold. The weights are chosen at train time on synthetic defects (score.choice)."
)


def train_bundle(
    good: ImageSet,
    out: Path,
    *,
    model: ModelConfig,
    train: TrainConfig,
    progress: bool = True,
    resume: bool = True,
    start: Detector | None = None,
    start_path: Path | None = None,
) -> Detector:
    """Trains on `good`, keeps `train.holdout_share` of it out for standardisation, the choice of terms and the
    conformal threshold, and writes the bundle to `out`. A checkpoint beside `out` lets an interrupted run resume.

    `model.size` is the working long side (the short side follows the images' aspect ratio); with `model.tile`
    the networks see tiles of that many native pixels, so a large image keeps the camera's own scale.

    `start` (loaded from `start_path`; `train --from`): a bundle whose trained nets (generator, encoder, critic,
    feature critic) this run continues from instead of a fresh init; `model` is then `continued_config(start)`.
    Everything fitted to data (memory, statistics, standardisation, the choice of terms, the threshold, the
    Fréchet reference, fingerprints) is fitted afresh on `good`; the manifest records the bundle continued from.

    `good.images` are native (a tiled model's may stay in their files, `ImageFiles`: decoded one at a time), or
    (whole-image models) already at the working shape (`load_folder`'s `shape`, as `train` loads them): the inputs
    are the same either way, as the one resize is applied once."""
    if len(good.images) < MIN_IMAGES:
        raise BadDataset(f"need at least {MIN_IMAGES} known-good images to train, got {len(good.images)}")
    perceptual = load_pretrained() if model.pretrained else None  # before the fit: fail fast without it
    model = _with_working_shape(model, good.shapes) if start is None else _same_shape(model, good.shapes)
    fit_idx, std_idx, cal_idx = split_indices(len(good.images), train.holdout_share, train.seed)
    sets = {
        name: _inputs(good, idx, model, train.seed)
        for name, idx in (("fit", fit_idx), ("std", std_idx), ("cal", cal_idx))
    }
    hold = torch.cat([sets["std"], sets["cal"]])
    # a continued run's checkpoint names its start: a fresh run's checkpoint beside `out` must not resume it
    ckpt = Path(str(out) + ".ckpt" if start is None else f"{out}.from-{start.model_id}.ckpt")
    if not resume and ckpt.exists():
        ckpt.unlink()
    gan_init, critic_init = _start_weights(start)
    result = fit(sets["fit"], hold, model, train, checkpoint=ckpt, progress=progress, init=gan_init)
    nets = (result.encoder, result.generator, result.critic)
    feature_critic = None
    phi = None  # pretrained features of the fit split: computed once, for the feature critic and the choice
    if perceptual is not None:
        phi = torch.cat([perceptual(sets["fit"][i : i + 32]) for i in range(0, len(sets["fit"]), 32)])
    if model.adversarial > 0:
        if progress:
            print("training the feature-space critic ...", flush=True)
        feature_critic = fit_feature_critic(phi, steps=train.critic_feature_steps, seed=train.seed, init=critic_init)
    choice = None
    if train.choose_terms:
        if progress:
            print("choosing the terms on synthetic defects ...", flush=True)
        choice = choose_terms(
            model,
            nets,
            perceptual,
            fit_x=sets["fit"],
            std_x=sets["std"],
            good_x=_sample(sets["cal"], MAX_SELECTION, train.seed),
            shifts=train.residual_shifts,
            feature_critic=feature_critic,
            fit_phi=phi,
            seed=train.seed,
        )
        model = choice.cfg
    del phi
    graph = ScoringGraph(
        model, *nets, perceptual=perceptual if model.pretrained else None, feature_critic=feature_critic
    )
    if choice is not None:
        choice.adopt_reference(graph)  # the candidates' fitted memory and statistics: no second coreset
    else:
        graph.fit_features(sets["fit"], seed=train.seed)
    graph.fit_standardisation(sets["std"])
    det = Detector(cfg=model, graph=graph, threshold=float("inf"))
    cal_scores, _, _ = det.score_images(subset(good.images, cal_idx))
    threshold = conformal_threshold(cal_scores, train.target_false_reject)
    det.threshold = float(threshold.value)
    train_feats = det.embed_images(subset(good.images, fit_idx))
    mu, sigma = gaussian_stats(train_feats)
    counts = (len(fit_idx), len(std_idx), len(cal_idx))
    det.manifest = _manifest(good, model, train, result, threshold, counts, choice)
    det.manifest["training"]["continued_from"] = (
        None if start is None else {"bundle": str(start_path), "model_id": start.model_id, "sha256": start.sha256}
    )
    held = subset(good.images, np.r_[std_idx, cal_idx])
    frechet = {"train_mu": mu, "train_sigma": sigma, "holdout_features": det.embed_images(held)}
    bundle.save(det, frechet, out)
    if ckpt.exists():
        ckpt.unlink()
    return bundle.load(out)[0]  # what was written, with its model id and sha256


MAX_TILES = 4000  # tiles per split: enough to cover a part's variation, bounded memory for multi-megapixel sets
# inputs the choice of terms pastes defects into (x 6 with the copies): more adds little evidence and, for tiled
# models of megapixel images (thousands of tiles), cost most of a 25-minute training (bench, demo-casting-large);
# 400 x 6 maps per term keep the choice's memory where 512 x 4 had it (the training-memory bench)
MAX_SELECTION = 400


def _sample(x, n: int, seed: int):
    """At most n of x's items (a tensor's rows or a list), a fixed random choice in their original order."""
    if len(x) <= n:
        return x
    keep = np.sort(np.random.default_rng(seed).choice(len(x), n, replace=False))
    return x[keep] if isinstance(x, torch.Tensor) else [x[k] for k in keep]


SMALLEST_SEEN_PX = 2  # working-size px a defect needs to be seen at all (README, Limits)


def median_side(shapes: list[tuple[int, int]]) -> int:
    """The median long side of images of native (H, W) `shapes`, px."""
    sides = sorted(max(hw) for hw in shapes)
    return int(sides[len(sides) // 2])


def auto_size(shapes: list[tuple[int, int]], default: int = ModelConfig.size) -> int:
    """The working long side when `train` is not given --size or --tile: the default for images up to
    `SCALE_NOTE_RATIO` times it (elpv's 300 px cells stay at 128 px), else the smallest multiple of 16 that shrinks
    the median native long side at most that much (a 640 px image: 256 px, so a 10 px defect is still 4 px), up to
    `AUTO_SIZE_MAX`. Never more than four times the smallest image's short side (`min_side_for`). `shapes`: the
    images' native (H, W)."""
    if not shapes:
        return default
    wanted = int(np.ceil(median_side(shapes) / SCALE_NOTE_RATIO / 16)) * 16
    smallest = min(min(hw) for hw in shapes)
    return int(max(default, min(wanted, AUTO_SIZE_MAX, 4 * smallest // 16 * 16)))


def scale_note(shapes: list[tuple[int, int]], model: ModelConfig) -> str | None:
    """A warning when the images are shrunk so far that small defects vanish (whole-image models only): the median
    native long side against the working long side, and the smallest defect, in native px, still seen."""
    if model.tile or not shapes:
        return None
    native = median_side(shapes)
    ratio = native / model.size
    if ratio < SCALE_NOTE_RATIO:
        return None
    return (
        f"the images are about {native} px on the long side and are seen at {model.size} px ({ratio:.1f}x smaller): "
        f"a defect under about {SMALLEST_SEEN_PX * ratio:.0f} px in the image may be missed; --size "
        f"{min(1024, 2 * model.size)} or more, or --tile {model.size} (tiles at the camera's own scale), sees it"
    )


def continued_config(start: Detector, *, size: int | None, tile: int | None, name: str) -> ModelConfig:
    """The model settings of a run continuing from the bundle `start` (`train --from`, file `name`): the bundle's
    preprocessing and network settings, which its weights fit, with the terms' weights, the residual shift and the
    memory's stride back at their defaults, to be chosen again on the new images. A --size or --tile other than the
    bundle's is refused."""
    side, own_tile = max(start.cfg.shape), start.cfg.tile
    if size is not None and size != side:
        raise BadConfig(
            f"--size {size} conflicts with --from {name}, which works at {side} px: a continued model keeps its "
            "bundle's settings (leave out --size, or train afresh without --from)"
        )
    if tile is not None and tile != own_tile:
        has = f"tiles of {own_tile} px" if own_tile else "whole images (no tiles)"
        raise BadConfig(
            f"--tile {tile} conflicts with --from {name}, which inspects {has}: a continued model keeps its "
            "bundle's settings (leave out --tile, or train afresh without --from)"
        )
    chosen = (*TERM_FIELDS, "residual_shift", "memory_pool", "memory_size")  # what the choice of terms sets
    defaults = {field: getattr(ModelConfig, field) for field in chosen}
    return dataclasses.replace(start.cfg, **defaults)


def _start_weights(start: Detector | None) -> tuple[dict | None, dict | None]:
    """The state dicts a continued run starts from: {"E", "G", "D"} for `fit`, and the feature critic's (None
    when the bundle has none: its choice of terms left the adversarial term out)."""
    if start is None:
        return None, None
    g = start.graph
    gan = {key: net.state_dict() for key, net in (("E", g.encoder), ("G", g.generator), ("D", g.critic))}
    critic = getattr(g, "feature_critic", None)
    return gan, None if critic is None else critic.state_dict()


def _same_shape(model: ModelConfig, shapes: list[tuple[int, int]]) -> ModelConfig:
    """A continued model keeps its working shape; new images of another aspect ratio would need another one."""
    if not model.tile and working_shape(shapes, max(model.shape)) != model.shape:
        h, w = working_shape(shapes, max(model.shape))
        raise BadDataset(
            f"the images' aspect ratio gives a working shape of {h} x {w} px, but the model continued from works "
            f"at {model.shape[0]} x {model.shape[1]} px: train afresh without --from"
        )
    return model


def _with_working_shape(model: ModelConfig, shapes: list[tuple[int, int]]) -> ModelConfig:
    if model.tile:
        return dataclasses.replace(model, height=0)
    h, w = working_shape(shapes, model.size)
    return dataclasses.replace(model, size=w, height=0 if h == w else h)


def _inputs(good: ImageSet, idx: np.ndarray, model: ModelConfig, seed: int) -> torch.Tensor:
    """The networks' inputs from the images at `idx`: whole images at the working shape, or (tiled model) the
    tiles of each image at the camera's scale, a random `MAX_TILES` of them when there are more, each image
    decoded once and its tiles reduced to the working shape at once."""
    if not model.tile:
        return to_model_input(subset(good.images, idx), size=model.shape, channels=model.channels)
    boxes = [(k, box) for k in idx for box in tile_boxes(good.shapes[k], model.tile)]
    boxes = _sample(boxes, MAX_TILES, seed)
    t = model.tile
    by_image: dict[int, list[int]] = {}
    for j, (k, _) in enumerate(boxes):
        by_image.setdefault(k, []).append(j)
    crops: list = [None] * len(boxes)
    for k, places in by_image.items():
        image = pad_to(good.images[k], t)
        for j in places:
            y, x = boxes[j][1]
            crops[j] = resized(np.ascontiguousarray(image[:, y : y + t, x : x + t]), model.shape)
    return to_model_input(crops, size=model.shape, channels=model.channels)


def _manifest(good, model, train, result, choice, counts, terms) -> dict:
    n_fit, n_std, n_cal = counts
    return {
        "created": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        "preprocessing": {
            "size": model.size,
            "channels": model.channels,
            "colour_mode": "RGB" if model.channels == 3 else "grayscale (ITU-R BT.601 luma)",
            "resize": (
                f"tiles of {model.tile} px (overlap 1/8) resized to {model.size} x {model.size}"
                if model.tile
                else f"resize to {model.shape[0]} x {model.shape[1]} (the training images' aspect ratio), bilinear, "
                "antialiased"
            ),
            "range": [0.0, 1.0],
        },
        "model": to_dict(model),
        "score": {
            "definition": SCORE_DEFINITION,
            "kappa": model.kappa,
            "perceptual": model.perceptual,
            "pixel": model.pixel,
            "memory": model.memory,
            "adversarial": model.adversarial,
            "combine": model.combine,
            "choice": terms.evidence if terms is not None else {"method": "set by the caller"},
            "unit": "held-out known-good std",
            "direction": "higher = less like known-good; flagged when score > threshold",
        },
        "training": {
            "config": to_dict(train),
            "steps_done": result.steps_done,
            "seconds": round(result.seconds, 1),
            "chosen_step": result.chosen_step,
            "chosen_by": "lowest held-out reconstruction error",
            "stopped_early": result.stopped_early,
            "history": result.history,
            "images": {"fit": n_fit, "standardise": n_std, "calibrate": n_cal, "skipped": len(good.skipped)},
        },
        "threshold": {
            **choice.to_dict(),
            "set_by": "train",
            "set_at": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        },
        "fingerprints": {"training": good.fingerprint(), "holdout": None},
        "folders": {"training": None if good.folder is None else str(good.folder), "holdout": None},
    }
