"""Quality regression on real images, cheap enough for the default suite (about a minute or two on 2 cores).

Data: elpv, electroluminescence images of solar cells (Buerhop-Lutz et al. 2018, `elpv_dataset`), pooled mono +
poly, functional cells (defect probability 0) as known-good, probability-1 cells as defective; a reduced fixed
split from `tests.bench.datasets.elpv_reduced`: 150 known-good training cells, 60 good and 60 defective test
cells, always the same images. knowngood trains a fixed number of steps, so the work does not depend on the
machine's speed. Metric: image AUROC (scikit-learn `roc_auc_score`, through `training.metrics`).
"""

from __future__ import annotations

import pytest
import torch
from knowngood.training.data import to_model_input
from knowngood.training.metrics import image_auroc

from tests.bench import knowngood_runner
from tests.bench.datasets import elpv_reduced
from tests.bench.peers import NearestNeighbourPeer, PatchMemoryPeer

pytest.importorskip("elpv_dataset")  # a test extra; the data comes with the package

STEPS = 100
N_TRAIN, N_TEST = 150, 60
# Measured on this split (2 CPU threads, torch 2.14.1, 100 GAN steps, terms chosen on synthetic defects as `train`
# chooses them): knowngood 0.834 at seed 0 (the seed used here; the choice: the mean of memory + adversarial term,
# since the sixth synthetic kind; before it, memory + critic residual + adversarial, also 0.834); peers: patch memory
# (PatchCore on the same frozen features) 0.821, nearest neighbour 0.734, PCA 0.699, mean grey level 0.746. Earlier
# releases scored 0.780 and 0.804 (below the patch-memory peer). It scores the same since the choice ranks by
# image AUROC alone (0.834, re-measured 2026-12-03). Under the former criterion its five runners-up scored 0.821
# to 0.846 on these test cells: four stay above the peer if a float difference between CPUs tips the choice to them, the
# last (½ memory + adversarial) only ties it. Since the memory comes at two strides it scores 0.849 (re-measured
# 2026-12-03). It pins one recipe and seed, not a claim about knowngood in general;
# the floor leaves room for float differences between libraries.
FLOOR = 0.77


@pytest.fixture(scope="module")
def split():
    return elpv_reduced(N_TRAIN, N_TEST, seed=0)


@pytest.fixture(scope="module")
def test_batch(split) -> torch.Tensor:
    return to_model_input(split.test, size=knowngood_runner.SIZE, channels=1)


@pytest.fixture(scope="module")
def knowngood_auroc(split, test_batch, tmp_path_factory) -> float:
    threads = torch.get_num_threads()
    torch.set_num_threads(min(threads, 2))  # the measured value above was taken on 2 threads
    try:
        run = knowngood_runner.train(
            split.train, tmp_path_factory.mktemp("quality") / "elpv.kgm", minutes=None, steps=STEPS
        )
        scores, _, _ = knowngood_runner.score(run.detector, test_batch)
    finally:
        torch.set_num_threads(threads)
    return image_auroc(split.labels, scores)


def test_split_is_the_documented_one(split):
    assert len(split.train) == N_TRAIN
    assert (split.labels == 0).sum() == N_TEST and (split.labels == 1).sum() == N_TEST
    assert split.train[0].shape == (1, 128, 128)


def test_knowngood_beats_nearest_neighbour_on_elpv(split, test_batch, knowngood_auroc):
    # peer: 1-nearest-neighbour Euclidean distance on 32 px pixels (scikit-learn NearestNeighbors), same split
    peer = NearestNeighbourPeer().fit(to_model_input(split.train, size=knowngood_runner.SIZE, channels=1))
    nn_auroc = image_auroc(split.labels, peer.score(test_batch)[0])
    assert knowngood_auroc > 0.6
    assert knowngood_auroc > nn_auroc, f"knowngood {knowngood_auroc:.3f} vs nearest neighbour {nn_auroc:.3f}"


def test_knowngood_beats_the_patch_memory_peer_on_elpv(split, test_batch, knowngood_auroc):
    # peer: PatchCore (Roth et al. 2022) on the same frozen features, no GAN (tests/bench/peers.py), same split
    peer = PatchMemoryPeer().fit(to_model_input(split.train, size=knowngood_runner.SIZE, channels=1))
    memory_auroc = image_auroc(split.labels, peer.score(test_batch)[0])
    print(f"knowngood {knowngood_auroc:.3f}, patch memory {memory_auroc:.3f}")  # seen with `pytest -s`
    assert knowngood_auroc > memory_auroc, f"{knowngood_auroc:.3f} vs {memory_auroc:.3f}"


def test_knowngood_clearly_above_chance_on_elpv(knowngood_auroc):
    # chance is 0.5 (Hanley & McNeil 1982: AUROC = P(score of a defective cell > score of a good one))
    assert knowngood_auroc >= FLOOR, f"image AUROC {knowngood_auroc:.3f} fell below the floor {FLOOR}"
