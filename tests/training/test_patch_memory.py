"""The position-free term's memory: greedy coreset selection and the nearest-patch distance.

Reference checks: the nearest distance against scipy's `cdist` (brute force); the greedy k-center coreset
against its published guarantee (Gonzalez 1985: the greedy covering radius is at most twice the optimal one),
with the optimum found by exhaustive search on a small set.
"""

from __future__ import annotations

import itertools

import numpy as np
import torch
from knowngood.training.memory import (
    as_patches,
    build_memory,
    greedy_coreset,
    local_average,
    memory_features,
    nearest_distance,
    patch_features,
)
from scipy.spatial.distance import cdist


def _radius(points: np.ndarray, centres: np.ndarray) -> float:
    """Covering radius: the largest distance of a point to its nearest centre."""
    return float(cdist(points, centres).min(1).max())


def test_nearest_distance_equals_brute_force_scipy():
    gen = torch.Generator().manual_seed(0)
    memory = torch.randn(50, 8, generator=gen) * 3 + 10  # far from the origin: the centring must keep precision
    phi = torch.randn(2, 8, 5, 6, generator=gen) * 3 + 10
    centre = memory.mean(0)
    m = memory - centre
    got = nearest_distance(phi, m, (m * m).sum(1), centre)  # (2, 1, 5, 6)
    q = phi.permute(0, 2, 3, 1).reshape(-1, 8).double().numpy()
    want = cdist(q, memory.double().numpy()).min(1).reshape(2, 5, 6)  # scipy: exact Euclidean distances
    np.testing.assert_allclose(got[:, 0].numpy(), want, rtol=1e-4, atol=1e-4)


def test_a_patch_in_memory_is_at_distance_zero_and_a_new_one_is_not():
    gen = torch.Generator().manual_seed(1)
    memory = torch.randn(20, 4, generator=gen)
    centre = memory.mean(0)
    m = memory - centre
    phi = torch.stack([memory[3], memory[3] + 5.0]).view(2, 4, 1, 1)
    d = nearest_distance(phi, m, (m * m).sum(1), centre).flatten()
    assert d[0] < 1e-3 and d[1] > 1.0


def test_greedy_coreset_is_within_twice_the_optimal_covering_radius():
    rng = np.random.default_rng(0)
    points = rng.normal(size=(14, 2)).astype(np.float32)  # 2 dims: no random projection, exact distances
    k = 3
    chosen = greedy_coreset(torch.from_numpy(points), k, seed=0).numpy()
    assert len(set(chosen.tolist())) == k
    greedy = _radius(points, points[chosen])
    optimum = min(_radius(points, points[list(c)]) for c in itertools.combinations(range(len(points)), k))
    assert optimum <= greedy <= 2 * optimum + 1e-6  # Gonzalez (1985): the 2-approximation bound


def test_coreset_covers_clusters_that_a_random_sample_of_the_same_size_misses():
    rng = np.random.default_rng(1)
    big = rng.normal(0, 0.1, size=(2000, 2))
    small = rng.normal(0, 0.1, size=(5, 2)) + [10.0, 0.0]  # a rare but normal kind of patch
    points = torch.from_numpy(np.vstack([big, small]).astype(np.float32))
    memory = build_memory(points, 128, seed=0).numpy()  # 16 candidates per entry: every point is a candidate
    assert np.linalg.norm(memory - [10.0, 0.0], axis=1).min() < 0.5
    # a random sample of 128 of the 2005 points misses all 5 rare ones in about 73 % of draws
    sample = points[torch.randperm(len(points), generator=torch.Generator().manual_seed(0))[:128]].numpy()
    assert np.linalg.norm(sample - [10.0, 0.0], axis=1).min() > 5


def test_build_memory_is_deterministic_and_never_larger_than_its_input():
    points = torch.randn(300, 16, generator=torch.Generator().manual_seed(2))
    a, b = build_memory(points, 40, seed=3), build_memory(points, 40, seed=3)
    assert torch.equal(a, b) and a.shape == (40, 16)
    assert build_memory(points[:10], 40).shape == (10, 16)


def test_local_average_is_a_three_by_three_mean():
    phi = torch.arange(25, dtype=torch.float32).view(1, 1, 5, 5)
    out = local_average(phi)
    assert out[0, 0, 2, 2] == phi[0, 0, 1:4, 1:4].mean()
    assert out[0, 0, 0, 0] == phi[0, 0, :2, :2].mean()  # the border averages what exists


def test_patch_features_in_batches_equal_the_whole_at_once():
    """The batched writer behind the memory and the feature critic gives exactly the all-at-once patches."""
    phi = torch.randn(7, 5, 6, 4, generator=torch.Generator().manual_seed(3))
    whole = as_patches(local_average(phi))
    assert torch.equal(patch_features(phi, batch=3), whole)
    assert torch.equal(patch_features(phi, batch=32), whole)


def test_a_pooled_patch_is_the_mean_of_two_by_two_locally_averaged_cells():
    """memory_pool 2: each patch averages a 2 x 2 block of the 3 x 3-averaged map (a patch every 8 px)."""
    phi = torch.randn(3, 4, 6, 8, generator=torch.Generator().manual_seed(5))
    la = local_average(phi).numpy()
    blocks = la.reshape(3, 4, 3, 2, 4, 2).mean((3, 5))  # (N, C, 3, 4): numpy's own 2 x 2 block means
    assert np.allclose(memory_features(phi, 2).numpy(), blocks, atol=1e-6)
    expect = blocks.transpose(0, 2, 3, 1).reshape(-1, 4)
    assert np.allclose(patch_features(phi, batch=2, pool=2).numpy(), expect, atol=1e-6)


def test_the_pooled_memory_term_is_the_distance_to_the_nearest_pooled_patch():
    """The graph's memory term at memory_pool 2, before it is brought back to the feature grid, against scipy's
    brute-force distance from each pooled patch to the memory."""
    from knowngood.training.config import ModelConfig
    from knowngood.training.nets import build
    from knowngood.training.perceptual import load_pretrained
    from knowngood.training.scoring import ScoringGraph

    cfg = ModelConfig(size=32, channels=1, width=8, z_channels=4, memory_size=32, memory_pool=2, adversarial=0)
    graph = ScoringGraph(cfg, *build(cfg), perceptual=load_pretrained())
    x = torch.rand(6, 1, 32, 32, generator=torch.Generator().manual_seed(1))
    graph.fit_features(x[:4])
    phi = graph.pretrained_features(x[4:])  # (2, F, 8, 8)
    memory = (graph.memory + graph.memory_centre).numpy()
    q = as_patches(memory_features(phi, 2)).numpy()  # (2 * 4 * 4, F)
    want = cdist(q, memory).min(1).reshape(2, 4, 4)
    got = nearest_distance(memory_features(phi, 2), graph.memory, graph.memory_sq, graph.memory_centre)
    assert np.allclose(got[:, 0].numpy(), want, atol=1e-3)
    full = graph._memory_distance(phi)  # the term as the graph computes it: back on the 8 x 8 feature grid
    assert full.shape == (2, 1, 8, 8) and np.isclose(float(full.max()), want.max(), rtol=0.05)
