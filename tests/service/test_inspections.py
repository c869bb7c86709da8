"""Inspections over REST: create (single, inline heatmap, batch), read back, list, heatmap PNG, review."""

from __future__ import annotations

import base64
import csv
import io

import numpy as np
import pytest
from knowngood.service.pipeline import verdict_for
from knowngood.training import bundle
from knowngood.training.data import decode_image
from PIL import Image
from service_testkit import ADMIN_AUTH, STATION_AUTH, png_bytes, post_image, row_count


def test_inspection_returns_verdict_and_is_stored(client, good_png):
    r = post_image(client, good_png, part_id="P-17", station="line 3")
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["verdict"] == ("flag" if body["score"] > body["threshold"] else "pass")
    assert body["score"] >= 0
    assert body["part_id"] == "P-17" and body["station"] == "line 3"
    assert body["image"] == {"sha256": body["image"]["sha256"], "width": 32, "height": 32}
    assert body["heatmap_url"] == f"/v1/inspections/{body['id']}/heatmap.png"
    assert body["heatmap_png"] is None
    assert body["elapsed_ms"] > 0
    model = client.get("/v1/model", headers=STATION_AUTH).json()
    assert body["model"] == {"id": model["id"], "revision": model["revision"], "sha256": model["sha256"]}
    assert body["review"] is None and body["review_count"] == 0
    stored = client.get(f"/v1/inspections/{body['id']}", headers=STATION_AUTH)
    assert stored.status_code == 200
    assert {k: v for k, v in stored.json().items() if k != "time"} == {
        k: v for k, v in body.items() if k not in ("time", "heatmap_png")
    }
    assert row_count(client) == 1


def test_scores_match_the_detector(client, tiny_bundle, tiny_good_images):
    """The service scores exactly as `Detector.inspect` does, with the same verdict rule."""
    det, _ = bundle.load(tiny_bundle)
    data = png_bytes(tiny_good_images[3])
    [expected] = det.inspect([decode_image(data, name="x")])
    body = post_image(client, data).json()
    assert body["score"] == pytest.approx(expected.score, rel=1e-5, abs=1e-6)
    assert body["verdict"] == expected.verdict


def test_verdict_rule_is_score_above_threshold():
    assert verdict_for(1.0, 0.5) == "flag"
    assert verdict_for(0.5, 0.5) == "pass"  # equal to the threshold passes
    assert verdict_for(0.0, 0.5) == "pass"


def test_inline_heatmap_is_a_png_at_input_resolution(client, tiny_good_images):
    wide = np.repeat(tiny_good_images[0], 2, axis=2)  # (1, 32, 64): not the model's square size
    r = client.post("/v1/inspections?heatmap=inline", files={"image": ("w.png", png_bytes(wide))}, headers=STATION_AUTH)
    assert r.status_code == 200, r.text
    png = Image.open(io.BytesIO(base64.b64decode(r.json()["heatmap_png"])))
    assert png.format == "PNG" and png.size == (64, 32)
    assert r.json()["image"]["width"] == 64


def test_heatmap_png_route(client, good_png):
    body = post_image(client, good_png).json()
    r = client.get(body["heatmap_url"], headers=STATION_AUTH)
    assert r.status_code == 200
    assert r.headers["content-type"] == "image/png"
    assert Image.open(io.BytesIO(r.content)).size == (32, 32)


def test_heatmap_uses_the_kept_image(make_client, tiny_good_images):
    client = make_client(keep_images=True)
    body = post_image(client, png_bytes(tiny_good_images[1])).json()
    stored = client.app.state.service.files.get_image(body["id"])
    assert stored == png_bytes(tiny_good_images[1])
    assert client.get(body["heatmap_url"], headers=STATION_AUTH).status_code == 200


def test_images_are_not_kept_by_default(client, good_png):
    body = post_image(client, good_png).json()
    assert client.app.state.service.files.get_image(body["id"]) is None


def test_unknown_inspection_is_404(client):
    for path in (
        "/v1/inspections/0123456789abcdef0123456789abcdef",
        "/v1/inspections/..%2F..%2Fetc",
        "/v1/inspections/nope/heatmap.png",
    ):
        r = client.get(path, headers=STATION_AUTH)
        assert r.status_code == 404, path
        assert r.headers["content-type"] == "application/problem+json"
    r = client.post("/v1/inspections/nope/review", json={"label": "good", "operator": "kim"}, headers=STATION_AUTH)
    assert r.status_code == 404 and "no inspection" in r.json()["detail"]


def test_batch_scores_all_and_stores_all(client, tiny_good_images):
    files = [("images", (f"p{i}.png", png_bytes(img))) for i, img in enumerate(tiny_good_images[:3])]
    r = client.post(
        "/v1/inspections/batch", files=files, data={"part_id": ["a", "b", "c"], "station": "s1"}, headers=STATION_AUTH
    )
    assert r.status_code == 200, r.text
    items = r.json()["items"]
    assert [i["part_id"] for i in items] == ["a", "b", "c"]
    assert len({i["id"] for i in items}) == 3
    assert row_count(client) == 3
    single = post_image(client, png_bytes(tiny_good_images[1])).json()
    assert single["score"] == pytest.approx(items[1]["score"], rel=1e-5, abs=1e-6)  # batching changes nothing


def test_batch_with_one_bad_image_stores_nothing(client, tiny_good_images):
    files = [("images", ("ok.png", png_bytes(tiny_good_images[0]))), ("images", ("bad.png", b"not an image"))]
    r = client.post("/v1/inspections/batch", files=files, headers=STATION_AUTH)
    assert r.status_code == 422
    assert "images[1] 'bad.png'" in r.json()["detail"]
    assert row_count(client) == 0


def test_batch_limits(make_client, tiny_good_images):
    client = make_client(max_batch=2)
    files = [("images", (f"p{i}.png", png_bytes(img))) for i, img in enumerate(tiny_good_images[:3])]
    r = client.post("/v1/inspections/batch", files=files, headers=STATION_AUTH)
    assert r.status_code == 422 and "limit is 2" in r.json()["detail"]
    r = client.post("/v1/inspections/batch", files=files[:2], data={"part_id": ["only one"]}, headers=STATION_AUTH)
    assert r.status_code == 422 and "one per image" in r.json()["detail"]
    assert row_count(client) == 0


def test_list_filters(client, tiny_good_images):
    ids = [post_image(client, png_bytes(img)).json()["id"] for img in tiny_good_images[:3]]
    everything = client.get("/v1/inspections", headers=STATION_AUTH).json()
    assert [i["id"] for i in everything["items"]] == ids[::-1]  # newest first
    assert client.get("/v1/inspections?limit=2", headers=STATION_AUTH).json()["count"] == 2
    client.put("/v1/model/threshold", json={"threshold": 0.0, "operator": "qa"}, headers=ADMIN_AUTH)
    flagged = post_image(client, png_bytes(tiny_good_images[4])).json()
    assert flagged["verdict"] == "flag"
    only_flags = client.get("/v1/inspections?verdict=flag", headers=STATION_AUTH).json()["items"]
    assert flagged["id"] in [i["id"] for i in only_flags]
    assert all(i["verdict"] == "flag" for i in only_flags)
    later = client.get("/v1/inspections", params={"since": flagged["time"]}, headers=STATION_AUTH).json()
    assert [i["id"] for i in later["items"]] == [flagged["id"]]
    r = client.get("/v1/inspections?verdict=maybe&limit=0", headers=STATION_AUTH)
    assert r.status_code == 422
    assert "verdict" in r.json()["detail"] and "limit" in r.json()["detail"]


def _review(client, inspection_id: str, **review):
    return client.post(f"/v1/inspections/{inspection_id}/review", json=review, headers=STATION_AUTH)


def test_review_updates_the_row_and_the_queue(client, good_png):
    client.put("/v1/model/threshold", json={"threshold": 0.0, "operator": "qa"}, headers=ADMIN_AUTH)
    body = post_image(client, good_png).json()
    queue = "/v1/inspections?verdict=flag&reviewed=false"
    assert [i["id"] for i in client.get(queue, headers=STATION_AUTH).json()["items"]] == [body["id"]]
    r = _review(client, body["id"], label="defective", operator="Kim", defect_class="scratch", note="left edge")
    assert r.status_code == 200
    assert (r.json()["review"]["label"], r.json()["review"]["operator"]) == ("defective", "Kim")
    assert (r.json()["review"]["defect_class"], r.json()["review"]["note"]) == ("scratch", "left edge")
    assert client.get(queue, headers=STATION_AUTH).json()["total"] == 0
    reviewed = client.get("/v1/inspections?reviewed=true", headers=STATION_AUTH).json()["items"]
    assert [i["id"] for i in reviewed] == [body["id"]]


def test_every_review_is_kept_and_the_latest_is_the_label(client, tiny_good_images):
    body = post_image(client, png_bytes(tiny_good_images[0])).json()
    other = post_image(client, png_bytes(tiny_good_images[1])).json()
    first = _review(client, body["id"], label="defective", operator="Kim", defect_class="pore")
    second = _review(client, body["id"], label="good", operator="Lee", note="a smudge on the lens, not the part")
    assert first.status_code == 200 and second.status_code == 200
    assert (second.json()["review"]["label"], second.json()["review"]["operator"]) == ("good", "Lee")
    assert second.json()["review_count"] == 2

    r = client.get(f"/v1/inspections/{body['id']}/reviews", headers=STATION_AUTH)
    assert r.status_code == 200 and r.json()["count"] == 2
    history = [(i["label"], i["operator"], i["defect_class"], i["note"]) for i in r.json()["items"]]
    assert history == [
        ("defective", "Kim", "pore", None),
        ("good", "Lee", None, "a smudge on the lens, not the part"),
    ]  # oldest first
    assert r.json()["items"][0]["time"] < r.json()["items"][1]["time"]
    stored = client.get(f"/v1/inspections/{body['id']}", headers=STATION_AUTH).json()
    assert (stored["review"]["label"], stored["review"]["operator"], stored["review_count"]) == ("good", "Lee", 2)
    assert client.get(f"/v1/inspections/{other['id']}/reviews", headers=STATION_AUTH).json() == {
        "items": [],
        "count": 0,
    }
    assert client.get("/v1/inspections/nope/reviews", headers=STATION_AUTH).status_code == 404

    rows = {
        row["id"]: row for row in csv.DictReader(io.StringIO(client.get("/v1/export.csv", headers=STATION_AUTH).text))
    }
    exported = rows[body["id"]]
    assert (exported["review_label"], exported["review_operator"], exported["review_count"]) == ("good", "Lee", "2")
    assert exported["review_note"] == "a smudge on the lens, not the part" and exported["review_defect_class"] == ""
    assert rows[other["id"]]["review_label"] == "" and rows[other["id"]]["review_count"] == "0"


def test_a_threshold_change_is_a_new_revision_and_rows_keep_theirs(make_client, good_png):
    client = make_client()
    before = post_image(client, good_png).json()
    r = client.put(
        "/v1/model/threshold", json={"threshold": 0.5, "operator": "Dana", "reason": "lot 7"}, headers=ADMIN_AUTH
    )
    assert r.status_code == 200, r.text
    after = post_image(client, good_png).json()
    assert after["model"]["id"] == before["model"]["id"] and after["model"]["sha256"] == before["model"]["sha256"]
    assert after["model"]["revision"] != before["model"]["revision"]
    assert r.json()["revision"] == after["model"]["revision"] != before["model"]["revision"]
    for body in (before, after):  # every row keeps the revision its verdict was given under
        stored = client.get(f"/v1/inspections/{body['id']}", headers=STATION_AUTH).json()
        assert stored["model"] == body["model"]
    listed = {
        i["id"]: i["model"]["revision"] for i in client.get("/v1/inspections", headers=STATION_AUTH).json()["items"]
    }
    assert listed == {before["id"]: before["model"]["revision"], after["id"]: after["model"]["revision"]}
    rows = csv.DictReader(io.StringIO(client.get("/v1/export.csv", headers=STATION_AUTH).text))
    assert [row["model_revision"] for row in rows] == [before["model"]["revision"], after["model"]["revision"]]
    [change, load] = client.get("/v1/model/events", headers=STATION_AUTH).json()["items"]
    assert (change["kind"], change["model"]["revision"]) == ("threshold", after["model"]["revision"])
    assert (load["kind"], load["model"]["revision"]) == ("load", before["model"]["revision"])

    client.__exit__(None, None, None)
    restarted = make_client()  # the same bundle: the changed threshold, and so the same revision, is served again
    model = restarted.get("/v1/model", headers=STATION_AUTH).json()
    assert (model["threshold"]["value"], model["revision"]) == (0.5, after["model"]["revision"])
    assert post_image(restarted, good_png).json()["model"] == after["model"]


@pytest.mark.parametrize(
    "payload, field",
    [
        ({"label": "maybe", "operator": "kim"}, "label"),
        ({"label": "good"}, "operator"),
        ({"label": "good", "operator": ""}, "operator"),
        ({"label": "good", "operator": "kim", "extra": 1}, "extra"),
        ({"label": "good", "operator": "kim", "defect_class": "pore"}, "defect_class"),
        ({"label": "defective", "operator": "kim", "defect_class": "../x"}, "defect_class"),
        ({"label": "good", "operator": "kim", "note": "a\nb"}, "note"),
    ],
)
def test_bad_review_is_422(client, good_png, payload, field):
    body = post_image(client, good_png).json()
    r = client.post(f"/v1/inspections/{body['id']}/review", json=payload, headers=STATION_AUTH)
    assert r.status_code == 422
    assert r.headers["content-type"] == "application/problem+json"
    assert field in r.json()["detail"]
    assert client.get(f"/v1/inspections/{body['id']}", headers=STATION_AUTH).json()["review"] is None
