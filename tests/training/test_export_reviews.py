"""`knowngood export-reviews` through the real command against a stub of the service's documented list and original
routes (bearer token, problem+json errors, pages of 3 rows): folder layout, bytes, reviews.csv, skips, a second
export, refusals, and that the exported folders are a holdout `load_holdout` reads with the right classes."""

from __future__ import annotations

import csv
import datetime as dt
import hashlib
import io
import json
import os
import socket
import subprocess
import sys
import threading
import urllib.parse
from collections import Counter
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import numpy as np
import pytest
from knowngood.training import bundle
from knowngood.training.export_reviews import CSV_FIELDS, class_folder
from knowngood.training.holdout import load_holdout
from PIL import Image

TOKEN = "station-token-0123456789"
PART = "bracket"
T0 = dt.datetime(2024, 5, 1, 8, 0, tzinfo=dt.timezone.utc)


def image_bytes(seed: int, fmt: str) -> bytes:
    """A 32 x 32 gray part: a blob with a little noise, different for each seed."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:32, 0:32] / 32
    img = 0.2 + 0.6 * np.exp(-((xx - 0.5) ** 2 + (yy - 0.5) ** 2) / 0.05) + rng.normal(0, 0.02, (32, 32))
    buf = io.BytesIO()
    Image.fromarray((np.clip(img, 0, 1) * 255).astype(np.uint8), "L").save(buf, format=fmt)
    return buf.getvalue()


class Stub:
    """The service's contract for export-reviews: GET /v1/inspections (filters, newest first, paged) and
    GET /v1/inspections/{id}/original, behind one bearer token."""

    page = 3  # the service may answer fewer rows than asked: the client pages by what it got

    def __init__(self):
        self.items: dict[str, dict] = {}
        self.files: dict[str, bytes] = {}
        self.served: dict[str, bytes] = {}  # what /original answers when it differs from the upload (a corruption)
        self.requests: list[str] = []

    def add(self, n, *, label="good", defect_class=None, fmt="PNG", kept=True, lost=False, part_type=PART, review=True):
        """Inspection number n (later n = newer). kept=False: image_kept false; lost: kept, then removed."""
        ident = hashlib.sha256(str(n).encode()).hexdigest()[:32]
        data = image_bytes(n, fmt)
        self.items[ident] = {
            "id": ident,
            "time": (T0 + dt.timedelta(hours=n)).isoformat(),
            "part_type": part_type,
            "station": "line-1",
            "part_id": f"P{n}",
            "verdict": "flag" if label == "defective" else "pass",
            "score": 1.5 + n / 10,
            "threshold": 3.0,
            "model": {"id": "m" * 16, "revision": "abcd1234", "sha256": "0" * 64},
            "image": {"sha256": hashlib.sha256(data).hexdigest(), "width": 32, "height": 32},
            "review": {"label": label, "operator": "ann", "time": "x", "defect_class": defect_class, "note": None}
            if review
            else None,
            "review_count": int(review),
            "image_kept": kept,
        }
        if kept and not lost:
            self.files[ident] = data
        return ident

    def listing(self, query: dict) -> dict:
        def when(name):
            return dt.datetime.fromisoformat(query[name]) if name in query else None

        since, until = when("since"), when("until")
        rows = [
            i
            for i in self.items.values()
            if i["part_type"] == query.get("part_type", i["part_type"])
            and (query.get("reviewed") != "true" or i["review"] is not None)
            and (since is None or dt.datetime.fromisoformat(i["time"]) >= since)
            and (until is None or dt.datetime.fromisoformat(i["time"]) < until)
        ]
        rows.sort(key=lambda i: i["time"], reverse=True)
        limit, offset = min(int(query.get("limit", 100)), self.page), int(query.get("offset", 0))
        page = rows[offset : offset + limit]
        return {"items": page, "count": len(page), "total": len(rows), "limit": limit, "offset": offset}


def make_handler(stub: Stub):
    class Handler(BaseHTTPRequestHandler):
        def log_message(self, *args):  # quiet test output
            pass

        def send(self, status: int, body: bytes, content_type: str) -> None:
            self.send_response(status)
            self.send_header("Content-Type", content_type)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def problem(self, status: int, detail: str) -> None:
            body = {"type": "about:blank", "title": "error", "status": status, "detail": detail}
            self.send(status, json.dumps(body).encode(), "application/problem+json")

        def do_GET(self):
            url = urllib.parse.urlsplit(self.path)
            stub.requests.append(url.path)
            if self.headers.get("Authorization") != f"Bearer {TOKEN}":
                return self.problem(401, "unknown bearer token")
            parts = url.path.strip("/").split("/")
            if parts == ["v1", "inspections"]:
                query = dict(urllib.parse.parse_qsl(url.query))
                return self.send(200, json.dumps(stub.listing(query)).encode(), "application/json")
            if len(parts) == 4 and parts[:2] == ["v1", "inspections"] and parts[3] == "original":
                data = stub.served.get(parts[2], stub.files.get(parts[2]))
                if data is None:
                    return self.problem(404, f"the image of inspection {parts[2]} was not kept")
                return self.send(200, data, "application/octet-stream")
            return self.problem(404, f"no route {url.path}")

    return Handler


@pytest.fixture
def stub():
    s = Stub()
    server = ThreadingHTTPServer(("127.0.0.1", 0), make_handler(s))
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    s.url = f"http://127.0.0.1:{server.server_address[1]}"
    yield s
    server.shutdown()
    server.server_close()


def run(*args: str, token: str | None = TOKEN) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if "proxy" not in k.lower() and k != "KNOWNGOOD_TOKEN"}
    if token is not None:
        env["KNOWNGOOD_TOKEN"] = token
    cmd = [sys.executable, "-m", "knowngood.training.cli", "export-reviews", *args]
    return subprocess.run(cmd, capture_output=True, text=True, env=env)


def export(stub: Stub, out: Path, *extra: str, **kw) -> subprocess.CompletedProcess:
    return run("--url", stub.url, "--part-type", PART, "--out", str(out), *extra, **kw)


def one_line_error(proc: subprocess.CompletedProcess) -> str:
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("knowngood: error:") and "Traceback" not in proc.stderr, lines
    return lines[0]


def csv_rows(out: Path) -> dict[str, dict]:
    with (out / "reviews.csv").open(newline="", encoding="utf-8") as f:
        reader = csv.DictReader(f)
        assert tuple(reader.fieldnames) == CSV_FIELDS
        return {r["id"]: r for r in reader}


def files_under(out: Path) -> dict[str, bytes]:
    return {
        p.relative_to(out).as_posix(): p.read_bytes()
        for p in sorted(out.rglob("*"))
        if p.is_file() and p.name != "reviews.csv"
    }


@pytest.fixture
def reviewed(stub):
    """Ten reviewed inspections of the part type (four pages of three), two of them without an image and one in
    a format train does not read; plus an unreviewed one and one of another part type, which are not listed."""
    ids = {
        "good/{}.png": stub.add(1),
        "good/{}.jpg": stub.add(2, fmt="JPEG"),
        "good/{}.bmp": stub.add(3, fmt="BMP"),
        "defective/scratch/{}.png": stub.add(4, label="defective", defect_class="scratch"),
        "defective/scratch/{}.tif": stub.add(5, label="defective", defect_class="scratch", fmt="TIFF"),
        "defective/unclassified/{}.png": stub.add(6, label="defective"),
        "defective/dent_deep/{}.png": stub.add(7, label="defective", defect_class="dent/deep"),
        "defective/_escape/{}.png": stub.add(8, label="defective", defect_class="../escape"),
    }
    skipped = {
        "not_kept": stub.add(9, kept=False),
        "lost": stub.add(10, label="defective", defect_class="scratch", lost=True),
        "gif": stub.add(11, fmt="GIF"),
    }
    stub.add(12, review=False)
    stub.add(13, part_type="housing")
    return ids, skipped


def layout(ids: dict[str, str]) -> dict[str, str]:
    """Exported file (relative to the export folder) -> inspection id."""
    return {pattern.format(ident): ident for pattern, ident in ids.items()}


def test_export_writes_the_holdout_layout_the_csv_and_a_summary(stub, reviewed, tmp_path, tiny_bundle):
    ids, skipped = reviewed
    expected, out = layout(ids), tmp_path / "export"
    proc = export(stub, out)
    assert proc.returncode == 0, proc.stderr
    assert files_under(out) == {path: stub.files[ident] for path, ident in expected.items()}  # exactly as uploaded
    assert stub.requests.count("/v1/inspections") == 4  # 10 reviewed rows, 3 a page
    assert f"/v1/inspections/{skipped['not_kept']}/original" not in stub.requests  # image_kept false: not asked
    assert f"/v1/inspections/{skipped['lost']}/original" in stub.requests  # kept once, 404 now: skipped too

    rows = csv_rows(out)
    assert {r["file"]: i for i, r in rows.items()} == expected
    row = rows[ids["defective/dent_deep/{}.png"]]
    item = stub.items[row["id"]]
    assert (row["label"], row["defect_class"], row["operator"], row["verdict"]) == (
        "defective",
        "dent/deep",
        "ann",
        "flag",
    )
    assert float(row["score"]) == item["score"] and float(row["threshold"]) == 3.0 and row["time"] == item["time"]
    assert row["model_id"] == "m" * 16
    assert [r["time"] for r in rows.values()] == sorted((r["time"] for r in rows.values()), reverse=True)

    summary = proc.stdout
    assert "wrote 3 good, 5 defective (_escape 1, dent_deep 1, scratch 2, unclassified 1)" in summary
    assert "skipped 2 reviewed inspection(s) with no kept image" in summary
    assert "8 exported image(s) listed" in summary
    assert "format train does not read" in proc.stderr and skipped["gif"] in proc.stderr
    assert not list(out.glob(".export-*"))  # no temporary file left behind

    # the folders are what `tune --good DIR/good --defective DIR/defective` reads: classes from the sub-folders
    holdout = load_holdout(bundle.load(tiny_bundle)[0], out / "good", out / "defective")
    assert Counter(holdout.classes) == {"good": 3, "scratch": 2, "unclassified": 1, "dent_deep": 1, "_escape": 1}
    assert holdout.labels.sum() == 5 and not holdout.skipped


def test_a_second_export_adds_only_what_is_new_and_moves_a_changed_review(stub, reviewed, tmp_path):
    ids, skipped = reviewed
    out = tmp_path / "export"
    assert export(stub, out).returncode == 0
    before = {p: (out / p).stat().st_mtime_ns for p in files_under(out)}

    stub.requests.clear()
    again = export(stub, out)
    assert again.returncode == 0, again.stderr
    assert "wrote 0 good, 0 defective into" in again.stdout and "8 already there" in again.stdout
    # same name, same content: not downloaded again (only what could not be written is asked for again)
    asked = {r.split("/")[3] for r in stub.requests if r.endswith("/original")}
    assert asked == {skipped["lost"], skipped["gif"]}
    assert {p: (out / p).stat().st_mtime_ns for p in files_under(out)} == before

    newer = stub.add(20, label="defective", defect_class="scratch")
    later = export(stub, out, "--since", (T0 + dt.timedelta(hours=15)).isoformat())
    assert later.returncode == 0, later.stderr
    assert "wrote 0 good, 1 defective (scratch 1)" in later.stdout and "0 already there" in later.stdout
    rows = csv_rows(out)
    assert len(rows) == 9 and rows[newer]["file"] == f"defective/scratch/{newer}.png"  # earlier rows kept

    g = ids["good/{}.png"]
    stub.items[g]["review"] = {**stub.items[g]["review"], "label": "defective", "defect_class": "scratch"}
    moved = export(stub, out)
    assert moved.returncode == 0, moved.stderr
    assert "moved 1 image(s) whose review changed" in moved.stdout
    assert not (out / "good" / f"{g}.png").exists() and (out / "defective" / "scratch" / f"{g}.png").is_file()
    assert csv_rows(out)[g]["label"] == "defective" and len(csv_rows(out)) == 9


def test_since_and_until_select_a_time_range(stub, reviewed, tmp_path):
    ids, _ = reviewed
    out = tmp_path / "range"
    since, until = T0 + dt.timedelta(hours=2), T0 + dt.timedelta(hours=5)  # inspections 2, 3, 4
    proc = export(stub, out, "--since", since.isoformat(), "--until", until.replace(tzinfo=None).isoformat())
    assert proc.returncode == 0, proc.stderr
    assert sorted(csv_rows(out)) == sorted(ids[p] for p in ("good/{}.jpg", "good/{}.bmp", "defective/scratch/{}.png"))


def test_the_token_comes_from_a_file_or_the_environment_and_a_refusal_is_one_line(stub, reviewed, tmp_path):
    out = tmp_path / "export"
    refused = one_line_error(export(stub, out, token="not-the-token-at-all"))
    assert "401" in refused and "unknown bearer token" in refused
    assert not out.exists() or not files_under(out)

    assert "KNOWNGOOD_TOKEN" in one_line_error(export(stub, out, token=None))
    token_file = tmp_path / "token"
    token_file.write_text(f"{TOKEN}\nsecond line is ignored\n")
    proc = export(stub, out, "--token-file", str(token_file), token=None)
    assert proc.returncode == 0, proc.stderr
    assert len(csv_rows(out)) == 8


def test_bad_input_and_an_unreachable_service_are_one_line_errors(stub, tmp_path):
    out = tmp_path / "export"
    assert "--since" in one_line_error(export(stub, out, "--since", "yesterday"))
    assert "--until" in one_line_error(export(stub, out, "--since", "2024-05-02", "--until", "2024-05-01"))
    with socket.socket() as s:  # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    down = one_line_error(run("--url", f"http://127.0.0.1:{port}", "--part-type", PART, "--out", str(out)))
    assert "cannot reach" in down


def test_an_image_that_does_not_match_its_sha256_is_refused(stub, tmp_path):
    good, bad = stub.add(1), stub.add(2)
    stub.served[bad] = image_bytes(99, "PNG")  # not what was uploaded
    out = tmp_path / "export"
    proc = export(stub, out)
    assert bad in one_line_error(proc) and "sha256" in proc.stderr
    assert files_under(out) == {f"good/{good}.png": stub.files[good]} and list(csv_rows(out)) == [good]


def test_class_folders_stay_inside_defective():
    assert class_folder(None) == class_folder("") == class_folder("..") == "unclassified"
    assert class_folder("../../etc") == "_.._etc" and class_folder("Kratzer tief") == "Kratzer tief"
    assert "/" not in class_folder("a/b") and "\\" not in class_folder("a\\b")
    assert class_folder("good") == "good_" and class_folder(" Good ") == "Good_"  # tune refuses a class named good
