"""Synthetic defects and the choice of terms made on them.

Reference facts: Perlin gradient noise is zero at every lattice point (Perlin 2002, "Improving noise": each corner's
contribution is its gradient dotted with the offset, which is zero at the corner itself); an AUROC is the
Mann-Whitney probability that a defective copy outranks a good image (scikit-learn `roc_auc_score`).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import torch
from knowngood.training.config import ModelConfig
from knowngood.training.nets import build
from knowngood.training.perceptual import load_pretrained
from knowngood.training.scoring import ScoringGraph
from knowngood.training.selection import (
    SYNTHETIC_COPIES,
    TOLERANCE,
    _image_scores,
    _ranked,
    _subsets,
    candidates,
    choose_terms,
    fine_memory_entries,
)
from knowngood.training.synthetic import _crack, _patch, _region, paste_defects, perlin, perlin_mask
from scipy import ndimage


def _images(n: int = 12, size: int = 32) -> torch.Tensor:
    rng = np.random.default_rng(0)
    yy, xx = np.mgrid[0:size, 0:size] / size
    base = 0.4 + 0.2 * np.sin(6 * xx) * np.cos(4 * yy)
    return torch.from_numpy(np.stack([base + rng.normal(0, 0.01, base.shape) for _ in range(n)])[:, None].astype("f4"))


def test_perlin_noise_is_zero_on_the_lattice_and_bounded():
    noise = perlin((64, 64), (4, 4), np.random.default_rng(0))  # lattice points every 16 px
    assert np.abs(noise[::16, ::16]).max() < 1e-9
    assert np.abs(noise).max() <= 1.5 and noise.std() > 0.1


def test_pasted_defects_change_only_their_mask_and_are_reproducible():
    x = _images()
    bad, masks = paste_defects(x, copies=3, seed=1)
    again, masks2 = paste_defects(x, copies=3, seed=1)
    assert torch.equal(bad, again) and torch.equal(masks, masks2)
    assert bad.shape == (36, 1, 32, 32) and masks.shape == (36, 32, 32)
    for k in range(3):
        for i in range(len(x)):
            j = k * len(x) + i
            m = masks[j]
            assert 0 < m.sum() < 0.5 * m.numel()  # a local defect, never the whole image
            assert torch.equal(bad[j][:, ~m], x[i][:, ~m])  # untouched outside the mask
            assert (bad[j][:, m] - x[i][:, m]).abs().max() > 0
    assert float(bad.min()) >= 0 and float(bad.max()) <= 1


def test_cracks_are_thin_connected_lines_and_large_areas_are_larger_than_blobs():
    rng = np.random.default_rng(3)
    for _ in range(20):
        crack = _crack((128, 128), rng)
        _, parts = ndimage.label(crack, structure=np.ones((3, 3)))  # 8-connected (scipy, a reference library)
        assert parts == 1 and 4 <= crack.sum() < 0.03 * crack.size
        eroded = ndimage.binary_erosion(crack, structure=np.ones((5, 5)))
        assert not eroded.any()  # at most 3 px wide everywhere: a 5 x 5 square never fits inside
    large = np.mean([_patch((128, 128), rng).mean() for _ in range(30)])
    blobs = np.mean([perlin_mask((128, 128), rng).mean() for _ in range(30)])
    assert large > 3 * blobs


def test_regions_are_one_piece_touching_the_border_and_hold_a_tenth_to_a_half_of_the_image():
    rng = np.random.default_rng(4)
    for _ in range(20):
        region = _region((96, 128), rng)
        _, parts = ndimage.label(region)  # scipy, a reference library
        assert parts == 1
        assert 0.09 <= region.mean() <= 0.46
        border = np.r_[region[0], region[-1], region[:, 0], region[:, -1]]
        assert border.any() and not border.all()  # a side of the part is cut off, not a hole inside it


def _ev(image: float, pixel: float = 0.5) -> dict:
    return {"image_auroc": image, "pixel_auroc": pixel}


def test_ranking_prefers_fewer_terms_within_the_tolerance():
    results = [
        (("max", {"memory": 1.0, "critic": 1.0}), _ev(0.90)),
        (("max", {"memory": 1.0}), _ev(0.90 - TOLERANCE / 2)),
        (("max", {"critic": 1.0}), _ev(0.80)),
    ]
    assert _ranked(results)[0][0] == ("max", {"memory": 1.0})
    clear = [
        (("mean", {"memory": 1.0, "critic": 1.0}), _ev(0.95)),
        (("max", {"memory": 1.0, "critic": 1.0}), _ev(0.92)),
        (("max", {"memory": 1.0}), _ev(0.90)),
    ]
    assert _ranked(clear)[0][0] == ("mean", {"memory": 1.0, "critic": 1.0})  # a clear gain earns the second term


def test_the_image_auroc_decides_and_the_pixel_auroc_only_breaks_ties():
    higher_image = [
        (("max", {"pixel@0": 1.0}), _ev(0.90, pixel=0.99)),
        (("max", {"memory": 1.0}), _ev(0.90 + TOLERANCE / 2, pixel=0.60)),
    ]
    assert _ranked(higher_image)[0][0] == ("max", {"memory": 1.0})  # a sharper map does not outweigh the images
    saturated = [
        (("max", {"memory": 1.0}), _ev(1.0, pixel=0.80)),
        (("max", {"critic": 1.0}), _ev(1.0, pixel=0.95)),
    ]
    assert _ranked(saturated)[0][0] == ("max", {"critic": 1.0})  # every image separated: the map decides


def test_every_set_of_two_or_more_terms_is_a_candidate_under_both_rules():
    combos = list(_subsets(["pixel@0", "pixel@1", "critic", "memory"]))
    singles = [c for c in combos if len(c[1]) == 1]
    assert sorted(next(iter(w)) for _, w in singles) == ["critic", "memory", "pixel@0", "pixel@1"]
    assert {r for r, _ in singles} == {"max"}  # one term: both rules give the same map
    several = [(r, tuple(sorted(w))) for r, w in combos if len(w) > 1]
    assert not any("pixel@0" in t and "pixel@1" in t for _, t in several)  # one residual shift at most
    assert sorted(r for r, t in several if t == ("critic", "memory")) == ["max", "mean"]
    assert len(several) == 2 * 7  # {critic, memory}, and each shift with one of the 3 non-empty sets of the others


def test_one_memory_stride_at_most_in_a_set():
    combos = list(_subsets(["pixel@0", "pixel@1", "critic", "memory@4", "memory@8"]))
    sets = [tuple(sorted(w)) for _, w in combos]
    assert not any("memory@4" in t and "memory@8" in t for t in sets)
    assert not any("pixel@0" in t and "pixel@1" in t for t in sets)
    assert ("critic", "memory@8", "pixel@1") in sets and ("memory@4",) in sets
    # (none or one of 2 shifts) x (critic or not) x (none or one of 2 strides), less the empty set: 17 sets,
    # 5 single terms (max only) and 12 of two or more (both rules)
    assert len(set(sets)) == 17 and len(combos) == 5 + 2 * 12


def test_the_coarser_memory_holds_four_times_the_entries_for_the_same_search():
    cand = candidates((0, 1), memory_size=4096)
    assert cand["memory@4"] == {"memory": 1.0, "memory_pool": 1, "memory_size": 4096}
    assert cand["memory@8"] == {"memory": 1.0, "memory_pool": 2, "memory_size": 16384}
    assert candidates((0,), memory_size=32768)["memory@8"]["memory_size"] == 65536  # ModelConfig's bound


def test_the_fine_memory_grows_with_the_working_area_and_the_coarse_one_does_not():
    # memory_size entries per 128 x 128 px of working area, 1 to 4 times memory_size
    assert fine_memory_entries(4096, (128, 128)) == fine_memory_entries(4096, (96, 128)) == 4096
    assert fine_memory_entries(4096, (256, 192)) == 12288 and fine_memory_entries(4096, (256, 256)) == 16384
    assert fine_memory_entries(4096, (512, 512)) == 16384  # the cap: the search grows with positions x entries
    assert fine_memory_entries(32768, (256, 256)) == 65536  # ModelConfig's bound
    cand = candidates((0,), memory_size=4096, shape=(256, 256))
    assert cand["memory@4"]["memory_size"] == cand["memory@8"]["memory_size"] == 16384


def test_the_choice_fits_the_fine_memory_with_the_entries_of_its_working_area():
    # a 256 px model: the 4 px memory is fitted with 4 x memory_size entries, and a chosen one keeps them
    cfg = ModelConfig(size=256, channels=1, width=8, z_channels=4, memory_size=16, pixel=0, kappa=0, perceptual=0)
    cfg = dataclasses.replace(cfg, adversarial=0)
    x = _images(10, size=256)
    choice = choose_terms(cfg, build(cfg), load_pretrained(), fit_x=x[:4], std_x=x[4:8], good_x=x[8:], seed=0)
    assert set(choice.graphs) == {"memory@4", "memory@8"}
    assert choice.graphs["memory@4"].memory.shape[0] == 64 and choice.graphs["memory@8"].memory.shape[0] == 64
    assert choice.cfg.memory > 0 and choice.cfg.memory_size == 64


@pytest.mark.parametrize("rule", ["max", "mean"])
def test_the_choice_scores_as_the_scoring_graph_does(rule):
    """`_image_scores` restates `ScoringGraph.heat_from` on maps already standardised; both rules must agree."""
    cfg = ModelConfig(size=32, channels=1, width=8, z_channels=4, perceptual=0, memory=0, adversarial=0, kappa=0.5)
    cfg = dataclasses.replace(cfg, combine=rule)
    graph = ScoringGraph(cfg, *build(cfg))  # terms pixel (weight 1) and critic (0.5); mean 0, std 1 as built
    torch.manual_seed(0)
    z = {"pixel": torch.randn(4, 32, 32), "critic": torch.randn(4, 32, 32)}
    before = {n: m.clone() for n, m in z.items()}
    score, heat = graph.heat_from(torch.stack([z["pixel"], z["critic"]], 1))
    mine_heat, mine_score = _image_scores(z, {"pixel": cfg.pixel, "critic": cfg.kappa}, graph.top_k, rule=rule)
    assert torch.allclose(mine_heat, heat, atol=1e-6) and torch.allclose(mine_score, score, atol=1e-6)
    assert all(torch.equal(z[n], before[n]) for n in z)  # the maps themselves are left untouched


def test_choice_is_recorded_and_no_single_term_beats_it():
    torch.manual_seed(0)
    cfg = ModelConfig(size=32, channels=1, width=8, z_channels=4, memory_size=256)
    x = _images(24)
    choice = choose_terms(
        cfg, build(cfg), load_pretrained(), fit_x=x[:12], std_x=x[12:18], good_x=x[18:], shifts=(0, 1), seed=0
    )
    ev = choice.evidence
    # no feature critic given: no adversarial term
    assert set(ev["alone"]) == {"pixel@0", "pixel@1", "critic", "perceptual", "memory@4", "memory@8"}
    assert ev["images"] == {"good": 6, "synthetic": 6 * SYNTHETIC_COPIES}
    chosen = {k for k, w in ev["chosen"].items() if w > 0}
    assert chosen and not {"pixel@0", "pixel@1"} <= chosen  # one residual shift at most
    assert not {"memory@4", "memory@8"} <= chosen  # one memory stride at most
    assert ev["combine"] == choice.cfg.combine and ev["combine"] in ("max", "mean")
    assert ev["image_auroc"] >= max(a["image_auroc"] for a in ev["alone"].values()) - TOLERANCE
    weights = {"pixel": choice.cfg.pixel, "critic": choice.cfg.kappa, "memory": choice.cfg.memory}
    assert (weights["memory"] > 0) == any(c.startswith("memory@") for c in chosen) and choice.cfg.adversarial == 0
    assert (weights["pixel"] > 0) == any(c.startswith("pixel@") for c in chosen)
    if "memory@8" in chosen:
        assert (choice.cfg.memory_pool, choice.cfg.memory_size) == (2, 4 * 256)
    # the final graph takes the memory of its own stride from the candidates: each stride's, never the other's
    for name, pool, size in (("memory@4", 1, 256), ("memory@8", 2, 1024)):
        cfg_m = dataclasses.replace(choice.cfg, memory=1.0, memory_pool=pool, memory_size=size)
        g = choice.graphs[name]
        graph = ScoringGraph(cfg_m, g.encoder, g.generator, g.critic, perceptual=g.perceptual)
        choice.adopt_reference(graph)
        assert torch.equal(graph.memory, choice.graphs[name].memory) and graph.memory.abs().sum() > 0
