"""Operations routes: health, readiness, Prometheus metrics, drift, CSV export, the operator page, OpenAPI."""

from __future__ import annotations

import csv
import io
import re
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import urlsplit

import httpx
import numpy as np
import pytest
from knowngood.service.drift import STATES
from knowngood.training import bundle
from prometheus_client.parser import text_string_to_metric_families
from service_testkit import STATION_AUTH, png_bytes, post_image, start_server

SAMPLE = re.compile(
    r'^([a-zA-Z_:][a-zA-Z0-9_:]*)(\{(?:[a-zA-Z_][a-zA-Z0-9_]*="(?:[^"\\]|\\.)*",?)*\})? (-?[0-9.e+-]+|\+Inf|NaN)$'
)


def blobs(n: int, seed: int, *, size: int = 32) -> list[np.ndarray]:
    """Known-good-looking images like the tiny bundle's: a soft gray blob near the centre, a little noise."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:size, 0:size] / size
    out = []
    for _ in range(n):
        cx, cy = 0.5 + rng.normal(0, 0.02, 2)
        img = 0.2 + 0.6 * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / 0.05) + rng.normal(0, 0.01, (size, size))
        out.append(np.clip(img, 0, 1).astype(np.float32)[None])
    return out


def test_health_and_readiness_need_no_token(client):
    assert client.get("/healthz").json() == {"status": "ok"}
    r = client.get("/readyz")
    assert r.status_code == 200 and r.json()["ready"] is True and r.json()["model_id"]


def _samples(text: str) -> dict[str, float]:
    out = {}
    for line in text.splitlines():
        if line.startswith("#") or not line:
            continue
        m = SAMPLE.match(line)
        assert m, f"not a Prometheus sample line: {line!r}"
        out[m.group(1) + (m.group(2) or "")] = float(m.group(3).replace("+Inf", "inf"))
    return out


def test_metrics_in_prometheus_text_format(client, tiny_good_images):
    assert client.get("/metrics").status_code == 401
    for img in tiny_good_images[:3]:
        assert post_image(client, png_bytes(img)).status_code == 200
    post_image(client, b"junk")
    r = client.get("/metrics", headers=STATION_AUTH)
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/plain; version=0.0.4")
    s = _samples(r.text)
    assert s['knowngood_http_requests_total{method="POST",route="/v1/inspections",status="200"}'] == 3
    assert s['knowngood_http_requests_total{method="POST",route="/v1/inspections",status="422"}'] == 1
    pt = 'part_type="default"'  # every model-level series is labelled by part type
    verdicts = [s.get(f'knowngood_inspections_total{{{pt},verdict="{v}"}}', 0) for v in ("pass", "flag")]
    assert sum(verdicts) == 3
    model = client.get("/v1/model", headers=STATION_AUTH).json()
    labels = f'model_id="{model["id"]}",{pt},revision="{model["revision"]}",sha256="{model["sha256"]}"'
    assert s[f"knowngood_model_info{{{labels}}}"] == 1
    assert s[f"knowngood_threshold{{{pt}}}"] == 3.0
    assert s[f"knowngood_anomaly_score_count{{{pt}}}"] == 3
    assert (
        0
        <= s[f'knowngood_anomaly_score{{{pt},quantile="0.5"}}']
        <= s[f'knowngood_anomaly_score{{{pt},quantile="0.99"}}']
    )
    assert s[f'knowngood_drift_state{{{pt},state="not_enough_images"}}'] == 1
    assert s[f"knowngood_drift_images{{{pt}}}"] == 3
    route = 'route="/v1/inspections"'
    buckets = [
        v for k, v in s.items() if k.startswith("knowngood_http_request_duration_seconds_bucket{") and route in k
    ]
    assert buckets == sorted(buckets) and buckets[-1] == 4
    assert s[f"knowngood_http_request_duration_seconds_count{{{route}}}"] == 4
    assert "# TYPE knowngood_http_request_duration_seconds histogram" in r.text


def test_drift_waits_for_enough_images(client, tiny_good_images):
    for img in tiny_good_images[:3]:
        post_image(client, png_bytes(img))
    d = client.get("/v1/drift", headers=STATION_AUTH).json()
    assert d["status"] == "not_enough_images" and d["drifting"] is None
    assert d["images"] == 3 and d["needed"] == 8 and "8" in d["detail"]


@pytest.fixture
def drift_bundle(tiny_bundle, tmp_path) -> Path:
    """The tiny model with an honest Fréchet reference: training statistics and holdout features from different
    known-good images (the shared tiny bundle uses one set for both)."""
    det, _ = bundle.load(tiny_bundle)
    train, holdout = det.embed(blobs(64, seed=11)), det.embed(blobs(32, seed=12))
    path = tmp_path / "drift.kgm"
    bundle.save(
        det, {"train_mu": train.mean(0), "train_sigma": np.cov(train, rowvar=False), "holdout_features": holdout}, path
    )
    return path


@pytest.mark.parametrize("seed", [100, 101, 102])
def test_drift_ok_for_good_images_and_drifting_for_others(make_client, drift_bundle, tmp_path, seed):
    good = make_client(model_path=drift_bundle)
    for img in blobs(16, seed=seed):
        post_image(good, png_bytes(img))
    d = good.get("/v1/drift", headers=STATION_AUTH).json()
    assert d["status"] == "ok" and d["drifting"] is False, d
    assert d["n"] == 16 and d["distance"] <= d["limit"]
    assert d["limit"] > d["reference_mean"] > 0

    shifted = make_client(model_path=drift_bundle, db=tmp_path / "b.db", data_dir=tmp_path / "b")
    for img in blobs(16, seed=seed + 50):  # a new lamp: 15 % brighter
        post_image(shifted, png_bytes(np.clip(1.15 * img, 0, 1)))
    d = shifted.get("/v1/drift", headers=STATION_AUTH).json()
    assert d["status"] == "drifting" and d["drifting"] is True, d
    assert d["distance"] > d["limit"]


def test_drift_without_reference(make_client, tiny_bundle, tmp_path):
    det, _ = bundle.load(tiny_bundle)
    bare = tmp_path / "bare.kgm"
    bundle.save(det, {}, bare)
    client = make_client(model_path=bare)
    assert client.get("/v1/drift", headers=STATION_AUTH).json()["status"] == "no_reference"


def test_export_csv_of_a_time_range(client, tiny_good_images):
    times = [
        post_image(client, png_bytes(img), part_id=f"P{i}").json()["time"] for i, img in enumerate(tiny_good_images[:3])
    ]
    r = client.get("/v1/export.csv", headers=STATION_AUTH)
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(r.text)))
    assert [row["part_id"] for row in rows] == ["P0", "P1", "P2"]  # oldest first
    assert {"id", "time", "image_sha256", "model_sha256", "score", "threshold", "verdict", "review_label"} <= set(
        rows[0]
    )
    later = list(
        csv.DictReader(io.StringIO(client.get("/v1/export.csv", params={"since": times[1]}, headers=STATION_AUTH).text))
    )
    assert [row["part_id"] for row in later] == ["P1", "P2"]
    earlier = list(
        csv.DictReader(io.StringIO(client.get("/v1/export.csv", params={"until": times[1]}, headers=STATION_AUTH).text))
    )
    assert [row["part_id"] for row in earlier] == ["P0"]
    r = client.get("/v1/export.csv", params={"since": times[2], "until": times[0]}, headers=STATION_AUTH)
    assert r.status_code == 422 and "must be after" in r.json()["detail"]
    r = client.get("/v1/export.csv", params={"since": "yesterday"}, headers=STATION_AUTH)
    assert r.status_code == 422 and "since" in r.json()["detail"]


def test_export_quotes_text_that_would_be_a_spreadsheet_formula(client, good_png):
    post_image(client, good_png, part_id="=HYPERLINK(1)", station="@line")
    [row] = csv.DictReader(io.StringIO(client.get("/v1/export.csv", headers=STATION_AUTH).text))
    assert (row["part_id"], row["station"]) == ("'=HYPERLINK(1)", "'@line")


def test_export_pages_through_many_rows(client, good_png):
    store = client.app.state.service.store
    post_image(client, good_png)
    [first] = store.list_inspections(limit=1)
    assert len(list(store.iter_inspections(since=None, until=None, page=1))) == 1
    for _ in range(4):
        post_image(client, good_png)
    assert [r.id for r in store.iter_inspections(since=None, until=None, page=2)][0] == first.id
    assert len(list(store.iter_inspections(since=None, until=None, page=2))) == 5


def test_operator_page(client):
    r = client.get("/")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    assert "default-src 'self'" in r.headers["content-security-policy"]
    sentence = (
        "A verdict is decision support; safety-critical parts still need the inspection that local codes and the "
        "customer's quality standards require."
    )
    assert sentence in " ".join(r.text.split())
    assert client.get("/static/app.js").status_code == 200
    assert "sessionStorage" in client.get("/static/app.js").text


def test_unknown_route_is_a_problem(client):
    r = client.get("/v2/inspections")
    assert r.status_code == 404 and r.headers["content-type"] == "application/problem+json"
    assert "/v1" in r.json()["detail"]
    r = client.delete("/v1/model", headers=STATION_AUTH)
    assert r.status_code == 405 and "DELETE" in r.json()["detail"]


def test_openapi_is_truthful(client):
    spec = client.get("/openapi.json").json()
    expected = {
        ("post", "/v1/inspections"),
        ("post", "/v1/inspections/batch"),
        ("get", "/v1/inspections"),
        ("get", "/v1/inspections/{inspection_id}"),
        ("get", "/v1/inspections/{inspection_id}/heatmap.png"),
        ("post", "/v1/inspections/{inspection_id}/review"),
        ("get", "/v1/inspections/{inspection_id}/reviews"),
        ("get", "/v1/inspections/{inspection_id}/image.png"),
        ("get", "/v1/inspections/{inspection_id}/original"),
        ("get", "/v1/part-types"),
        ("get", "/v1/part-types/{name}/model"),
        ("put", "/v1/part-types/{name}/model"),
        ("post", "/v1/part-types/{name}/model/rollback"),
        ("put", "/v1/part-types/{name}/threshold"),
        ("get", "/v1/part-types/{name}/events"),
        ("get", "/v1/part-types/{name}/drift"),
        ("get", "/v1/model"),
        ("get", "/v1/model/events"),
        ("put", "/v1/model"),
        ("post", "/v1/model/rollback"),
        ("put", "/v1/model/threshold"),
        ("get", "/v1/drift"),
        ("get", "/v1/export.csv"),
        ("get", "/healthz"),
        ("get", "/readyz"),
        ("get", "/metrics"),
        ("get", "/"),
        ("get", "/heatmap-legend.png"),
    }
    found = {(m, p) for p, ops in spec["paths"].items() for m in ops}
    assert found == expected
    for path, ops in spec["paths"].items():
        for method, op in ops.items():
            assert op["summary"] and "\n" not in op["summary"], (method, path)
            assert "200" in op["responses"]
            for status, response in op["responses"].items():
                if status.startswith("4"):
                    assert list(response["content"]) == ["application/problem+json"], (method, path, status)
            if path.startswith("/v1"):
                assert "401" in op["responses"], (method, path)
    assert spec["paths"]["/v1/inspections"]["post"]["requestBody"]["content"].keys() == {"multipart/form-data"}


@pytest.mark.parametrize(
    "path", ["/v1/inspections", "/v1/model", "/v1/model/events", "/v1/drift", "/v1/export.csv", "/metrics"]
)
def test_reads_need_a_token(client, path):
    r = client.get(path)
    assert r.status_code == 401 and r.headers["content-type"] == "application/problem+json"


def _gauges(text: str) -> dict[str, dict[tuple, float]]:
    """Prometheus text, parsed by prometheus-client's own parser: family name -> {label items: value}."""
    return {
        family.name: {tuple(sorted(sample.labels.items())): sample.value for sample in family.samples}
        for family in text_string_to_metric_families(text)
    }


def test_drift_state_distance_and_reference_in_metrics(tiny_bundle, tiny_good_images, tmp_path):
    server = start_server(tiny_bundle, tmp_path / "server", extra_env={"KNOWNGOOD_DRIFT_MIN_IMAGES": "4"})
    pt = ("part_type", "default")  # drift is per part type
    try:
        with httpx.Client(base_url=server.url, headers=STATION_AUTH, timeout=60) as http:
            before = _gauges(http.get("/metrics").text)
            assert before["knowngood_drift_state"] == {
                (pt, ("state", s)): float(s == "not_enough_images") for s in STATES
            }  # one gauge per state, 1 for the state now
            assert before["knowngood_drift_images"] == {(pt,): 0.0}
            assert not before.get("knowngood_drift_distance")  # nothing assessed yet: no made-up number
            for img in tiny_good_images[:6]:
                assert http.post("/v1/inspections", files={"image": ("p.png", png_bytes(img))}).status_code == 200
            after = _gauges(http.get("/metrics").text)
            drift = http.get("/v1/drift").json()
    finally:
        server.stop()
    assert drift["status"] in ("ok", "drifting") and drift["distance"] is not None
    assert after["knowngood_drift_state"] == {(pt, ("state", s)): float(s == drift["status"]) for s in STATES}
    assert after["knowngood_drift_images"] == {(pt,): 6.0}
    for name in ("distance", "reference_mean", "reference_std", "limit"):
        assert after[f"knowngood_drift_{name}"][(pt,)] == pytest.approx(drift[name], rel=1e-9), name
    assert after["knowngood_drift_distance"][(pt,)] > 0 and after["knowngood_drift_reference_mean"][(pt,)] > 0


class _Links(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.urls: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.urls += [value for name, value in attrs if name in ("src", "href") and value]


def test_docs_work_offline(live_server):
    with httpx.Client(base_url=live_server.url, timeout=30) as http:
        r = http.get("/docs")
        assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
        assert "SwaggerUIBundle" in r.text and "'/openapi.json'" in r.text
        assert not re.search(r"(https?:)?//[a-z0-9]", r.text, re.IGNORECASE), "the page names another host"
        links = _Links()
        links.feed(r.text)
        scripts = [u for u in links.urls if u.endswith(".js")]
        styles = [u for u in links.urls if u.endswith(".css")]
        assert scripts and styles
        for url in links.urls:
            assert not urlsplit(url).netloc and url.startswith("/"), url
            asset = http.get(url)
            assert asset.status_code == 200, url
        for url in scripts:
            asset = http.get(url)
            assert "javascript" in asset.headers["content-type"] and "SwaggerUIBundle" in asset.text, url
        for url in styles:
            asset = http.get(url)
            assert asset.headers["content-type"].startswith("text/css") and ".swagger-ui" in asset.text, url
        assert http.get("/openapi.json").json()["paths"]
        assert http.get("/redoc").status_code == 404  # ReDoc would load its script from a CDN: not served
