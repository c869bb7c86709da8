"""Per-term ablation of a trained knowngood bundle, on the same trained nets: each term alone
("knowngood-only-<term>"), each term the chosen model uses left out of its chosen weights
("knowngood-without-<term>"), every term at weight 1 ("knowngood-all-terms"), and the GAN's two terms, image
residual and critic-feature residual ("knowngood-gan-terms").

One scoring graph computes every term, built as `training.selection.candidate_graphs` builds its candidates
(the bundle's encoder, generator, critic and pretrained net) and fitted as `train_bundle` fits its graph: the
pretrained reference (`fit_features`: per-position statistics, coreset memory) on the fit split and the
standardisation on the std split (`training.fit.split_indices` with the manifest's `holdout_share` and `seed`;
the networks' inputs, tiles included, from `training.train._inputs`, the very function `train_bundle` uses).
Each term is standardised on its own, so a variant's heatmap, max(0, max over terms of w · z), is this graph's
with the other terms at weight 0: a term at weight 0 contributes 0, which the clamp at 0 already gives. So the
terms are computed once per test image and every variant is a different weight vector over them. The variant
with the bundle's own weights must reproduce the bundle's scores and heatmaps: `check` in the output.

The feature-space critic: the bundle's, when its model kept the adversarial term. Otherwise the bundle holds
none, and one is trained here with `training.feature_critic.fit_feature_critic` on the fit split's pretrained
features, with the manifest's `critic_feature_steps` and `seed` (the `TrainConfig` the bundle was trained
with): the same training `train_bundle` ran before the choice of terms dropped it.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import torch
from knowngood.training.config import TERM_FIELDS
from knowngood.training.detector import Detector, tile_boxes
from knowngood.training.feature_critic import fit_feature_critic
from knowngood.training.fit import split_indices
from knowngood.training.folders import ImageSet
from knowngood.training.perceptual import load_pretrained
from knowngood.training.scoring import TERMS, ScoringGraph, resize_maps, term_weights
from knowngood.training.selection import fine_memory_entries
from knowngood.training.train import _inputs  # the networks' inputs exactly as train_bundle makes them (tiles included)

GAN_TERMS = ("pixel", "critic")


def variants(chosen: dict[str, float]) -> dict[str, dict[str, float]]:
    """Variant name -> {term: weight}, in table order; `chosen`: the bundle's weights (`term_weights`)."""
    out = {"knowngood-gan-terms": dict.fromkeys(GAN_TERMS, 1.0), "knowngood-all-terms": dict.fromkeys(TERMS, 1.0)}
    out |= {f"knowngood-only-{t}": {t: 1.0} for t in TERMS}
    for t in chosen:
        rest = {k: w for k, w in chosen.items() if k != t}
        if rest:  # leaving the only term out leaves no model
            out[f"knowngood-without-{t}"] = rest
    return out


@torch.no_grad()
def all_terms_graph(det: Detector, images: list[np.ndarray]) -> ScoringGraph:
    """A graph computing every term on `det`'s trained nets, fitted on the splits of the training `images` (in the
    order `train_bundle` saw them) as the bundle's own graph was; see the module docstring."""
    config = det.manifest["training"]["config"]
    seed = int(config["seed"])
    fit_idx, std_idx, _ = split_indices(len(images), config["holdout_share"], seed)
    good = ImageSet(paths=[], images=images)  # `_inputs` takes a folder's set (its native shapes, for tiles)
    g = det.graph
    perceptual = g.perceptual if g.perceptual is not None else load_pretrained()
    fit_x = _inputs(good, fit_idx, det.cfg, seed)
    phi = torch.cat([perceptual(fit_x[i : i + 32]) for i in range(0, len(fit_x), 32)])  # (N, F, h/4, w/4)
    if det.cfg.adversarial > 0:
        feature_critic = g.feature_critic
    else:
        with torch.enable_grad():
            feature_critic = fit_feature_critic(phi, steps=int(config["critic_feature_steps"]), seed=seed)
    cfg = dataclasses.replace(det.cfg, **dict.fromkeys(TERM_FIELDS, 1.0))
    if det.cfg.memory <= 0:  # no memory chosen: the 4 px one, with the entries the choice gave it at this size
        cfg = dataclasses.replace(cfg, memory_pool=1, memory_size=fine_memory_entries(det.cfg.memory_size, cfg.shape))
    graph = ScoringGraph(cfg, g.encoder, g.generator, g.critic, perceptual=perceptual, feature_critic=feature_critic)
    graph.fit_features(fit_x, seed=seed, feats=phi)
    del phi, fit_x
    graph.fit_standardisation(_inputs(good, std_idx, det.cfg, seed))
    assert tuple(graph.terms) == TERMS, "the weight vectors below follow TERMS"
    return graph.eval()


def weight_vector(weights: dict[str, float]) -> torch.Tensor:
    return torch.tensor([weights.get(t, 0.0) for t in TERMS]).view(1, -1, 1, 1)


@torch.no_grad()
def _heats(graph: ScoringGraph, maps: torch.Tensor, vectors: dict[str, torch.Tensor]) -> dict:
    """Raw term maps (B, T, h, w) -> {variant: (scores (B,), heatmaps (B, h, w))}, through the graph's own
    `heat_from` (the one rule for heatmap and score) with each variant's weights."""
    out = {}
    for name, w in vectors.items():
        graph.weights.copy_(w)
        out[name] = graph.heat_from(maps)
    return out


def _whole(graph, det_all: Detector, images, vectors, keep_maps: bool) -> dict:
    x = det_all.prepare(images)
    batch = det_all.batch_size()
    parts = [_heats(graph, graph.term_maps(x[i : i + batch]), vectors) for i in range(0, len(x), batch)]
    out = {}
    for name in vectors:
        scores = torch.cat([p[name][0] for p in parts]).double().numpy()
        maps = None
        if keep_maps:
            maps = resize_maps(torch.cat([p[name][1] for p in parts]), [im.shape[-2:] for im in images])
        out[name] = (scores, maps)
    return out


def _tiled(graph, det_all: Detector, image, vectors, keep_map: bool) -> dict:
    """One native image -> {variant: (score, heatmap (H, W) or None)}: the worst tile's score and the tiles' maps
    stitched by their maximum, as `Detector.score_images` does for a tiled model (pinned by `check`)."""
    t, batch = det_all.cfg.tile, det_all.batch_size()
    boxes = tile_boxes(image.shape[-2:], t)
    x = det_all.prepare_tiles(image, boxes)
    parts = [_heats(graph, graph.term_maps(x[i : i + batch]), vectors) for i in range(0, len(x), batch)]
    h, w = image.shape[-2:]
    out = {}
    for name in vectors:
        score = float(torch.cat([p[name][0] for p in parts]).max())
        canvas = None
        if keep_map:
            canvas = np.zeros((max(h, t), max(w, t)), dtype=np.float32)
            tiles = resize_maps(torch.cat([p[name][1] for p in parts]), [(t, t)] * len(boxes))
            for (y, x0), m in zip(boxes, tiles):
                np.maximum(canvas[y : y + t, x0 : x0 + t], m, out=canvas[y : y + t, x0 : x0 + t])
            canvas = np.ascontiguousarray(canvas[:h, :w])
        out[name] = (score, canvas)
    return out


@torch.no_grad()
def score_variants(
    det: Detector,
    graph: ScoringGraph,
    images: list[np.ndarray],
    *,
    keep_maps: bool,
    reference: tuple[np.ndarray, list[np.ndarray] | np.ndarray | None] | None = None,
) -> tuple[dict[str, tuple[np.ndarray, list[np.ndarray] | None]], dict]:
    """Native test images (C, H, W) -> {variant: (scores (N,), heatmaps at each image's resolution or None)} for
    every variant of `variants` (higher = less like known-good), and `check`: the largest differences between
    the variant with the bundle's own weights and `reference` (the bundle's (scores, heatmaps) on these images)."""
    chosen = term_weights(det.cfg)
    specs = variants(chosen) | {"chosen": chosen}
    vectors = {name: weight_vector(w) for name, w in specs.items()}
    det_all = Detector(cfg=graph.cfg, graph=graph, threshold=float("inf"))
    if not graph.cfg.tile:
        out = _whole(graph, det_all, images, vectors, keep_maps)
    else:
        per_image = [_tiled(graph, det_all, im, vectors, keep_maps) for im in images]
        out = {
            name: (np.array([r[name][0] for r in per_image]), [r[name][1] for r in per_image] if keep_maps else None)
            for name in vectors
        }
    graph.weights.fill_(1.0)
    own_scores, own_maps = out.pop("chosen")
    check = {}
    if reference is not None:
        check["max_abs_score_diff"] = float(np.abs(own_scores - reference[0]).max())
        if keep_maps and reference[1] is not None:
            check["max_abs_heatmap_diff"] = max(
                float(np.abs(a - np.asarray(b)).max()) for a, b in zip(own_maps, reference[1])
            )
    return out, check
