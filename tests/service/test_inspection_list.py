"""GET /v1/inspections through the real server (`knowngood serve` in a subprocess): every filter, paging and the
total. One server and one set of inspections for the module; the tests only read."""

from __future__ import annotations

from dataclasses import dataclass

import httpx
import pytest
from service_testkit import ADMIN_AUTH, STATION_AUTH, png_bytes, start_server

# (station, part_id) per inspection, oldest first; the threshold is raised before the first three (they pass) and
# set to 0 before the last three (they are flagged: an anomaly score is never below 0, and these are above it)
PARTS = [("line-1", "A"), ("line-2", "B"), ("line-1", "B"), ("line-1", "A"), ("line-2", "C"), (None, None)]


@dataclass
class Listed:
    http: httpx.Client
    ids: list[str]  # oldest first
    times: list[str]

    def get(self, **params) -> httpx.Response:
        return self.http.get("/v1/inspections", params=params)

    def ids_of(self, **params) -> list[str]:
        r = self.get(**params)
        assert r.status_code == 200, r.text
        body = r.json()
        assert body["count"] == len(body["items"])
        return [i["id"] for i in body["items"]]

    def newest_first(self, *positions: int) -> list[str]:
        return [self.ids[k] for k in sorted(positions, reverse=True)]


@pytest.fixture(scope="module")
def listed(tiny_bundle, tiny_good_images, tmp_path_factory):
    server = start_server(tiny_bundle, tmp_path_factory.mktemp("list"))
    try:
        with httpx.Client(base_url=server.url, headers=STATION_AUTH, timeout=60) as http:
            ids, times = [], []
            for k, (station, part_id) in enumerate(PARTS):
                if k in (0, 3):
                    change = {"threshold": 1e6 if k == 0 else 0.0, "operator": "qa", "reason": "list test"}
                    assert http.put("/v1/model/threshold", json=change, headers=ADMIN_AUTH).status_code == 200
                form = {n: v for n, v in (("station", station), ("part_id", part_id)) if v is not None}
                r = http.post("/v1/inspections", files={"image": ("p.png", png_bytes(tiny_good_images[k]))}, data=form)
                assert r.status_code == 200, r.text
                assert r.json()["verdict"] == ("pass" if k < 3 else "flag")
                ids.append(r.json()["id"])
                times.append(r.json()["time"])
            for k, label in ((1, "good"), (3, "defective"), (3, "good")):
                review = {"label": label, "operator": "Kim"}
                assert http.post(f"/v1/inspections/{ids[k]}/review", json=review).status_code == 200
            yield Listed(http, ids, times)
    finally:
        server.stop()


def test_everything_newest_first_with_total(listed):
    body = listed.get().json()
    assert [i["id"] for i in body["items"]] == listed.ids[::-1]
    assert (body["count"], body["total"], body["limit"], body["offset"]) == (6, 6, 100, 0)  # limit: 100 by default


def test_filter_by_station(listed):
    assert listed.ids_of(station="line-1") == listed.newest_first(0, 2, 3)
    assert listed.ids_of(station="line-2") == listed.newest_first(1, 4)
    assert listed.ids_of(station="line") == []  # exact match, not a prefix
    assert listed.get(station="line-1").json()["total"] == 3


def test_filter_by_part_id(listed):
    assert listed.ids_of(part_id="B") == listed.newest_first(1, 2)
    assert listed.ids_of(part_id="A", station="line-1") == listed.newest_first(0, 3)
    assert listed.ids_of(part_id="Z") == [] and listed.get(part_id="Z").json()["total"] == 0


def test_filter_by_verdict(listed):
    assert listed.ids_of(verdict="flag") == listed.newest_first(3, 4, 5)
    assert listed.ids_of(verdict="pass") == listed.newest_first(0, 1, 2)
    r = listed.get(verdict="maybe")
    assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json"


def test_filter_by_reviewed(listed):
    assert listed.ids_of(reviewed="true") == listed.newest_first(1, 3)
    assert listed.ids_of(reviewed="false") == listed.newest_first(0, 2, 4, 5)
    assert listed.ids_of(verdict="flag", reviewed="false") == listed.newest_first(4, 5)  # the review queue
    [twice] = [i for i in listed.get(reviewed="true").json()["items"] if i["id"] == listed.ids[3]]
    assert (twice["review"]["label"], twice["review_count"]) == ("good", 2)  # the latest review is the label


def test_filter_by_since_and_until(listed):
    t = listed.times
    assert listed.ids_of(since=t[2]) == listed.newest_first(2, 3, 4, 5)  # since is inclusive
    assert listed.ids_of(until=t[4]) == listed.newest_first(0, 1, 2, 3)  # until is exclusive
    assert listed.ids_of(since=t[2], until=t[4]) == listed.newest_first(2, 3)
    assert listed.get(since=t[2], until=t[4]).json()["total"] == 2
    r = listed.get(since=t[4], until=t[2])
    assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json"
    assert r.json()["errors"][0]["field"] == "until"


def test_paging_and_total(listed):
    pages = [listed.get(limit=2, offset=offset).json() for offset in (0, 2, 4, 6)]
    assert [[i["id"] for i in p["items"]] for p in pages] == [
        listed.newest_first(4, 5),
        listed.newest_first(2, 3),
        listed.newest_first(0, 1),
        [],
    ]
    assert [p["total"] for p in pages] == [6, 6, 6, 6] and [p["count"] for p in pages] == [2, 2, 2, 0]
    station = listed.get(station="line-1", limit=1, offset=1).json()
    assert [i["id"] for i in station["items"]] == [listed.ids[2]] and station["total"] == 3
    assert listed.get(limit=1000).status_code == 200
    for bad in ({"limit": 0}, {"limit": 1001}, {"offset": -1}, {"limit": "many"}):
        r = listed.get(**bad)
        assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json", bad
        assert r.json()["errors"][0]["field"] == next(iter(bad))
