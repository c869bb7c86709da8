"""Retraining from confirmed reviews through the real command: `train --from` continues from a bundle's trained
networks on new known-good images, `tune --compare` puts the tuned model beside the old one on one holdout."""

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from knowngood.demo_parts import render_scenario
from knowngood.training import bundle
from knowngood.training.commands import tune_text
from knowngood.training.data import read_image
from knowngood.training.folders import fingerprint, list_images
from knowngood.training.nets import build
from sklearn.metrics import roc_auc_score

NETS = ("encoder", "generator", "critic")
ADAM_STEP = 2e-4  # TrainConfig.lr: Adam's first update moves each weight by at most the learning rate


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "knowngood.training.cli", *args], capture_output=True, text=True)


def _refused(proc: subprocess.CompletedProcess, name: str) -> str:
    """The one error line of a refused command (exit 2), which must name `name`."""
    lines = proc.stderr.strip().splitlines()
    assert proc.returncode == 2 and len(lines) == 1 and lines[0].startswith("knowngood: error:"), proc.stderr
    assert name in lines[0], lines[0]
    return lines[0]


@pytest.fixture(scope="module")
def parts(tmp_path_factory) -> tuple[Path, Path]:
    """The bracket part twice: the images the old model was trained on, and new known-good images (another seed)."""
    root = tmp_path_factory.mktemp("parts")
    old = render_scenario(root / "old", seed=3, size=64, n_train=16, n_holdout_good=6, n_holdout_defective_per_kind=2)
    new = render_scenario(root / "new", seed=5, size=64, n_train=16, n_holdout_good=1, n_holdout_defective_per_kind=1)
    return old["bracket"], new["bracket"]


@pytest.fixture(scope="module")
def models(parts, tmp_path_factory) -> dict[str, tuple[Path, str]]:
    """name -> (bundle, train's stdout): `old` (seed 1), and `continued` from it on the new images (seed 0), twice.
    --size is left out when continuing: it comes from the bundle."""
    old_parts, new_parts = parts
    folder = tmp_path_factory.mktemp("models")
    old = folder / "old.kgm"
    runs = {"old": (old_parts, ["--size", "64", "--seed", "1", "--steps", "2"])}
    runs |= {name: (new_parts, ["--from", str(old), "--steps", "1"]) for name in ("continued", "again")}
    out = {}
    for name, (images, extra) in runs.items():
        path = folder / f"{name}.kgm"
        proc = _run("train", str(images / "train" / "good"), "-o", str(path), "--quiet", *extra)
        assert proc.returncode == 0, proc.stderr
        out[name] = (path, proc.stdout)
    return out


@torch.no_grad()
def _largest_change(a: dict[str, torch.nn.Module], b: dict[str, torch.nn.Module]) -> float:
    """The largest difference of any trained weight of the GAN's nets (parameters, not BatchNorm's statistics)."""
    changes = []
    for name in NETS:
        pa, pb = dict(a[name].named_parameters()), dict(b[name].named_parameters())
        changes += [float((pa[k] - pb[k]).abs().max()) for k in pa]
    return max(changes)


def _nets(det) -> dict[str, torch.nn.Module]:
    return {name: getattr(det.graph, name) for name in NETS}


def test_from_continues_from_the_old_networks_and_records_where_from(models, parts):
    (old_path, _), (cont_path, cont_out) = models["old"], models["continued"]
    old, cont, again = (bundle.load(path)[0] for path in (old_path, cont_path, models["again"][0]))
    # one step of Adam away from the old weights at most, while a fresh init (the continued run's seed) is far
    # from them: the weights were carried over
    assert _largest_change(_nets(cont), _nets(old)) <= ADAM_STEP * 1.01
    torch.manual_seed(0)
    fresh = dict(zip(NETS, build(cont.cfg)))
    assert _largest_change(fresh, _nets(old)) > 50 * ADAM_STEP
    assert cont.manifest["training"]["history"][0]["step"] == 0  # the nets as they started were a candidate too
    # what it continued from, in the manifest and on train's last line
    origin = {"bundle": str(old_path), "model_id": old.model_id, "sha256": old.sha256}
    assert cont.manifest["training"]["continued_from"] == origin
    assert old.sha256 == hashlib.sha256(old_path.read_bytes()).hexdigest()
    assert old.manifest["training"]["continued_from"] is None
    assert cont_out.strip().splitlines()[-1] == f"continued from {old_path} (model {old.model_id}, sha256 {old.sha256})"
    # the settings come from the bundle; what is fitted to data is fitted on the new images, as a fresh run does
    assert (cont.cfg.shape, cont.cfg.channels, cont.cfg.width) == (old.cfg.shape, old.cfg.channels, old.cfg.width)
    new_good = parts[1] / "train" / "good"
    assert cont.manifest["folders"]["training"] == str(new_good)
    new_print = fingerprint(list_images(new_good))
    assert cont.manifest["fingerprints"]["training"] == new_print != old.manifest["fingerprints"]["training"]
    assert cont.manifest["training"]["images"]["fit"] == 12  # 16 new images, a quarter held out
    # same seed, data, steps and start: the same bundle
    assert (again.model_id, again.threshold) == (cont.model_id, cont.threshold)


def test_from_refuses_other_settings_and_unreadable_bundles(models, parts, tmp_path):
    old_path = models["old"][0]
    good, out = str(parts[1] / "train" / "good"), tmp_path / "m.kgm"
    line = _refused(_run("train", good, "-o", str(out), "--from", str(old_path), "--size", "96"), "--size 96")
    assert "64 px" in line  # what the bundle works at
    _refused(_run("train", good, "-o", str(out), "--from", str(old_path), "--tile", "64"), "--tile 64")
    _refused(_run("train", good, "-o", str(out), "--from", str(tmp_path / "missing.kgm")), "--from")
    not_a_bundle = sorted((parts[1] / "train" / "good").glob("*.png"))[0]
    _refused(_run("train", good, "-o", str(out), "--from", str(not_a_bundle)), "--from")
    assert not out.exists()


def _holdout(root: Path) -> tuple[list[np.ndarray], np.ndarray, list[np.ndarray]]:
    """The holdout's images, labels (0 good, 1 defective) and per-image masks (all-False for good images), read
    here, not through knowngood's holdout code."""
    good = sorted((root / "good").glob("*.png"))
    bad = sorted((root / "defective").rglob("*.png"))
    images = [read_image(p) for p in good + bad]
    masks = [np.zeros(im.shape[-2:], dtype=bool) for im in images[: len(good)]]
    masks += [read_image(root / "masks" / p.relative_to(root / "defective")).max(0) > 0.5 for p in bad]
    return images, np.array([0] * len(good) + [1] * len(bad)), masks


def test_compare_shows_both_models_on_the_same_holdout(models, parts, tmp_path):
    old_path, cont_path = models["old"][0], models["continued"][0]
    h = parts[0] / "holdout"
    holdout = ["--good", str(h / "good"), "--defective", str(h / "defective"), "--masks", str(h / "masks")]
    tuned_path, report = tmp_path / "tuned.kgm", tmp_path / "report"
    proc = _run("tune", str(cont_path), *holdout, "--compare", str(old_path), "--report", str(report), "-o",
                str(tuned_path), "--json")  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    summary = json.loads(proc.stdout)
    compare = summary["compare"]
    old, tuned = bundle.load(old_path)[0], bundle.load(tuned_path)[0]
    for side, det, path in (("new", tuned, tuned_path), ("old", old, old_path)):
        assert {k: compare[side][k] for k in ("bundle", "model_id", "sha256")} == {
            "bundle": str(path), "model_id": det.model_id, "sha256": det.sha256}  # fmt: skip
        assert compare[side]["threshold"] == pytest.approx(det.threshold)
    assert compare["new"]["image_auroc"] == summary["image_auroc"] and summary["model_id"] == tuned.model_id
    # reference: scikit-learn's roc_auc_score on scores and heatmaps computed here, each model at its own threshold
    images, labels, masks = _holdout(h)
    pixel_labels = np.concatenate([m.ravel() for m in masks])
    for side, det in (("new", tuned), ("old", old)):
        results = det.inspect(images)
        scores = np.array([r.score for r in results])
        assert compare[side]["image_auroc"] == pytest.approx(roc_auc_score(labels, scores), abs=1e-9)
        heat = np.concatenate([r.heatmap.ravel() for r in results])
        assert compare[side]["pixel_auroc"] == pytest.approx(roc_auc_score(pixel_labels, heat), abs=1e-6)
        flagged = scores > det.threshold
        assert compare[side]["false_reject"]["k"] == int(flagged[labels == 0].sum())
        assert compare[side]["catch"]["k"] == int(flagged[labels == 1].sum())
    # the report: a section with both models, and one ROC plot with both curves
    page = (report / "index.html").read_text()
    section = page[page.index("<h2>Compared with the old model</h2>") :]
    for side, det in (("new", tuned), ("old", old)):
        assert det.model_id in section and f"{compare[side]['image_auroc']:.3f}" in section
        assert f"{compare[side]['pixel_auroc']:.3f}" in section
    assert 'src="roc_compare.png"' in section
    assert (report / "roc_compare.png").read_bytes().startswith(b"\x89PNG")
    # the printed summary (without --json) has the same comparison
    text = tune_text(summary)
    assert f"compared with {old_path} (model {old.model_id})" in text
    versus = text.split("compared with", 1)[1].splitlines()
    auroc = next(line for line in versus if line.strip().startswith("image AUROC"))
    assert auroc.split()[2:] == [f"{compare['new']['image_auroc']:.3f}", f"{compare['old']['image_auroc']:.3f}"]


def test_compare_refuses_an_unreadable_old_model_before_writing(models, parts, tmp_path):
    h = parts[0] / "holdout"
    out = tmp_path / "tuned.kgm"
    args = ["tune", str(models["continued"][0]), "--good", str(h / "good"), "--defective", str(h / "defective")]
    _refused(_run(*args, "--compare", str(tmp_path / "missing.kgm"), "-o", str(out)), "--compare")
    assert not out.exists()
