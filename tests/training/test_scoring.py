"""Score contracts: direction, units, shapes, and the definition written in the bundle."""

import dataclasses

import numpy as np
import pytest
import torch
from knowngood.training import bundle, scoring
from knowngood.training.config import ModelConfig


@pytest.mark.parametrize("rule", ["max", "mean"])
def test_score_is_top_fraction_mean_of_the_weighted_combination_of_standardised_terms(
    tiny_bundle, tiny_good_images, rule
):
    # our own invariant, in the spirit of scikit-learn's score_samples == decision_function + offset_ test
    det, _ = bundle.load(tiny_bundle)
    det.graph.cfg = dataclasses.replace(det.graph.cfg, combine=rule)  # the rule heat_from follows
    x = det.prepare(tiny_good_images[:5])
    with torch.inference_mode():
        score, heat, _ = det.graph(x)
        z = (det.graph.term_maps(x) - det.graph.term_mean) / det.graph.term_std
    weights = scoring.term_weights(det.cfg)  # {term: weight}, in the order of the maps
    assert list(weights) == [t for t in scoring.TERMS if t in weights] and len(weights) == z.shape[1]
    weighted = torch.stack([w * z[:, i] for i, w in enumerate(weights.values())], 1)
    assert len(weights) > 1, "the fixture's model must combine terms for the rules to differ"
    combined = weighted.max(1).values if rule == "max" else weighted.sum(1) / sum(weights.values())
    expected_heat = combined.clamp(min=0)
    assert torch.allclose(heat, expected_heat, atol=1e-6)
    k = det.graph.top_k
    assert torch.allclose(score, torch.sort(heat.flatten(1), dim=1, descending=True).values[:, :k].mean(1))
    assert (score >= 0).all() and (heat >= 0).all()  # never negative


def test_flag_exactly_when_score_above_threshold(tiny_bundle, tiny_good_images):
    det, _ = bundle.load(tiny_bundle)
    scores = [r.score for r in det.inspect(tiny_good_images)]
    mid = float(np.median(scores))
    at_median = dataclasses.replace(det, threshold=mid)
    for r in at_median.inspect(tiny_good_images):
        assert (r.verdict == "flag") == (r.score > mid)
    alone = det.inspect(tiny_good_images[:1])[0].score  # scored as it will be: a batch of one (the sums of a batch
    exact = dataclasses.replace(det, threshold=alone)  # of 24 may differ in the last float bits)
    assert exact.inspect(tiny_good_images[:1])[0].verdict == "pass"  # equal is not above


def test_heatmap_comes_back_at_each_input_resolution(tiny_bundle):
    det, _ = bundle.load(tiny_bundle)
    images = [np.random.rand(1, 48, 80).astype(np.float32), np.random.rand(3, 200, 100).astype(np.float32)]
    results = det.inspect(images)
    assert [r.heatmap.shape for r in results] == [(48, 80), (200, 100)]
    assert all(r.heatmap.dtype == np.float32 for r in results)


def test_held_out_good_images_standardise_to_zero_mean(tiny_bundle, tiny_good_images):
    det, _ = bundle.load(tiny_bundle)
    x = det.prepare(tiny_good_images)
    with torch.inference_mode():
        z = (det.graph.term_maps(x) - det.graph.term_mean) / det.graph.term_std
    # the fixture standardised on these very images: per-pixel mean 0 by construction, std shrunk but ~1
    assert float(z.mean()) == pytest.approx(0, abs=1e-4)
    assert 0.5 < float(z.std()) < 1.5


def test_batch_scoring_equals_one_by_one(tiny_bundle, tiny_good_images):
    det, _ = bundle.load(tiny_bundle)
    together = [r.score for r in det.inspect(tiny_good_images[:6])]
    alone = [det.inspect([im])[0].score for im in tiny_good_images[:6]]
    assert together == pytest.approx(alone, rel=1e-5, abs=1e-6)


@pytest.mark.parametrize("rule", ["max", "mean"])
def test_onnx_runtime_gives_the_same_scores(tiny_bundle, tiny_good_images, rule):
    # ONNX Runtime (the open ONNX standard's reference runtime) against eager PyTorch on the same weights
    det, _ = bundle.load(tiny_bundle)
    det.graph.cfg = dataclasses.replace(det.graph.cfg, combine=rule)
    images = tiny_good_images[:8]
    eager = det.inspect(images)
    fast = dataclasses.replace(det).use_onnx(threads=1).inspect(images)
    # the memory term's distance, |q|² - 2 q·m + |m|² under a square root, turns float32 rounding of ~1e-6 near
    # distance 0 into ~1e-3 there; in held-out standard deviations that is nothing a verdict could see. The mean
    # carries it into every pixel's score, the maximum only where the memory is the strongest term.
    score_tol = 1e-5 if rule == "max" else 1e-3
    for a, b in zip(eager, fast):
        assert b.score == pytest.approx(a.score, rel=1e-4, abs=score_tol)  # float32 rounding between kernels
        assert np.allclose(a.heatmap, b.heatmap, rtol=1e-4, atol=2e-3)


def test_the_coarser_memory_runs_the_same_under_onnx_runtime(tiny_good_images):
    # the memory searched every 8 px (memory_pool 2: pooled features, distance, map brought back to the grid)
    # exports with the rest of the graph; ONNX Runtime against eager PyTorch, as above
    from knowngood.training.config import ModelConfig
    from knowngood.training.detector import Detector
    from knowngood.training.perceptual import load_pretrained

    cfg = ModelConfig(size=32, channels=1, width=8, z_channels=4, memory_size=64, memory_pool=2, adversarial=0)
    graph = bundle.new_graph(cfg, load_pretrained())
    x = torch.from_numpy(np.stack(tiny_good_images))
    graph.fit_features(x[:12])
    graph.fit_standardisation(x)
    assert graph.memory.shape[0] == 64 and graph.memory.abs().sum() > 0
    det = Detector(cfg=cfg, graph=graph, threshold=3.0)
    # images the memory was not built from, as in use (an image's own patches sit at distance ~0, where the square
    # root magnifies float32 rounding: the test above allows for that)
    eager = det.inspect(tiny_good_images[12:18])
    fast = dataclasses.replace(det).use_onnx(threads=1).inspect(tiny_good_images[12:18])
    for a, b in zip(eager, fast):
        assert b.score == pytest.approx(a.score, rel=1e-4, abs=1e-5)
        assert np.allclose(a.heatmap, b.heatmap, rtol=1e-4, atol=2e-3)


def test_scoring_pass_embedding_equals_the_critic_pooled_features(tiny_bundle, tiny_good_images):
    # the drift window's features come from the scoring pass; they must be `embed`'s, eager and under ONNX Runtime
    det, _ = bundle.load(tiny_bundle)
    x = det.prepare(tiny_good_images[:5])
    reference = det.embed(x)
    for runner in (det, dataclasses.replace(det).use_onnx(threads=1)):
        scores, _, embedding = runner.score_and_embed(x, batch=2)
        assert embedding.shape == (5, 8 * det.cfg.width)
        np.testing.assert_allclose(embedding, reference, rtol=1e-4, atol=1e-6)
        np.testing.assert_allclose(scores, det.score_batch(x)[0], rtol=1e-4, atol=1e-5)


def _plate_with_edge(side: int = 32) -> torch.Tensor:
    """(1, 1, side, side): a bright plate on a dark ground, its edge a vertical step at column 12."""
    x = torch.full((1, 1, side, side), 0.2)
    x[..., 12:] = 0.8
    return x


def test_shift_tolerant_residual_forgives_a_one_pixel_edge_offset():
    # our own construction: the reconstruction draws the plate's edge one pixel off, as fixture jitter does
    x = _plate_with_edge()
    recon = torch.cat([x[..., :1], x[..., :-1]], -1)  # everything one pixel to the right
    exact = scoring.pixel_residual(x, recon, shift=0)
    tolerant = scoring.pixel_residual(x, recon, shift=1)
    assert exact[..., 12].flatten().tolist() == pytest.approx([0.6] * 32)  # the step itself, 0.8 - 0.2
    assert float(tolerant.max()) == pytest.approx(0.0, abs=1e-7)


def test_shift_tolerant_residual_still_sees_a_pit_the_reconstruction_leaves_out():
    recon = _plate_with_edge()
    x = recon.clone()
    x[..., 18:22, 20:24] -= 0.3  # a 4 px pit on the plate, 3 px from the edge
    for shift in (0, 1, 2):
        res = scoring.pixel_residual(x, recon, shift=shift)
        assert float(res[..., 19:21, 21:23].min()) == pytest.approx(0.3, abs=1e-6)  # its core, whatever the shift
        assert float(res[..., :, :8].max()) == pytest.approx(0.0, abs=1e-7)  # the ground stays clean


def test_a_forward_pass_holds_at_most_its_budget_of_memory_distances():
    # the memory term's distance matrix is positions x entries float32 per image (16 MiB at 128 px, 4096 entries)
    per_pass = scoring.images_per_pass
    assert per_pass(ModelConfig(size=128), most=8) == 8  # 8 x 16 MiB: the default 128 MiB
    assert per_pass(ModelConfig(size=128), most=32, budget=64 * 2**20) == 4  # the Detector's budget
    assert per_pass(ModelConfig(size=128, memory_pool=2, memory_size=16384), most=8) == 8  # the same search
    assert per_pass(ModelConfig(size=256, memory_size=16384), most=8) == 1  # 256 MiB an image: one by one
    assert per_pass(ModelConfig(size=256, memory=0), most=8) == 8  # no memory, no limit
