"""Reviews back into training, through the real commands on the demo parts: `knowngood train` a model, `serve` it,
post a line's images, operators review them, `export-reviews` writes good/ and defective/<class>/, `train --from`
continues the model on the confirmed good parts and `tune --compare` puts the old and the new model side by side on
the exported holdout."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import httpx
import pytest
from knowngood.demo_parts import render_scenario
from service_testkit import STATION, STATION_AUTH, start_server

STEPS = "8"


def _cli(*args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "knowngood.training.cli", *args],
        capture_output=True,
        text=True,
        timeout=900,
        env={**os.environ, **(env or {})},
    )


@pytest.fixture(scope="module")
def bracket(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("line")
    return render_scenario(root, seed=5, size=64, n_train=24, n_holdout_good=16, n_holdout_defective_per_kind=2)[
        "bracket"
    ]


def test_reviews_round_trip_into_train_and_tune(bracket, tmp_path):
    old = tmp_path / "old.kgm"
    done = _cli("train", str(bracket / "train" / "good"), "-o", str(old), "--steps", STEPS, "--size", "64", "--quiet")
    assert done.returncode == 0, done.stderr
    # the line: every image kept (so good reviews of passed parts can be exported too)
    server = start_server(old, tmp_path / "server", extra_env={"KNOWNGOOD_KEEP_IMAGES": "all"})
    posted: dict[str, tuple[str, str | None]] = {}  # id -> (label, defect class) the operator gives
    try:
        with httpx.Client(base_url=server.url, headers=STATION_AUTH, timeout=60) as http:
            parts = [(p, "good", None) for p in sorted((bracket / "holdout" / "good").glob("*.png"))]
            parts += [
                (p, "defective", p.parent.name) for p in sorted((bracket / "holdout" / "defective").glob("*/*.png"))
            ]
            for path, label, kind in parts:
                r = http.post(
                    "/v1/inspections", files={"image": (path.name, path.read_bytes())}, data={"station": "L1"}
                )
                assert r.status_code == 200, r.text
                assert r.json()["part_type"] == "default" and r.json()["image_kept"] is True
                posted[r.json()["id"]] = (label, kind)
            unreviewed = next(iter(posted))  # one part nobody reviewed: not exported
            for inspection_id, (label, kind) in list(posted.items())[1:]:
                review = {"label": label, "operator": "Kim"} | ({"defect_class": kind} if kind else {})
                assert http.post(f"/v1/inspections/{inspection_id}/review", json=review).status_code == 200
        out = tmp_path / "reviews"
        exported = _cli(
            "export-reviews", "--url", server.url, "--part-type", "default", "--out", str(out),
            env={"KNOWNGOOD_TOKEN": STATION},
        )  # fmt: skip
        assert exported.returncode == 0, exported.stderr
    finally:
        server.stop()
    want_good = sum(label == "good" for i, (label, _) in posted.items() if i != unreviewed)
    assert len(list((out / "good").iterdir())) == want_good
    for inspection_id, (label, kind) in posted.items():
        found = list(out.glob(f"**/{inspection_id}.*"))
        if inspection_id == unreviewed:
            assert not found
        else:
            [file] = found
            assert file.parent == (out / "good" if label == "good" else out / "defective" / kind)

    new = tmp_path / "new.kgm"
    args = ["train", str(out / "good"), "-o", str(new), "--from", str(old), "--steps", STEPS, "--quiet"]
    done = _cli(*args)
    assert done.returncode == 0, done.stderr
    tuned, report = tmp_path / "tuned.kgm", tmp_path / "report"
    tune = _cli(
        "tune", str(new), "--good", str(out / "good"), "--defective", str(out / "defective"),
        "--compare", str(old), "--report", str(report), "-o", str(tuned), "--json",
    )  # fmt: skip
    assert tune.returncode == 0, tune.stderr
    compare = json.loads(tune.stdout)["compare"]
    assert compare["old"]["sha256"] == hashlib.sha256(old.read_bytes()).hexdigest()
    for side in ("new", "old"):  # both models on the same exported holdout, as AUROCs of the same images
        assert 0.0 <= compare[side]["image_auroc"] <= 1.0
    assert tuned.is_file() and (report / "index.html").is_file()
