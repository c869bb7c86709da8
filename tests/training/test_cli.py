"""The `knowngood` command end to end on a small rendering of the demo parts: train, tune, inspect, errors."""

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from knowngood.demo_parts import render_scenario
from knowngood.training import bundle
from knowngood.training.cli import main
from knowngood.training.config import ModelConfig
from knowngood.training.data import MIN_SIDE, min_side_for
from knowngood.training.detector import Detector
from knowngood.training.heatmap import heatmap_names
from knowngood.training.report import rate_text
from PIL import Image

STEPS = "12"


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    root = tmp_path_factory.mktemp("scenario")
    kinds = render_scenario(root, seed=3, size=64, n_train=32, n_holdout_good=8, n_holdout_defective_per_kind=2)
    return kinds["bracket"]


@pytest.fixture(scope="module")
def trained(scenario, tmp_path_factory):
    model = tmp_path_factory.mktemp("model") / "bracket.kgm"
    code = main(
        ["train", str(scenario / "train" / "good"), "-o", str(model), "--steps", STEPS, "--size", "64", "--quiet"]
    )
    assert code == 0
    return model


def test_train_writes_a_self_describing_bundle(trained, scenario):
    det, frechet = bundle.load(trained)
    m = det.manifest
    assert m["training"]["steps_done"] == int(STEPS) and m["preprocessing"]["size"] == 64
    assert m["training"]["stopped_early"] is False and m["training"]["config"]["patience"] == 1000
    assert m["threshold"]["method"].startswith("conformal") and np.isfinite(det.threshold)
    assert m["fingerprints"]["training"] and m["score"]["direction"].startswith("higher")
    assert m["folders"]["training"] == str(scenario / "train" / "good")  # what the report names
    assert not trained.with_name(trained.name + ".ckpt").exists()  # the resume checkpoint is cleaned up


def test_same_seed_data_and_steps_give_the_same_bundle(trained, scenario, tmp_path):
    again = tmp_path / "again.kgm"
    assert (
        main(["train", str(scenario / "train" / "good"), "-o", str(again), "--steps", STEPS, "--size", "64", "--quiet"])
        == 0
    )
    a, b = bundle.load(trained)[0], bundle.load(again)[0]
    assert a.model_id == b.model_id  # the id is the SHA-256 of the weights
    assert a.threshold == b.threshold


def test_residual_shift_is_a_train_option_stored_in_the_bundle(scenario, tmp_path, capsys):
    good, out = str(scenario / "train" / "good"), tmp_path / "plain.kgm"
    args = ["train", good, "-o", str(out), "--steps", "2", "--size", "64", "--quiet"]
    assert main([*args, "--residual-shift", "0"]) == 0
    det = bundle.load(out)[0]
    assert det.cfg.residual_shift == 0
    # the terms were chosen on synthetic defects, and train's last line says which and why
    choice = det.manifest["score"]["choice"]
    assert set(choice["alone"]) >= {"pixel@0", "memory@4", "memory@8"} and "pixel@1" not in choice["alone"]
    assert det.manifest["score"]["combine"] == choice["combine"] == det.cfg.combine  # the rule chosen is the rule used
    last = capsys.readouterr().out.strip().splitlines()[-1]
    assert last.startswith("chose terms ") and "synthetic-defect image AUROC" in last
    with pytest.raises(SystemExit) as bad:
        main([*args, "--residual-shift", "5"])
    assert bad.value.code == 2 and "--residual-shift" in capsys.readouterr().err


def test_tune_sets_threshold_and_writes_report(trained, scenario, tmp_path, capsys):
    out, report = tmp_path / "tuned.kgm", tmp_path / "report"
    h = scenario / "holdout"
    code = main(
        [
            "tune",
            str(trained),
            "--good",
            str(h / "good"),
            "--defective",
            str(h / "defective"),
            "--masks",
            str(h / "masks"),
            "--target-catch",
            "0.5",
            "--report",
            str(report),
            "-o",
            str(out),
            "--json",
        ]
    )
    assert code == 0
    summary = json.loads(capsys.readouterr().out)
    det = bundle.load(out)[0]
    assert det.manifest["threshold"]["method"] == summary["threshold"]["method"]
    assert det.threshold == pytest.approx(summary["threshold"]["value"])
    assert summary["catch"]["rate"] >= 0.5 and summary["pixel_auroc"] is not None
    assert summary["masks"] == {"with_mask": 10, "defective": 10, "maps_reduced": 0}  # every one masked, none over 1 MP
    assert (summary["model_id"], summary["revision"]) == (det.model_id, det.revision)
    assert det.revision != bundle.load(trained)[0].revision  # a new threshold is a new revision of one model
    assert (report / "index.html").exists() and (report / "roc.png").exists()
    page = (report / "index.html").read_text()
    assert "synthetic-defect image AUROC" in page  # the chosen terms and why
    assert f"{STEPS} steps in " in page and str(scenario / "train" / "good") in page  # how it was trained, on what
    assert det.manifest["fingerprints"]["holdout"]


def test_inspect_json_and_heatmaps(trained, scenario, tmp_path, capsys):
    folder = scenario / "holdout" / "defective"  # one folder per defect class, each numbered from 0000.png
    det = bundle.load(trained)[0]
    code = main(["inspect", str(trained), str(folder), "--json", "--heatmaps", str(tmp_path)])
    lines = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    images = list(folder.rglob("*.png"))
    assert code == 0 and len(lines) == len(images) and len({p.stem for p in images}) < len(images)
    for row in lines:
        assert set(row) == {"image", "score", "threshold", "verdict", "heatmap", "model_id", "revision", "time"}
        # a saved line traces to its model and to the threshold (revision) that made the verdict
        assert (row["model_id"], row["revision"]) == (det.model_id, det.revision)
        assert row["verdict"] == ("flag" if row["score"] > row["threshold"] else "pass")
    overlays = {Path(row["heatmap"]) for row in lines}
    assert len(overlays) == len(lines)  # shared stems do not overwrite each other
    assert overlays == set(tmp_path.glob("*.png")) and len(list(tmp_path.glob("*.npy"))) == len(lines)
    row = lines[0]
    image = Path(row["image"])
    assert Path(row["heatmap"]).name == f"{image.parent.name}_{image.stem}.png"
    heat = np.load(Path(row["heatmap"]).with_suffix(".npy"))
    assert heat.dtype == np.float32 and heat.shape == (64, 64)  # the input image's own resolution
    with Image.open(row["heatmap"]) as overlay:
        assert overlay.size == (64, 64)


def test_heatmap_names_keep_plain_stems_and_separate_shared_ones(tmp_path):
    files = [tmp_path / "a" / "0001.png", tmp_path / "b" / "0001.png", tmp_path / "b" / "0002.png"]
    files += [tmp_path / "a_0001.png", tmp_path / "b" / "0002.png"]  # a name equal to a made one; a repeat
    names = heatmap_names(files)
    assert [names[f] for f in files] == ["a_0001", "b_0001", "0002", "a_0001-2", "0002"]


def test_fail_on_flag_exit_code(trained, scenario, tmp_path):
    big = tmp_path / "odd.png"
    Image.fromarray(np.random.default_rng(0).integers(0, 255, (64, 64), dtype=np.uint8)).save(big)
    assert main(["inspect", str(trained), str(big), "--fail-on-flag"]) == 1  # noise is nothing like the part
    good = sorted((scenario / "train" / "good").glob("*.png"))[0]
    assert main(["inspect", str(trained), str(good)]) == 0  # without the flag, flags do not change the exit code


def test_bad_input_exits_2_with_one_clear_line(trained, tmp_path):
    broken = tmp_path / "broken.png"
    broken.write_bytes(b"\x89PNG\r\n\x1a\n truncated")
    cases = [
        ["inspect", str(trained), str(broken)],
        ["inspect", str(tmp_path / "missing.kgm"), str(broken)],
        ["train", str(tmp_path / "nowhere"), "-o", str(tmp_path / "m.kgm")],
        ["tune", str(broken), "--good", str(tmp_path), "--defective", str(tmp_path), "--in-place"],
        # mistakes refused by name before any work: non-positive budgets, an output folder that is not there,
        # --heatmaps pointing at a file
        ["train", str(tmp_path), "-o", str(tmp_path / "m.kgm"), "--minutes", "-1"],
        ["train", str(tmp_path), "-o", str(tmp_path / "m.kgm"), "--minutes", "0"],
        ["train", str(tmp_path), "-o", str(tmp_path / "m.kgm"), "--steps", "0"],
        ["train", str(tmp_path), "-o", str(tmp_path / "m.kgm"), "--patience", "-5"],
        ["train", str(tmp_path), "-o", str(tmp_path / "missing_dir" / "m.kgm")],
        ["inspect", str(trained), str(broken), "--batch", "0"],
        ["inspect", str(trained), str(broken), "--heatmaps", str(broken)],
    ]
    for args in cases:
        proc = subprocess.run([sys.executable, "-m", "knowngood.training.cli", *args], capture_output=True, text=True)
        assert proc.returncode == 2, proc.stderr
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("knowngood: error:") and "Traceback" not in proc.stderr
    assert (
        "broken.png"
        in subprocess.run(
            [sys.executable, "-m", "knowngood.training.cli", *cases[0]], capture_output=True, text=True
        ).stderr
    )
    names = ("--minutes", "--minutes", "--steps", "--patience", "missing_dir", "--batch", "--heatmaps")
    for args, name in zip(cases[4:], names, strict=True):
        err = subprocess.run(
            [sys.executable, "-m", "knowngood.training.cli", *args], capture_output=True, text=True
        ).stderr
        assert name in err, err


def test_inspect_json_into_a_closed_pipe_ends_quietly(trained, scenario):
    folder = scenario / "holdout" / "good"
    cmd = f"{sys.executable} -m training.cli inspect {trained} {folder} --json --batch 1 | head -n 1"
    proc = subprocess.run(["bash", "-o", "pipefail", "-c", cmd], capture_output=True, text=True)
    assert len(proc.stdout.splitlines()) == 1 and "Traceback" not in proc.stderr and "BrokenPipe" not in proc.stderr


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "knowngood.training.cli", *args], capture_output=True, text=True)


def test_tune_never_rewrites_the_model_unasked(trained, scenario, tmp_path, capsys):
    h = scenario / "holdout"
    holdout = ["--good", str(h / "good"), "--defective", str(h / "defective")]
    before = trained.read_bytes()
    proc = _run("tune", str(trained), *holdout)
    lines = proc.stderr.strip().splitlines()
    assert proc.returncode == 2 and len(lines) == 1 and lines[0].startswith("knowngood: error:")
    assert "-o OUT" in lines[0] and "--in-place" in lines[0]
    assert trained.read_bytes() == before
    # --in-place rewrites the file it is given (a copy here) and prints a short summary a person can read
    copy = tmp_path / "copy.kgm"
    copy.write_bytes(before)
    assert main(["tune", str(copy), *holdout, "--in-place", "--target-false-reject", "0.2"]) == 0
    out = capsys.readouterr().out
    det = bundle.load(copy)[0]
    th = det.manifest["threshold"]
    assert th["set_by"] == "tune" and det.threshold != bundle.load(trained)[0].threshold
    lines = out.strip().splitlines()
    assert lines[0].startswith(f"threshold {det.threshold:.4g} for a false-reject rate of at most 20 %")
    assert rate_text(th["false_reject"]) in lines[1] and "false-reject rate" in lines[1]
    assert rate_text(th["catch"]) in lines[2] and "catch rate" in lines[2]
    assert "image AUROC" in lines[3] and "pixel AUROC" not in lines[3]  # no masks given
    assert (
        lines[4] == f"wrote {copy} (model {det.model_id}, revision {det.revision}); no report (--report DIR writes one)"
    )
    assert not out.lstrip().startswith("{")  # --json prints the JSON instead


def test_tune_warns_when_good_and_defective_look_swapped(trained, scenario, tmp_path, capsys):
    h = scenario / "holdout"
    results = {}
    for order, (good, bad) in {"right": ("good", "defective"), "swapped": ("defective", "good")}.items():
        report = tmp_path / order
        args = ["tune", str(trained), "--good", str(h / good), "--defective", str(h / bad), "--report", str(report)]
        assert main([*args, "-o", str(tmp_path / f"{order}.kgm"), "--json"]) == 0
        captured = capsys.readouterr()
        summary = json.loads(captured.out)
        warned = "knowngood: warning: image AUROC" in captured.err and "swapped" in captured.err
        in_report = "probably swapped" in (report / "index.html").read_text()
        assert warned == in_report == (summary["image_auroc"] < 0.5), (order, summary["image_auroc"])
        results[order] = summary["image_auroc"]
    assert results["right"] == pytest.approx(1 - results["swapped"])  # swapping the labels mirrors the AUROC
    assert min(results.values()) < 0.5  # so one of the two runs did warn


def test_tune_says_how_many_defective_images_had_a_mask(trained, scenario, tmp_path, capsys):
    h = scenario / "holdout"
    masks = tmp_path / "masks"
    for src in sorted((h / "masks").rglob("*.png"))[:3]:  # 3 of the 10 defective images get their mask
        dest = masks / src.relative_to(h / "masks")
        dest.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(src, dest)
    report = tmp_path / "report"
    args = ["tune", str(trained), "--good", str(h / "good"), "--defective", str(h / "defective")]
    assert main([*args, "--masks", str(masks), "--report", str(report), "-o", str(tmp_path / "t.kgm")]) == 0
    captured = capsys.readouterr()
    assert "(from masks of 3 of 10 defective images)" in captured.out
    warning = [line for line in captured.err.splitlines() if "masks" in line]
    assert len(warning) == 1 and warning[0].startswith("knowngood: warning:")
    assert "from masks of 3 of 10 defective images, fewer than half" in warning[0]
    page = (report / "index.html").read_text()
    assert "from masks of 3 of 10 defective images, fewer than half" in page
    assert "(from masks of 3 of 10 defective images)" in page


def test_skipped_images_are_named_once_and_empty_holdouts_name_the_option(trained, scenario, tmp_path):
    broken_dir = tmp_path / "with_broken"
    shutil.copytree(scenario / "holdout" / "good", broken_dir)
    broken = broken_dir / "zz_broken.png"
    broken.write_bytes(b"\x89PNG\r\n\x1a\n truncated")
    h = scenario / "holdout"
    for args in (
        ["inspect", str(trained), str(broken_dir), "--skip-bad"],
        ["tune", str(trained), "--good", str(broken_dir), "--defective", str(h / "defective"), "-o",
         str(tmp_path / "t.kgm"), "--skip-bad"],
        ["train", str(broken_dir), "-o", str(tmp_path / "m.kgm"), "--skip-bad"],  # stops later: too few images
    ):  # fmt: skip
        proc = _run(*args)
        skipped = [line for line in proc.stderr.splitlines() if line.startswith("knowngood: skipped")]
        assert len(skipped) == 1 and skipped[0].count(str(broken)) == 1, proc.stderr
        assert "not a readable image" in skipped[0]
    assert proc.returncode == 2  # train: 8 readable images are too few
    empty = tmp_path / "empty"
    empty.mkdir()
    for option, good, bad in (("--defective", h / "good", empty), ("--good", empty, h / "defective")):
        proc = _run("tune", str(trained), "--good", str(good), "--defective", str(bad), "-o", str(tmp_path / "e.kgm"))
        lines = proc.stderr.strip().splitlines()
        assert proc.returncode == 2 and len(lines) == 1 and f"{option} {empty}: no readable images" in lines[0]


def test_inspect_holds_images_to_the_models_smallest_side_as_the_service_does(tmp_path):
    """One rule for both (`training.data.min_side_for`): a quarter of the model's working size, at least
    MIN_SIDE. A 128 px model refuses a 24 px image the 64 px model above would take."""
    torch.manual_seed(0)
    cfg = ModelConfig(size=128, channels=1, width=8, z_channels=4, perceptual=0, memory=0, adversarial=0)
    graph = bundle.new_graph(cfg)
    graph.fit_standardisation(torch.rand(4, 1, 128, 128) * 0.2 + 0.4)
    model = tmp_path / "m128.kgm"
    manifest = {"model": {**cfg.__dict__}, "threshold": {"method": "fixed", "value": 3.0}}
    bundle.save(Detector(cfg=cfg, graph=graph, threshold=3.0, manifest=manifest), {}, model)
    assert min_side_for(128) == 32 and min_side_for(64) == MIN_SIDE == 16
    for side, code in ((24, 2), (32, 0)):
        image = tmp_path / f"{side}.png"
        Image.new("L", (side, side), 128).save(image)
        proc = _run("inspect", str(model), str(image))
        assert proc.returncode == code, proc.stderr
        if code:
            assert "each side must be at least 32" in proc.stderr and f"{side}.png" in proc.stderr
