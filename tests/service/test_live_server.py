"""The real server (`knowngood serve` in a subprocess, uvicorn on loopback): quick start, crash safety of the
audit store, and model swaps under load."""

from __future__ import annotations

import os
import signal
import sqlite3
import threading
import time

import httpx
from service_testkit import ADMIN_AUTH, CHANGE, STATION_AUTH, png_bytes, start_server


def _stream(url: str, images: list[bytes], *, stop: threading.Event, results: list, errors: list) -> None:
    """Posts images until `stop`; appends (status, body) for every answer and the exception for every failure."""
    with httpx.Client(base_url=url, headers=STATION_AUTH, timeout=30) as http:
        i = 0
        while not stop.is_set():
            try:
                r = http.post("/v1/inspections", files={"image": ("p.png", images[i % len(images)])})
                results.append((r.status_code, r.json()))
            except (httpx.TransportError, ValueError) as exc:
                errors.append(exc)
                if stop.wait(0.05):
                    return
            i += 1


def test_serve_starts_and_serves(live_server, tiny_good_images):
    # a hang guard only: how fast it starts is a speed figure, measured by `make bench` on a quiet machine
    assert live_server.startup_s < 60, f"ready after {live_server.startup_s:.1f} s"
    with httpx.Client(base_url=live_server.url, timeout=30) as http:
        assert http.get("/healthz").json() == {"status": "ok"}
        r = http.post(
            "/v1/inspections",
            files={"image": ("p.png", png_bytes(tiny_good_images[0]))},
            data={"part_id": "A1"},
            headers=STATION_AUTH,
        )
        assert r.status_code == 200, r.text
        assert http.get("/v1/model", headers=STATION_AUTH).json()["runtime"] == "onnx"  # the default
        review = http.post(
            f"/v1/inspections/{r.json()['id']}/review", json={"label": "good", "operator": "kim"}, headers=STATION_AUTH
        )
        assert review.status_code == 200 and review.json()["review"]["operator"] == "kim"


def test_sigkill_mid_stream_loses_no_acknowledged_inspection(tiny_bundle, tiny_good_images, tmp_path):
    folder = tmp_path / "crash"
    server = start_server(tiny_bundle, folder)
    images = [png_bytes(img) for img in tiny_good_images[:6]]
    stop, results, errors = threading.Event(), [], []
    clients = [
        threading.Thread(
            target=_stream, args=(server.url, images), kwargs=dict(stop=stop, results=results, errors=errors)
        )
        for _ in range(3)
    ]
    for c in clients:
        c.start()
    try:
        deadline = time.monotonic() + 60
        while sum(s == 200 for s, _ in results) < 30 and time.monotonic() < deadline:
            time.sleep(0.01)
        os.kill(server.proc.pid, signal.SIGKILL)  # mid-stream: requests are in flight
        server.proc.wait(10)
        time.sleep(0.3)
    finally:
        stop.set()
        for c in clients:
            c.join(30)
    acknowledged = [body["id"] for status, body in results if status == 200]
    assert len(acknowledged) >= 30
    assert errors, "the kill should have cut some requests off"

    restarted = start_server(tiny_bundle, folder)
    try:
        with httpx.Client(base_url=restarted.url, headers=STATION_AUTH, timeout=30) as http:
            for inspection_id in acknowledged:
                r = http.get(f"/v1/inspections/{inspection_id}")
                assert r.status_code == 200, inspection_id
            assert http.post("/v1/inspections", files={"image": ("p.png", images[0])}).status_code == 200
    finally:
        restarted.stop()
    with sqlite3.connect(folder / "audit.db") as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        rows = conn.execute("SELECT COUNT(*) FROM inspections").fetchone()[0]
    # every acknowledged row is there; at most the requests in flight at the kill were stored unanswered
    assert len(acknowledged) + 1 <= rows <= len(acknowledged) + 1 + len(clients)


def test_model_swap_during_a_stream_fails_no_request(live_server, second_bundle, tiny_good_images):
    images = [png_bytes(img) for img in tiny_good_images[:6]]
    stop, results, errors = threading.Event(), [], []
    clients = [
        threading.Thread(
            target=_stream, args=(live_server.url, images), kwargs=dict(stop=stop, results=results, errors=errors)
        )
        for _ in range(4)
    ]
    for c in clients:
        c.start()

    def wait_for(n: int) -> None:
        deadline = time.monotonic() + 60
        while len(results) < n and time.monotonic() < deadline:
            time.sleep(0.01)

    try:
        with httpx.Client(base_url=live_server.url, headers=ADMIN_AUTH, timeout=60) as admin:
            wait_for(15)
            bundle = {"bundle": ("second.kgm", second_bundle.read_bytes())}
            swap = admin.put("/v1/model", files=bundle, data=CHANGE)
            assert swap.status_code == 200, swap.text
            wait_for(len(results) + 15)
            assert admin.post("/v1/model/rollback", json=CHANGE).status_code == 200
            wait_for(len(results) + 15)
    finally:
        stop.set()
        for c in clients:
            c.join(30)
    assert not errors
    assert results and all(status == 200 for status, _ in results), [s for s, _ in results if s != 200]
    by_model = {}
    for _, body in results:
        by_model.setdefault(body["model"]["sha256"], set()).add(body["threshold"])
    assert len(by_model) == 2  # both models answered, each with its own threshold only
    assert sorted(t for ts in by_model.values() for t in ts) == [2.5, 3.0]
