"""The model routes: read, swap by upload (validated first, old kept), rollback, threshold changes with who/when."""

from __future__ import annotations

import dataclasses
import sqlite3

import numpy as np
import pytest
from knowngood.training import bundle
from service_testkit import ADMIN_AUTH, CHANGE, STATION_AUTH, png_bytes, post_image, row_count


def _model(client) -> dict:
    r = client.get("/v1/model", headers=STATION_AUTH)
    assert r.status_code == 200, r.text
    return r.json()


def _events(client) -> list[tuple]:
    with sqlite3.connect(client.app.state.service.settings.db) as conn:
        return conn.execute(
            "SELECT kind, model_sha256, threshold, previous_threshold, caller, operator, reason "
            "FROM model_events ORDER BY seq"
        ).fetchall()


def test_get_model(client, tiny_bundle):
    m = _model(client)
    assert m["size"] == 32 and m["channels"] == 1 and m["runtime"] == "torch"
    assert m["threshold"]["value"] == 3.0 and m["threshold"]["method"] == "fixed"
    assert m["source"] == f"startup: {tiny_bundle}"
    assert m["manifest"]["model_id"] == m["id"] and m["previous"] is None
    assert [e[0] for e in _events(client)] == ["load"]


def test_swap_keeps_the_old_model_for_rollback(client, tiny_bundle, second_bundle, good_png):
    first = _model(client)
    r = client.put(
        "/v1/model", files={"bundle": ("second.kgm", second_bundle.read_bytes())}, data=CHANGE, headers=ADMIN_AUTH
    )
    assert r.status_code == 200, r.text
    swapped = r.json()
    assert swapped["id"] != first["id"] and swapped["threshold"]["value"] == 2.5
    assert swapped["previous"] == {"id": first["id"], "revision": first["revision"], "sha256": first["sha256"]}
    assert post_image(client, good_png).json()["model"]["sha256"] == swapped["sha256"]
    kept = client.app.state.service.store.get_bundle(sha256=swapped["sha256"])  # every instance can load it
    assert kept == second_bundle.read_bytes()

    back = client.post("/v1/model/rollback", json=CHANGE, headers=ADMIN_AUTH).json()
    assert back["sha256"] == first["sha256"] and back["previous"]["sha256"] == swapped["sha256"]
    assert post_image(client, good_png).json()["model"]["sha256"] == first["sha256"]
    again = client.post(
        "/v1/model/rollback", json=CHANGE, headers=ADMIN_AUTH
    ).json()  # a second rollback undoes the first
    assert again["sha256"] == swapped["sha256"]
    assert [e[0] for e in _events(client)] == ["load", "swap", "rollback", "rollback"]
    assert all(e[4].startswith("admin:") for e in _events(client)[1:])  # the admin token's label, not the token
    assert all(e[5:] == ("Dana", CHANGE["reason"]) for e in _events(client)[1:])  # who and why, with each change


@pytest.mark.parametrize("missing", ["operator", "reason"])
def test_swap_and_rollback_need_operator_and_reason(client, second_bundle, missing):
    first = _model(client)
    partial = {k: v for k, v in CHANGE.items() if k != missing}
    files = {"bundle": ("second.kgm", second_bundle.read_bytes())}
    for r in (
        client.put("/v1/model", files=files, data=partial, headers=ADMIN_AUTH),
        client.put("/v1/model", files=files, data={**partial, missing: ""}, headers=ADMIN_AUTH),
    ):
        assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json", r.text
        assert r.json()["errors"][0]["field"] == missing
    assert _model(client)["sha256"] == first["sha256"] and [e[0] for e in _events(client)] == ["load"]
    swapped = client.put("/v1/model", files=files, data=CHANGE, headers=ADMIN_AUTH).json()
    for body in (partial, {**partial, missing: "a\x00b"}, None):
        r = client.post("/v1/model/rollback", json=body, headers=ADMIN_AUTH)
        assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json", r.text
    assert _model(client)["sha256"] == swapped["sha256"] and [e[0] for e in _events(client)] == ["load", "swap"]
    r = client.post(
        "/v1/model/rollback", json={"operator": "Lee", "reason": "lot 8 flags too much"}, headers=ADMIN_AUTH
    )
    assert r.status_code == 200 and r.json()["sha256"] == first["sha256"]
    [rollback, swap, _] = client.get("/v1/model/events", headers=STATION_AUTH).json()["items"]
    assert (rollback["kind"], rollback["operator"], rollback["reason"]) == ("rollback", "Lee", "lot 8 flags too much")
    assert rollback["model"] == {k: first[k] for k in ("id", "revision", "sha256")}
    assert (swap["kind"], swap["operator"], swap["reason"]) == ("swap", "Dana", CHANGE["reason"])
    assert swap["model"] == {k: swapped[k] for k in ("id", "revision", "sha256")}


def test_rollback_without_previous_is_409(client):
    r = client.post("/v1/model/rollback", json=CHANGE, headers=ADMIN_AUTH)
    assert r.status_code == 409
    assert "no previous model" in r.json()["detail"]


def test_threshold_change_is_recorded_with_who_and_when(client, good_png):
    r = client.put(
        "/v1/model/threshold",
        json={"threshold": 0.25, "operator": "Dana", "reason": "holdout retune"},
        headers=ADMIN_AUTH,
    )
    assert r.status_code == 200, r.text
    t = r.json()["threshold"]
    assert t["value"] == 0.25 and t["method"] == "manual"
    assert t["set_by"].startswith("Dana (admin:") and t["set_at"]
    assert r.json()["manifest"]["threshold"]["replaced"]["value"] == 3.0
    body = post_image(client, good_png).json()
    assert body["threshold"] == 0.25
    assert body["verdict"] == ("flag" if body["score"] > 0.25 else "pass")
    kind, _, value, previous, caller, operator, reason = _events(client)[-1]
    assert (kind, value, previous, operator, reason) == ("threshold", 0.25, 3.0, "Dana", "holdout retune")
    assert caller.startswith("admin:")
    [latest, load] = client.get("/v1/model/events", headers=STATION_AUTH).json()["items"]
    assert (latest["kind"], latest["threshold"], latest["previous_threshold"]) == ("threshold", 0.25, 3.0)
    assert (latest["operator"], latest["reason"]) == ("Dana", "holdout retune")
    assert latest["time"] and latest["caller"] == "admin" and load["kind"] == "load"  # station: no fingerprint
    [latest, _] = client.get("/v1/model/events", headers=ADMIN_AUTH).json()["items"]
    assert latest["caller"].startswith("admin:")


@pytest.mark.parametrize(
    "payload, field",
    [
        ({"threshold": -1, "operator": "x"}, "threshold"),
        ({"threshold": "inf", "operator": "x"}, "threshold"),
        ({"threshold": 1.0}, "operator"),
    ],
)
def test_bad_threshold_is_422(client, payload, field):
    r = client.put("/v1/model/threshold", json=payload, headers=ADMIN_AUTH)
    assert r.status_code == 422 and field in r.json()["detail"]
    assert _model(client)["threshold"]["value"] == 3.0


def test_threshold_survives_a_restart_for_the_same_bundle(make_client, make_settings, second_bundle):
    client = make_client()
    client.put("/v1/model/threshold", json={"threshold": 1.5, "operator": "Dana"}, headers=ADMIN_AUTH)
    client.__exit__(None, None, None)
    restarted = make_client()
    t = _model(restarted)["threshold"]
    assert t["value"] == 1.5 and t["set_by"].startswith("Dana")
    other = make_client(model_path=second_bundle)  # another bundle keeps its own threshold
    assert _model(other)["threshold"]["value"] == 2.5


def test_restart_serves_the_threshold_last_served_with_that_bundle(make_client, tiny_bundle):
    client = make_client()
    client.put("/v1/model/threshold", json={"threshold": 1.5, "operator": "Dana"}, headers=ADMIN_AUTH)
    r = client.put(
        "/v1/model", files={"bundle": ("same.kgm", tiny_bundle.read_bytes())}, data=CHANGE, headers=ADMIN_AUTH
    )
    assert r.json()["threshold"]["value"] == 3.0  # an upload serves the bundle as it is
    client.__exit__(None, None, None)
    assert _model(make_client())["threshold"]["value"] == 3.0


@pytest.mark.parametrize(
    "method, path", [("put", "/v1/model/threshold"), ("post", "/v1/model/rollback"), ("put", "/v1/model")]
)
def test_station_token_cannot_change_the_model(client, method, path):
    kwargs = {"json": {"threshold": 0, "operator": "x"}} if path.endswith("threshold") else {}
    r = getattr(client, method)(path, headers=STATION_AUTH, **kwargs)
    assert r.status_code == 403 and "admin token" in r.json()["detail"]
    assert _model(client)["threshold"]["value"] == 3.0


def test_without_a_model_the_service_is_not_ready_until_an_upload(make_client, tiny_bundle, good_png):
    client = make_client(model_path=None)
    assert client.get("/healthz").json() == {"status": "ok"}
    r = client.get("/readyz")
    assert r.status_code == 503 and r.json()["ready"] is False
    r = post_image(client, good_png)
    assert r.status_code == 503 and "PUT /v1/model" in r.json()["detail"]
    assert client.get("/v1/model", headers=STATION_AUTH).status_code == 503
    assert row_count(client) == 0
    r = client.put("/v1/model", files={"bundle": ("m.kgm", tiny_bundle.read_bytes())}, data=CHANGE, headers=ADMIN_AUTH)
    assert r.status_code == 200 and r.json()["previous"] is None
    assert client.get("/readyz").status_code == 200
    assert post_image(client, good_png).status_code == 200


def test_onnx_runtime_scores_like_pytorch(make_client, tiny_good_images, tmp_path):
    torch_client = make_client()
    onnx_client = make_client(onnx=True, db=tmp_path / "onnx.db", data_dir=tmp_path / "onnx-data")
    assert _model(onnx_client)["runtime"] == "onnx"
    for img in tiny_good_images[:3]:
        a = post_image(torch_client, png_bytes(img)).json()["score"]
        b = post_image(onnx_client, png_bytes(img)).json()["score"]
        assert b == pytest.approx(a, rel=1e-4, abs=1e-5)
    served = onnx_client.app.state.service.parts.only().current
    x = served.detector.prepare(tiny_good_images[:4])
    _, _, drift_features = served.detector.score_and_embed(x)  # what the drift window gets, from the scoring pass
    np.testing.assert_allclose(drift_features, served.detector.embed(x), rtol=1e-4, atol=1e-6)


def test_a_swap_and_its_threshold_survive_a_restart(make_client, second_bundle, good_png, caplog):
    client = make_client()
    first = _model(client)
    swapped = client.put(
        "/v1/model", files={"bundle": ("s.kgm", second_bundle.read_bytes())}, data=CHANGE, headers=ADMIN_AUTH
    )
    client.put("/v1/model/threshold", json={"threshold": 1.25, "operator": "Dana"}, headers=ADMIN_AUTH)
    client.__exit__(None, None, None)
    with caplog.at_level("INFO", logger="knowngood.service"):
        restarted = make_client()  # the same command-line bundle as before
    m = _model(restarted)
    assert (m["sha256"], m["threshold"]["value"]) == (swapped.json()["sha256"], 1.25)
    assert m["threshold"]["set_by"].startswith("Dana") and m["previous"]["sha256"] == first["sha256"]
    [line] = [r.getMessage() for r in caplog.records if "serving model" in r.getMessage()]
    assert m["id"] in line and "made current by threshold" in line and "unchanged" in line
    assert post_image(restarted, good_png).json()["threshold"] == 1.25
    back = restarted.post("/v1/model/rollback", json=CHANGE, headers=ADMIN_AUTH).json()  # the rollback history is kept
    assert (back["sha256"], back["threshold"]["value"]) == (first["sha256"], 3.0)
    restarted.__exit__(None, None, None)
    assert _model(make_client(model_path=None))["sha256"] == first["sha256"]  # no flag: what was served


def test_a_new_command_line_bundle_replaces_the_swapped_model(
    make_client, tiny_bundle, second_bundle, tmp_path, caplog
):
    client = make_client(model_path=second_bundle)
    tiny = client.put(
        "/v1/model", files={"bundle": ("t.kgm", tiny_bundle.read_bytes())}, data=CHANGE, headers=ADMIN_AUTH
    ).json()
    client.__exit__(None, None, None)
    restarted = make_client(model_path=second_bundle)
    assert _model(restarted)["sha256"] == tiny["sha256"]  # the same flag: the swap stands
    restarted.__exit__(None, None, None)
    det, frechet = bundle.load(second_bundle)
    third = tmp_path / "third.kgm"
    bundle.save(dataclasses.replace(det, threshold=2.75), frechet, third)
    with caplog.at_level("INFO", logger="knowngood.service"):
        changed = make_client(model_path=third)  # an engineer gives another bundle: it wins, and says so
    m = _model(changed)
    assert m["threshold"]["value"] == 2.75 and m["source"] == f"startup: {third}"
    assert m["previous"]["sha256"] == tiny["sha256"]  # the swapped model is the rollback target
    [line] = [r.getMessage() for r in caplog.records if "serving model" in r.getMessage()]
    assert "another bundle than at the last start" in line and m["id"] in line


def test_uploaded_bundles_are_retained_with_a_limit(make_client, second_bundle, tmp_path):
    client = make_client(keep_bundles=2)
    det, frechet = bundle.load(second_bundle)
    store = client.app.state.service.store
    uploads = []
    for i in range(5):
        path = tmp_path / f"b{i}.kgm"
        bundle.save(dataclasses.replace(det, threshold=2.0 + i / 10), frechet, path)
        r = client.put("/v1/model", files={"bundle": ("b.kgm", path.read_bytes())}, data=CHANGE, headers=ADMIN_AUTH)
        uploads.append(r.json()["sha256"])
    startup = client.app.state.service.parts.only().startup_sha256
    kept = {sha for sha in (startup, *uploads) if store.get_bundle(sha256=sha) is not None}
    # the command-line bundle, current and previous, plus the newest two others (KNOWNGOOD_KEEP_BUNDLES=2)
    assert kept == {startup, *uploads[1:]} and uploads[0] not in kept
