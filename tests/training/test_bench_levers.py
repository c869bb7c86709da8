"""Bench helpers that the README's figures rest on: the images and the measurement of the training-memory figure
(`tests/bench/memory.py`), the patch-memory peer's levers (`tests/bench/memory_levers.py`) and the rules that
combine the terms (`tests/bench/combination_levers.py`)."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from knowngood.training.bundle import new_graph
from knowngood.training.config import ModelConfig
from knowngood.training.detector import Detector, tile_boxes
from knowngood.training.metrics import image_auroc
from knowngood.training.nets import build
from knowngood.training.perceptual import load_pretrained
from knowngood.training.scoring import TERMS, ScoringGraph
from sklearn.metrics import roc_auc_score

from tests.bench import drawn_checks, lineart_check, speed, texture_check
from tests.bench.combination_levers import image_scores
from tests.bench.memory import cycled, own_peak_rss_mib
from tests.bench.peers import PatchMemoryPeer


def test_cycled_gives_as_many_images_as_asked_and_no_two_alike():
    rng = np.random.default_rng(0)
    images = [rng.uniform(size=(1, 8, 8)).astype(np.float32) for _ in range(3)]
    out = cycled(images, 7)
    assert len(out) == 7 and all(im.shape == (1, 8, 8) for im in out)
    np.testing.assert_array_equal(out[3], images[0][..., ::-1])  # the second round mirrored left-right
    np.testing.assert_array_equal(out[6], images[0])  # the third as they were
    firsts = out[:6]
    assert len({im.tobytes() for im in firsts}) == 6
    assert len(cycled(images, 2)) == 2


def _scene(rng, defect: bool) -> torch.Tensor:
    x = 0.5 + 0.05 * rng.standard_normal((1, 64, 64))
    if defect:
        x[:, 20:32, 30:42] = 1.0  # a bright blob no known-good image has
    return torch.tensor(np.clip(x, 0, 1), dtype=torch.float32)


def test_every_lever_of_the_peer_still_finds_a_plain_defect():
    rng = np.random.default_rng(1)
    train = torch.stack([_scene(rng, False) for _ in range(6)])
    test = torch.stack([_scene(rng, d) for d in (False, False, True, True)])
    labels = np.array([0, 0, 1, 1])
    for kw in ({}, {"pool": 2}, {"feature_scale": 2}):
        scores, maps = PatchMemoryPeer(memory_size=256, **kw).fit(train).score(test)
        assert maps.shape == (4, 64, 64)
        assert image_auroc(labels, scores) == 1.0, kw


def test_the_training_memory_figure_is_the_childs_own_peak_not_the_parents(tmp_path, monkeypatch):
    """A child's wait4 ru_maxrss carries the parent's high-water RSS over at exec (Linux); the bench's figure must
    be the child's own: here a child touching 128 MiB while this process holds 512 MiB."""
    (tmp_path / "touch_128_mib.py").write_text("import numpy as np\na = np.ones(128 * 2**20 // 8)\na += 1\n")
    monkeypatch.setenv("PYTHONPATH", str(tmp_path))
    held = np.ones(512 * 2**20 // 8)
    held += 1  # touched: resident in this process
    code, peak = own_peak_rss_mib(["touch_128_mib"], stderr=None, scratch=tmp_path)
    assert code == 0
    assert 128 <= peak < 400, peak  # its own 128 MiB and the interpreter, never this process's 512 MiB
    assert held[0] == 2.0


def test_the_combination_rules_of_the_terms():
    """combination_levers' two rules, through a graph's own heat_from on standardised maps (mean 0, std 1 as built):
    one term gives the same score under both; with two, the maximum's score is never below the mean's, and equals
    the larger term's where that one dominates."""
    cfg = ModelConfig(size=32, channels=1, width=8, z_channels=4, memory_size=16, top_fraction=4 / 1024)
    graph = ScoringGraph(cfg, *build(cfg), perceptual=load_pretrained())  # every term: the maps follow TERMS
    z = torch.zeros(3, len(TERMS), 32, 32)
    z[:, TERMS.index("memory")] = torch.arange(3.0).view(3, 1, 1)  # image i: memory z = i everywhere
    z[:, TERMS.index("critic"), :2, :2] = 10.0  # a small hot spot of the critic residual in every image
    one = ("memory",)
    assert torch.equal(image_scores(graph, z, one, "max"), image_scores(graph, z, one, "mean"))
    two = ("memory", "critic")
    top_max, top_mean = image_scores(graph, z, two, "max"), image_scores(graph, z, two, "mean")
    assert torch.allclose(top_max, torch.full((3,), 10.0))  # the top 4 pixels are the critic's 2 x 2 spot
    assert torch.allclose(top_mean, (10.0 + torch.arange(3.0)) / 2)
    assert bool((top_max >= top_mean).all())
    assert graph.cfg.combine == cfg.combine and bool((graph.weights == 1).all())  # restored afterwards


def test_the_tiled_speed_of_a_trained_bundle_is_timed_with_the_terms_it_was_chosen_with():
    """`speed.tiled(det=...)` times the model as given (its terms, its tile size), not the every-term default."""
    cfg = ModelConfig(size=32, tile=512, width=8, z_channels=4, kappa=0.0, perceptual=0.0, memory=0.0, adversarial=0.0)
    det = Detector(cfg=cfg, graph=new_graph(cfg).eval(), threshold=float("inf"))
    out = speed.tiled(repeats=2, det=det)
    assert out["terms"] == ["pixel"]
    assert out["tile"] == 512
    assert out["tiles"] == len(tile_boxes((speed.TILED_SIDE, speed.TILED_SIDE), 512)) > 16  # the tiles overlap
    assert out["seconds_per_megapixel"] > 0 and out["engine"] == "onnxruntime"


def test_texture_check_draws_each_defect_kind_inside_its_mask():
    # the drawn defects of `tests/bench/texture_check.py` (the photographs themselves need scikit-image, which
    # `make test` does not install): each kind changes the crop where its mask says, and little elsewhere, on a
    # gray crop and on a colour one (the colour photograph's), whose mask stays (H, W)
    rng = np.random.default_rng(0)
    side = (texture_check.CROP, texture_check.CROP)
    for channels in ((), (3,)):
        crop = rng.uniform(0.3, 0.7, (*side, *channels)).astype(np.float32)
        other = rng.uniform(0.0, 1.0, (256, 256, *channels)).astype(np.float32)
        for kind in texture_check.KINDS:
            out, mask = texture_check.draw_defect(crop, kind, rng, other)
            assert out.shape == crop.shape and out.dtype == np.float32 and 0 <= out.min() and out.max() <= 1
            assert mask.shape == side and 10 <= mask.sum() <= 0.1 * mask.size, kind  # a few px to a tenth
            change = np.abs(out - crop).reshape(*side, -1).max(-1)
            assert change[mask].mean() > 0.05, kind
            near = torch.nn.functional.max_pool2d(torch.from_numpy(mask[None].astype(np.float32)), 9, 1, 4)[0]
            # beyond 4 px of the mask only a stain's soft edge changes the crop (a fraction of its centre's change)
            assert change[near.numpy() == 0].max(initial=0) < (0.1 if kind == "stain" else 1e-6), kind
    assert [c.shape for c in (drawn_checks.chw(crop), drawn_checks.chw(crop[..., 0]))] == [(3, *side), (1, *side)]


def test_per_kind_auroc_takes_every_good_image_and_only_that_kinds_defective_ones():
    # 3 good, then 4 defective of kinds a, b, a, b: kind a's images score above every good one, kind b's below
    labels = np.r_[np.zeros(3), np.ones(4)]
    scores = np.array([0.5, 0.6, 0.7, 0.9, 0.1, 0.8, 0.2])
    out = drawn_checks.per_kind(labels, 3, ("a", "b"), mine=scores, other=-scores)
    assert out == {"mine_a": 1.0, "other_a": 0.0, "mine_b": 0.0, "other_b": 1.0}
    idx = [0, 1, 2, 4, 6]  # the literal subset for kind b (scikit-learn on it)
    assert out["mine_b"] == round(roc_auc_score(labels[idx], scores[idx]), 3)


def test_lineart_check_draws_each_defect_kind_inside_its_mask():
    # `tests/bench/lineart_check.py`: the same scan (shift, turn, paper, noise) with and without each defect differs
    # inside the defect's mask, and beyond 3 px of it only by a smudge's soft edge
    els = lineart_check._elements(np.random.default_rng(0))
    for k, kind in enumerate(lineart_check.KINDS):
        clean, none = lineart_check._sheet(els, np.random.default_rng(k), None)
        bad, mask = lineart_check._sheet(els, np.random.default_rng(k), kind, defect_rng=np.random.default_rng(9))
        assert not none.any() and clean.shape == bad.shape == mask.shape == (lineart_check.SIDE,) * 2
        assert 30 <= mask.sum() <= 0.01 * mask.size, kind  # 10-30 px defects on a 640 px sheet
        change = np.abs(bad - clean)
        assert change[mask].max() > 0.3, kind  # ink added or taken away
        near = torch.nn.functional.max_pool2d(torch.from_numpy(mask[None].astype(np.float32)), 7, 1, 3)[0]
        assert change[near.numpy() == 0].max(initial=0) < (0.1 if kind == "smudge" else 1e-6), kind


def test_the_ablation_reproduces_a_trained_bundle_with_its_own_weights(tmp_path):
    """`make bench`'s per-term ablation refits every term on a bundle's trained nets from the training images
    (`ablation.all_terms_graph`, through `train._inputs`, as `train_bundle` made them): with the bundle's own
    weights it must give the bundle's scores and heatmaps (its `check`), whole-image and tiled."""
    from knowngood.training.config import TrainConfig
    from knowngood.training.folders import ImageSet
    from knowngood.training.train import train_bundle

    from tests.bench import ablation

    rng = np.random.default_rng(0)
    images = [(0.4 + 0.1 * rng.random((1, 48, 64))).astype(np.float32) for _ in range(16)]
    test = [(0.4 + 0.1 * rng.random((1, 48, 64))).astype(np.float32) for _ in range(3)]
    test[0][:, 10:20, 10:20] = 0.9
    train = TrainConfig(steps=2, minutes=0, seed=0, eval_every=1, critic_feature_steps=5)
    for name, model in (("whole", ModelConfig(size=32, width=8, z_channels=4, memory_size=64)),
                        ("tiled", ModelConfig(size=32, tile=32, width=8, z_channels=4, memory_size=64))):  # fmt: skip
        det = train_bundle(ImageSet([], images), tmp_path / f"{name}.kgm", model=model, train=train, progress=False)
        graph = ablation.all_terms_graph(det, images)
        scores, maps, _ = det.score_images(test)
        out, check = ablation.score_variants(det, graph, test, keep_maps=True, reference=(scores, maps))
        assert check["max_abs_score_diff"] < 1e-4 and check["max_abs_heatmap_diff"] < 1e-3, (name, check)
        assert set(out) >= {"knowngood-all-terms", "knowngood-gan-terms", "knowngood-only-memory"}


def test_the_same_size_peer_sees_knowngoods_working_size_and_counts_among_the_peers():
    """Where knowngood works above 128 px, the patch-memory peer is also fitted at that size (every patch of three
    256 px images fits its 16384 entries: 3 x 64 x 64 = 12288, where 128 px would give 3072) and finds a plain
    defect; `best_peers` measures knowngood's margin against it when it is the best peer."""
    from tests.bench import quality
    from tests.bench.datasets import Dataset

    rng = np.random.default_rng(2)

    def scene(defect: bool) -> np.ndarray:
        x = 0.5 + 0.05 * rng.standard_normal((1, 256, 256))
        if defect:
            x[:, 100:112, 60:72] = 1.0
        return np.clip(x, 0, 1).astype(np.float32)

    test = [scene(d) for d in (False, False, True, True)]
    masks = [np.zeros((256, 256), bool) for _ in range(2)] + [np.zeros((256, 256), bool) for _ in range(2)]
    for m in masks[2:]:
        m[100:112, 60:72] = True
    ds = Dataset("toy", [scene(False) for _ in range(3)], test, np.array([0, 0, 1, 1]), masks, "drawn here")
    models: dict = {}
    row = quality.same_size_peer_row(ds, (256, 256), models)
    assert row["image_auroc"] == 1.0 and row["pixel_auroc"] > 0.9
    assert models[quality.SAME_SIZE_PEER][0].memory.shape[0] == 3 * 64 * 64
    rows = {m: {"image_auroc": 0.5} for m in quality.METHODS}
    rows["knowngood"] = {"image_auroc": 0.9}
    rows[quality.SAME_SIZE_PEER] = {"image_auroc": 0.8}
    best = quality.best_peers({"toy": rows})["toy"]
    assert best["best_peer"] == quality.SAME_SIZE_PEER and best["margin"] == 0.1


def test_the_bench_trains_knowngood_in_the_colour_mode_train_would_choose(tmp_path, monkeypatch):
    """`knowngood_runner.train` takes the colour mode `knowngood train` takes (`ImageSet.channels`: colour if any
    image has colour) unless told: the texture check's colour photograph was trained in grayscale before, while its
    patch-memory peer saw colour."""
    from tests.bench import knowngood_runner

    seen = []

    def fake_train_bundle(good, out, *, model, **_):
        seen.append(model.channels)
        raise StopIteration  # nothing to train: only the model it would have trained matters

    monkeypatch.setattr(knowngood_runner, "train_bundle", fake_train_bundle)
    gray = [np.zeros((1, 32, 32), np.float32)] * 2
    colour = gray[:1] + [np.zeros((3, 32, 32), np.float32)]
    for images, channels in ((gray, None), (colour, None), (colour, 1)):
        with pytest.raises(StopIteration):
            knowngood_runner.train(images, tmp_path / "x.kgm", minutes=None, steps=1, channels=channels)
    assert seen == [1, 3, 1]


def test_the_drawn_checks_train_knowngood_at_the_size_asked(tmp_path):
    """`python -m tests.bench.texture_check gravel --size 256` measures knowngood as `train --size 256` gives it;
    without --size, at `train`'s own default (None)."""
    got = []

    def measure(name, minutes, out_dir, size):
        got.append((name, minutes, size))
        return {"size": size}

    threads = torch.get_num_threads()
    try:
        for argv in (["b", "--size", "256"], ["a", "--minutes", "1"]):
            out = tmp_path / "check.json"
            common = dict(description="d", names=("a", "b"), what="set", measure=measure, default_out=out)
            assert drawn_checks.main(argv + ["--out", str(out)], **common) == 0
    finally:
        torch.set_num_threads(threads)
    assert got == [("b", 2.5, 256), ("a", 1.0, None)]
    assert json.loads(out.read_text()) == {"a": {"size": None}}
