"""Protocol details: the token before the body, busy answers (503 with Retry-After), dates, strict JSON types,
control characters, duplicate fields, 500s that close the connection, bounded metrics, admin fingerprints."""

from __future__ import annotations

import logging
import threading

import pytest
from knowngood.service import pipeline
from service_testkit import ADMIN, ADMIN_AUTH, CHANGE, STATION_AUTH, post_image, row_count


class CountingBody:
    """A request body that counts how many of its chunks the server pulled."""

    def __init__(self, chunks: int, size: int = 64 * 1024):
        self.chunks, self.size, self.pulled = chunks, size, 0

    def __iter__(self):
        yield b'--x\r\nContent-Disposition: form-data; name="bundle"; filename="m.kgm"\r\n\r\n'
        for _ in range(self.chunks):
            self.pulled += 1
            yield b"\0" * self.size
        yield b"\r\n--x--\r\n"


MULTIPART = {"Content-Type": "multipart/form-data; boundary=x"}


@pytest.mark.parametrize(
    "auth, status",
    [({}, 401), ({"Authorization": "Bearer not-a-known-token"}, 401), (STATION_AUTH, 403)],
    ids=["no token", "unknown token", "station token"],
)
def test_the_token_is_checked_before_the_body_is_read(client, auth, status):
    body = CountingBody(100)
    r = client.put("/v1/model", content=body, headers={**auth, **MULTIPART})
    assert r.status_code == status and r.headers["connection"] == "close"
    assert body.pulled == 0  # not a byte of the body was read
    body = CountingBody(100)
    r = client.post("/v1/inspections", content=body, headers={**auth, **MULTIPART})
    assert r.status_code == (401 if status == 401 else 422) and (status != 401 or body.pulled == 0)


def test_the_bundle_limit_is_for_admins_only(make_client):
    client = make_client(max_upload_bytes=4096, max_bundle_bytes=1024 * 1024)
    big = {"bundle": ("m.kgm", b"\0" * 512 * 1024)}
    assert client.put("/v1/model", files=big, headers=STATION_AUTH).status_code == 403
    r = client.post("/v1/inspections", files={"image": ("a.png", b"\0" * 512 * 1024)}, headers=ADMIN_AUTH)
    assert r.status_code == 413 and "4096" in r.json()["detail"]  # inspections get the upload limit, admin or not
    r = client.put("/v1/model", files=big, data=CHANGE, headers=ADMIN_AUTH)
    assert r.status_code == 422 and "not a readable bundle" in r.json()["detail"]  # past the gate and the limit


def test_busy_decoding_and_scoring_answer_503_with_retry_after(make_client, good_png, monkeypatch):
    client = make_client(max_decodes=1, max_queue=0)
    state = client.app.state.service
    inside, release = threading.Event(), threading.Event()
    real = pipeline.decode_image

    def slow(*args, **kwargs):
        inside.set()
        release.wait(10)
        return real(*args, **kwargs)

    monkeypatch.setattr(pipeline, "decode_image", slow)
    first = threading.Thread(target=lambda: results.append(post_image(client, good_png).status_code))
    results: list[int] = []
    first.start()
    assert inside.wait(10)
    r = post_image(client, good_png)  # the one decode slot is taken and the queue holds none
    assert r.status_code == 503 and r.headers["retry-after"] == "1" and "busy" in r.json()["detail"]
    release.set()
    first.join(10)
    assert results == [200] and row_count(client) == 1
    with state.scoring.enter():  # the scoring pass is taken: the next request waits in no queue
        r = post_image(client, good_png)
    assert r.status_code == 503 and r.headers["retry-after"] == "1" and "scoring" in r.json()["detail"]
    assert row_count(client) == 1
    metrics = client.get("/metrics", headers=STATION_AUTH).text
    assert 'knowngood_busy_refusals_total{stage="decoding"} 1.0' in metrics
    assert 'knowngood_busy_refusals_total{stage="scoring"} 1.0' in metrics


@pytest.mark.parametrize(
    "params, field",
    [
        ({"since": "0001-01-01T00:00:00+01:00"}, "since"),
        ({"until": "9999-12-31T23:59:59-01:00"}, "until"),
        ({"since": "2026-01-02T00:00:00Z", "until": "2026-01-01T00:00:00Z"}, "until"),
        ({"since": "2026-01-01T00:00:00Z", "until": "2026-01-01T00:00:00Z"}, "until"),
    ],
)
@pytest.mark.parametrize("path", ["/v1/inspections", "/v1/export.csv"])
def test_out_of_range_dates_and_inverted_ranges_are_422_on_every_route(client, path, params, field):
    r = client.get(path, params=params, headers=STATION_AUTH)
    assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json", r.text
    assert r.json()["errors"][0]["field"] == field


@pytest.mark.parametrize(
    "payload, field",
    [
        ({"threshold": False, "operator": "x"}, "threshold"),
        ({"threshold": True, "operator": "x"}, "threshold"),
        ({"threshold": "2.5", "operator": "x"}, "threshold"),
        ({"threshold": 1, "operator": 7}, "operator"),
        ({"threshold": 1, "operator": "x", "reason": "a\x7fb"}, "reason"),
        ({"threshold": 1, "operator": "ops\u0085"}, "operator"),
    ],
)
def test_json_bodies_have_strict_types(client, payload, field):
    r = client.put("/v1/model/threshold", json=payload, headers=ADMIN_AUTH)
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == field, r.text
    assert client.get("/v1/model", headers=STATION_AUTH).json()["threshold"]["value"] == 3.0
    r = client.put("/v1/model/threshold", json={"threshold": 2, "operator": "Dana Ø"}, headers=ADMIN_AUTH)
    assert r.status_code == 200 and r.json()["threshold"]["value"] == 2.0  # an integer is a number


@pytest.mark.parametrize("bad", ["a\x00b", "line\nbreak", "del\x7f", "c1\x9b[31m", "nel\u0085"])
def test_text_fields_refuse_control_characters(client, good_png, bad):
    assert post_image(client, good_png, part_id=bad).status_code == 422
    assert post_image(client, good_png, station=bad).status_code == 422
    r = client.post(
        "/v1/inspections/batch",
        files=[("images", ("a.png", good_png)), ("images", ("b.png", good_png))],
        data={"part_id": ["ok", bad]},
        headers=STATION_AUTH,
    )
    assert r.status_code == 422 and "part_id" in r.json()["detail"]
    [first] = client.get("/v1/inspections", headers=STATION_AUTH).json()["items"] or [None]
    assert first is None and row_count(client) == 0
    r = client.post("/v1/inspections/x/review", json={"label": "good", "operator": bad}, headers=STATION_AUTH)
    assert r.status_code == 422


def test_a_second_image_field_is_422(client, good_png):
    r = client.post(
        "/v1/inspections",
        files=[("image", ("a.png", good_png)), ("image", ("b.png", good_png))],
        headers=STATION_AUTH,
    )
    assert r.status_code == 422 and r.json()["errors"] == [{"field": "image", "message": "sent 2 times; send it once"}]
    r = post_image(client, good_png, part_id=["A", "B"])
    assert r.status_code == 422 and "part_id" in r.json()["detail"]
    assert row_count(client) == 0


def test_malformed_multipart_is_a_documented_400(client):
    r = client.post(
        "/v1/inspections", content=b"--x\r\n", headers={**STATION_AUTH, "Content-Type": "multipart/form-data"}
    )
    assert r.status_code == 400 and r.headers["content-type"] == "application/problem+json"
    spec = client.get("/openapi.json").json()
    for method, path in [("post", "/v1/inspections"), ("post", "/v1/inspections/batch"), ("put", "/v1/model")]:
        assert "400" in spec["paths"][path][method]["responses"], (method, path)


def test_a_500_closes_the_connection_and_logs_the_traceback_once(client, good_png, monkeypatch, caplog):
    def broken(**kwargs):
        raise RuntimeError("the disk went away")

    monkeypatch.setattr(client.app.state.service.store, "add_inspections", broken)
    with caplog.at_level(logging.ERROR):
        r = post_image(client, good_png)
    assert r.status_code == 500 and r.headers["connection"] == "close"
    assert r.headers["content-type"] == "application/problem+json" and "disk" not in r.text
    tracebacks = [rec for rec in caplog.records if rec.exc_info]
    assert len(tracebacks) == 1 and "the disk went away" in str(tracebacks[0].exc_info[1])
    monkeypatch.undo()
    assert post_image(client, good_png).status_code == 200  # still serving


def test_metrics_label_sets_are_bounded(client):
    def series() -> int:
        text = client.get("/metrics", headers=STATION_AUTH).text
        return sum(1 for line in text.splitlines() if line and not line.startswith("#"))

    client.request("BREW", "/v1/inspections")
    client.get("/no/such/path/1")
    series()  # the scrape's own series
    before = series()
    for i in range(200):
        client.request(f"X{i}", f"/v1/inspections/{i}")
        client.get(f"/no/such/path/{i}")
    assert series() == before
    text = client.get("/metrics", headers=STATION_AUTH).text
    assert 'method="other"' in text and 'route="unmatched"' in text


def test_station_tokens_do_not_see_admin_fingerprints(client, good_png):
    client.put("/v1/model/threshold", json={"threshold": 2, "operator": "Dana"}, headers=ADMIN_AUTH)
    post_image(client, good_png, auth=ADMIN_AUTH)
    fingerprint = client.get("/v1/model/events", headers=ADMIN_AUTH).json()["items"][0]["caller"]
    assert fingerprint.startswith("admin:") and fingerprint != f"admin:{ADMIN}"
    for path in ("/v1/model", "/v1/model/events", "/v1/export.csv"):
        assert fingerprint in client.get(path, headers=ADMIN_AUTH).text
        seen = client.get(path, headers=STATION_AUTH).text
        assert fingerprint not in seen and fingerprint[6:] not in seen, path
    model = client.get("/v1/model", headers=STATION_AUTH).json()
    assert model["threshold"]["set_by"] == "Dana (admin)"
