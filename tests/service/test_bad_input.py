"""Bad input gets the right 4xx with a useful problem detail, the service keeps serving, and the audit store holds
exactly one row per accepted inspection and none for refused ones."""

from __future__ import annotations

import io
import json
import struct
import zipfile
import zlib

import numpy as np
import pytest
import tifffile
from PIL import Image
from service_testkit import ADMIN_AUTH, CHANGE, STATION_AUTH, post_image, row_count


def _save(img: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, format=fmt, **kw)
    return buf.getvalue()


def _noise(size: int = 64, mode: str = "L") -> Image.Image:
    rng = np.random.default_rng(1)
    shape = (size, size) if mode == "L" else (size, size, 3)
    return Image.fromarray(rng.integers(0, 256, shape, dtype=np.uint8), mode=mode)


def png_claiming(width: int, height: int) -> bytes:
    """A PNG whose IHDR (with a valid CRC) claims width x height pixels, backed by a few bytes of data."""

    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)

    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)  # 8-bit gray, no interlace
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\0" * 64)) + chunk(b"IEND", b"")


def tiff16(channels: int) -> bytes:
    rng = np.random.default_rng(2)
    shape = (48, 48) if channels == 1 else (48, 48, channels)
    buf = io.BytesIO()
    tifffile.imwrite(
        buf, rng.integers(0, 65536, shape, dtype=np.uint16), photometric="minisblack" if channels == 1 else "rgb"
    )
    return buf.getvalue()


def animated_gif() -> bytes:
    frames = [Image.new("L", (40, 40), c) for c in (0, 255)]
    return _save(frames[0], "GIF", save_all=True, append_images=frames[1:], duration=100, loop=0)


def truncated_jpeg() -> bytes:
    data = _save(_noise(96), "JPEG", quality=90)
    return data[: len(data) // 2]


def test_crafted_png_header_really_claims_the_size():
    img = Image.open(io.BytesIO(png_claiming(123, 45)))  # below PIL's own bomb limit: it parses our IHDR
    assert img.size == (123, 45)


REFUSED = [
    ("empty file", b"", 422, "empty file"),
    ("text", b"hello, this is not an image\n" * 10, 422, "not a readable image"),
    ("truncated JPEG", truncated_jpeg(), 422, "not a readable image"),
    ("100000 x 100000 PNG", png_claiming(100_000, 100_000), 413, "pixels"),
    ("animated GIF", animated_gif(), 422, "animated"),
    ("8 x 8 PNG", _save(Image.new("L", (8, 8), 128), "PNG"), 422, "too small"),
    ("PDF", b"%PDF-1.4\n%\xe2\xe3\xcf\xd3\n1 0 obj\n<<>>\nendobj\n", 422, "not a readable image"),
]
ACCEPTED = [
    ("16-bit gray TIFF", tiff16(1)),
    ("16-bit RGB TIFF", tiff16(3)),
    ("CMYK JPEG", _save(Image.new("CMYK", (48, 48), (10, 60, 120, 30)), "JPEG")),
    ("RGBA PNG", _save(Image.new("RGBA", (48, 48), (200, 10, 10, 128)), "PNG")),
    ("palette BMP", _save(_noise(48).convert("P"), "BMP")),
]


@pytest.mark.parametrize("label, data, status, words", REFUSED, ids=[r[0] for r in REFUSED])
def test_refused_image(client, good_png, label, data, status, words):
    r = post_image(client, data, name="upload.bin")
    assert r.status_code == status, r.text
    assert r.headers["content-type"] == "application/problem+json"
    problem = r.json()
    assert problem["status"] == status and problem["title"] and problem["type"]
    assert words in problem["detail"] and "upload.bin" in problem["detail"]
    assert row_count(client) == 0
    assert post_image(client, good_png).status_code == 200  # still serving
    assert row_count(client) == 1


@pytest.mark.parametrize("label, data", ACCEPTED, ids=[a[0] for a in ACCEPTED])
def test_accepted_image(client, label, data):
    r = post_image(client, data)
    assert r.status_code == 200, r.text
    assert r.json()["image"]["width"] == 48
    assert row_count(client) == 1


def test_one_row_per_accepted_inspection(client, good_png):
    statuses = [post_image(client, data).status_code for _, data, _, _ in REFUSED]
    statuses += [post_image(client, data).status_code for _, data in ACCEPTED]
    statuses.append(post_image(client, good_png).status_code)
    assert statuses.count(200) == len(ACCEPTED) + 1
    assert row_count(client) == statuses.count(200)
    listed = client.get("/v1/inspections?limit=1000", headers=STATION_AUTH).json()
    assert listed["count"] == statuses.count(200)


def test_wrong_field_name_and_empty_body(client, good_png):
    r = client.post("/v1/inspections", files={"file": ("a.png", good_png)}, headers=STATION_AUTH)
    assert r.status_code == 422
    assert r.json()["detail"] == "image: Field required"
    assert r.json()["errors"] == [{"field": "image", "message": "Field required"}]
    r = client.post("/v1/inspections", headers=STATION_AUTH)
    assert r.status_code == 422 and "image" in r.json()["detail"]
    r = client.post("/v1/inspections", content=b"\x00" * 100, headers={**STATION_AUTH, "Content-Type": "image/png"})
    assert r.status_code == 422 and "image" in r.json()["detail"]
    assert row_count(client) == 0


def test_bad_or_missing_token(client, good_png):
    r = post_image(client, good_png, auth={"Authorization": "Bearer not-a-known-token"})
    assert r.status_code == 401 and "not recognised" in r.json()["detail"]
    r = post_image(client, good_png, auth={})
    assert r.status_code == 401 and "bearer token" in r.json()["detail"]
    assert r.headers["www-authenticate"] == "Bearer"
    assert row_count(client) == 0


def test_upload_over_the_limit_is_413(make_client, good_png):
    client = make_client(max_upload_bytes=4096)
    r = post_image(client, b"\xff\xd8" + b"\0" * 10_000)
    assert r.status_code == 413
    assert r.json()["title"] == "Upload too large" and "limit here is 4096 bytes" in r.json()["detail"]

    def chunks():  # no Content-Length: the limit is enforced while the body streams in
        yield b'--x\r\nContent-Disposition: form-data; name="image"; filename="a.png"\r\n\r\n'
        for _ in range(10):
            yield b"\0" * 1000

    r = client.post(
        "/v1/inspections", content=chunks(), headers={**STATION_AUTH, "Content-Type": "multipart/form-data; boundary=x"}
    )
    assert r.status_code == 413 and "4096" in r.json()["detail"] and r.json()["title"] == "Upload too large"
    assert row_count(client) == 0
    assert post_image(client, good_png).status_code == 200


def test_pixel_limit_is_a_setting(make_client):
    client = make_client(max_pixels=40 * 40)
    r = post_image(client, _save(_noise(48), "PNG"))
    assert r.status_code == 413 and "1600" in r.json()["detail"]


def _rezip(data: bytes, edit) -> bytes:
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        manifest = json.loads(zf.read("manifest.json"))
        weights = zf.read("weights.safetensors")
    edit(manifest)
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as zf:
        zf.writestr("manifest.json", json.dumps(manifest))
        zf.writestr("weights.safetensors", weights)
    return out.getvalue()


@pytest.mark.parametrize(
    "label, make, words",
    [
        ("truncated", lambda d: d[: len(d) // 2], "truncated or corrupt"),
        ("newer format", lambda d: _rezip(d, lambda m: m.update(format_version=99)), "newer"),
        ("not a zip", lambda d: b"PK\x03\x04 garbage", "not a readable bundle"),
        ("wrong shapes", lambda d: _rezip(d, lambda m: m["model"].update(width=16)), "shape"),
    ],
)
def test_bad_bundle_upload_is_422_and_changes_nothing(client, tiny_bundle, good_png, label, make, words):
    before = client.get("/v1/model", headers=STATION_AUTH).json()
    bundle = {"bundle": ("m.kgm", make(tiny_bundle.read_bytes()))}
    r = client.put("/v1/model", files=bundle, data=CHANGE, headers=ADMIN_AUTH)
    assert r.status_code == 422, r.text
    assert r.headers["content-type"] == "application/problem+json"
    assert words in r.json()["detail"]
    after = client.get("/v1/model", headers=STATION_AUTH).json()
    assert after["sha256"] == before["sha256"] and after["previous"] is None
    assert post_image(client, good_png).status_code == 200
