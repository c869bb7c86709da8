"""The `knowngood` command end to end on a small rendering of the demo parts: train, tune, inspect, errors."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from demo_parts import render_scenario
from training import bundle
from training.cli import main
from training.commands import heatmap_names

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


def test_train_writes_a_self_describing_bundle(trained):
    det, frechet = bundle.load(trained)
    m = det.manifest
    assert m["training"]["steps_done"] == int(STEPS) and m["preprocessing"]["size"] == 64
    assert m["threshold"]["method"].startswith("conformal") and np.isfinite(det.threshold)
    assert m["fingerprints"]["training"] and m["score"]["direction"].startswith("higher")
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
    assert set(choice["alone"]) >= {"pixel@0", "memory"} and "pixel@1" not in choice["alone"]
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
        ]
    )
    assert code == 0
    summary = json.loads(capsys.readouterr().out)
    det = bundle.load(out)[0]
    assert det.manifest["threshold"]["method"] == summary["threshold"]["method"]
    assert det.threshold == pytest.approx(summary["threshold"]["value"])
    assert summary["catch"]["rate"] >= 0.5 and summary["pixel_auroc"] is not None
    assert (report / "index.html").exists() and (report / "roc.png").exists()
    assert "synthetic-defect image AUROC" in (report / "index.html").read_text()  # the chosen terms and why
    assert det.manifest["fingerprints"]["holdout"]


def test_inspect_json_and_heatmaps(trained, scenario, tmp_path, capsys):
    folder = scenario / "holdout" / "defective"  # one folder per defect class, each numbered from 0000.png
    code = main(["inspect", str(trained), str(folder), "--json", "--heatmaps", str(tmp_path)])
    lines = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    images = list(folder.rglob("*.png"))
    assert code == 0 and len(lines) == len(images) and len({p.stem for p in images}) < len(images)
    for row in lines:
        assert set(row) == {"image", "score", "threshold", "verdict", "heatmap", "model_id", "time"}
        assert row["model_id"] == bundle.load(trained)[0].model_id  # a saved line traces to its model
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
        ["tune", str(broken), "--good", str(tmp_path), "--defective", str(tmp_path)],
        # mistakes refused by name before any work: non-positive budgets, an output folder that is not there,
        # --heatmaps pointing at a file
        ["train", str(tmp_path), "-o", str(tmp_path / "m.kgm"), "--minutes", "-1"],
        ["train", str(tmp_path), "-o", str(tmp_path / "m.kgm"), "--minutes", "0"],
        ["train", str(tmp_path), "-o", str(tmp_path / "m.kgm"), "--steps", "0"],
        ["train", str(tmp_path), "-o", str(tmp_path / "missing_dir" / "m.kgm")],
        ["inspect", str(trained), str(broken), "--batch", "0"],
        ["inspect", str(trained), str(broken), "--heatmaps", str(broken)],
    ]
    for args in cases:
        proc = subprocess.run([sys.executable, "-m", "training.cli", *args], capture_output=True, text=True)
        assert proc.returncode == 2, proc.stderr
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("knowngood: error:") and "Traceback" not in proc.stderr
    assert (
        "broken.png"
        in subprocess.run([sys.executable, "-m", "training.cli", *cases[0]], capture_output=True, text=True).stderr
    )
    for args, name in zip(cases[4:], ("--minutes", "--minutes", "--steps", "missing_dir", "--batch", "--heatmaps")):
        err = subprocess.run([sys.executable, "-m", "training.cli", *args], capture_output=True, text=True).stderr
        assert name in err, err


def test_inspect_json_into_a_closed_pipe_ends_quietly(trained, scenario):
    folder = scenario / "holdout" / "good"
    cmd = f"{sys.executable} -m training.cli inspect {trained} {folder} --json --batch 1 | head -n 1"
    proc = subprocess.run(["bash", "-o", "pipefail", "-c", cmd], capture_output=True, text=True)
    assert len(proc.stdout.splitlines()) == 1 and "Traceback" not in proc.stderr and "BrokenPipe" not in proc.stderr
