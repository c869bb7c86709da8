"""Bundles are untrusted input: every zip member is read under a cap on its decompressed size, the manifest is
validated completely before anything is allocated or swapped, the model id comes from the content, and a swap is
all-or-nothing."""

from __future__ import annotations

import hashlib
import io
import json
import struct
import zipfile

import pytest
from knowngood.training import bundle, bundle_check
from knowngood.training.errors import BadBundle
from service_testkit import ADMIN_AUTH, CHANGE, STATION_AUTH, post_image, row_count


def _members(data: bytes) -> tuple[dict, bytes]:
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        return json.loads(zf.read("manifest.json")), zf.read("weights.safetensors")


def _zip(manifest_text: str | bytes, weights: bytes, extra: dict[str, bytes] | None = None) -> bytes:
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("manifest.json", manifest_text)
        zf.writestr("weights.safetensors", weights)
        for name, data in (extra or {}).items():
            zf.writestr(name, data)
    return out.getvalue()


def _edited(data: bytes, edit) -> bytes:
    manifest, weights = _members(data)
    edit(manifest)
    return _zip(json.dumps(manifest), weights)


def _declaring(data: bytes, member: str, size: int) -> bytes:
    """The same zip with `member`'s uncompressed size claimed as `size` in its local and central headers."""
    buf = bytearray(data)
    with zipfile.ZipFile(io.BytesIO(data)) as zf:
        struct.pack_into("<I", buf, zf.getinfo(member).header_offset + 22, size)  # local file header
    at = buf.find(b"PK\x01\x02")
    while at >= 0:  # central directory entries
        name_len = struct.unpack_from("<H", buf, at + 28)[0]
        if bytes(buf[at + 46 : at + 46 + name_len]) == member.encode():
            struct.pack_into("<I", buf, at + 24, size)
        at = buf.find(b"PK\x01\x02", at + 46)
    return bytes(buf)


def _model(client) -> dict:
    return client.get("/v1/model", headers=STATION_AUTH).json()


def _put(client, data: bytes):
    return client.put("/v1/model", files={"bundle": ("m.kgm", data)}, data=CHANGE, headers=ADMIN_AUTH)


def _set(section: str, key: str, value):
    return lambda m: m[section].update({key: value})


MANIFEST_CASES = [
    ("width 16.5", _set("model", "width", 16.5), "width must be int"),
    ("width true", _set("model", "width", True), "width must be int"),
    ("size 65536", _set("model", "size", 65536), "size must be a multiple of 16 from 32 to 1024"),
    ("width 4096", _set("model", "width", 4096), "width must be 1 to 64"),
    ("z_channels 10**6", _set("model", "z_channels", 10**6), "z_channels must be 1 to 64"),
    ("smooth_sigma 1e12", _set("model", "smooth_sigma", 1e12), "smooth_sigma must be in (0, 32]"),
    ("kappa as text", _set("model", "kappa", "1"), "kappa must be float"),
    ("kappa 1e400", _set("model", "kappa", 1e400), "kappa must be float"),
    ("channels 2**70", _set("model", "channels", 2**70), "channels must be int"),
    ("threshold inf", _set("threshold", "value", float("inf")), "finite, non-negative"),
    ("threshold -5", _set("threshold", "value", -5), "finite, non-negative"),
    ("threshold text", _set("threshold", "value", "3"), "finite, non-negative"),
    ("threshold false", _set("threshold", "value", False), "finite, non-negative"),
    ("threshold method 5", _set("threshold", "method", 5), "threshold.method must be text"),
    ("format_version true", lambda m: m.update(format_version=True), "format_version"),
    ("weights shape text", lambda m: m["weights"].update(x="big"), "not a tensor shape"),
]


@pytest.mark.parametrize("label, edit, words", MANIFEST_CASES, ids=[c[0] for c in MANIFEST_CASES])
def test_manifest_values_are_checked_before_anything_is_built(tiny_bundle, label, edit, words):
    manifest, weights = _members(tiny_bundle.read_bytes())
    edit(manifest)
    text = json.dumps(manifest).replace("Infinity", "1e400")  # inf as the number a JSON writer could send
    with pytest.raises(BadBundle, match=words.replace("(", r"\(").replace(")", r"\)").replace("]", r"\]")):
        bundle.from_bytes(_zip(text, weights), name="m.kgm")


@pytest.mark.parametrize(
    "text, words",
    [
        ('{"threshold": {"value": NaN}}', "not valid JSON"),
        ('{"a": 1, "a": 2}', "appears more than once"),
        ('{"a": ' * 100 + "1" + "}" * 100, "nested deeper"),
    ],
)
def test_manifest_json_is_strict(tiny_bundle, text, words):
    _, weights = _members(tiny_bundle.read_bytes())
    with pytest.raises(BadBundle, match=words):
        bundle.from_bytes(_zip(text, weights), name="m.kgm")


def test_member_sizes_are_capped_before_and_while_reading(tiny_bundle):
    manifest, weights = _members(tiny_bundle.read_bytes())
    claims_a_gib = _declaring(_zip(json.dumps(manifest), weights), "weights.safetensors", 2**30)
    with pytest.raises(BadBundle, match="declares 1073741824 bytes, over the 536870912-byte limit"):
        bundle.from_bytes(claims_a_gib, name="m.kgm")
    lies_small = _declaring(_zip(json.dumps(manifest), weights), "weights.safetensors", 1000)
    with pytest.raises(BadBundle, match="m.kgm"):
        bundle.from_bytes(lies_small, name="m.kgm")
    zeros = _zip(json.dumps(manifest), b"\0" * (3 * 1024 * 1024))  # 3 MiB of zeros, a few kB on the wire
    assert len(zeros) < 20_000
    with pytest.raises(BadBundle, match="over the 1048576-byte limit"):
        bundle_check.read_members(zeros, "m.kgm", max_weights_bytes=1024 * 1024)
    with pytest.raises(BadBundle, match="manifest.json declares"):
        bundle.from_bytes(_zip(" " * (2 * 1024 * 1024), weights), name="m.kgm")
    many = _zip(json.dumps(manifest), weights, extra={f"x{i}": b"" for i in range(40)})
    with pytest.raises(BadBundle, match="42 zip entries"):
        bundle.from_bytes(many, name="m.kgm")


def test_model_id_is_derived_from_the_content(client, tiny_bundle, second_bundle, good_png):
    first = _model(client)
    _, weights = _members(second_bundle.read_bytes())
    own_id = hashlib.sha256(weights).hexdigest()[:16]
    for claim in (first["id"], 12345, None):  # another model's id, an id of the wrong type, none
        r = _put(client, _edited(second_bundle.read_bytes(), lambda m, c=claim: m.update(model_id=c)))
        assert r.status_code == 200, r.text
        assert r.json()["id"] == own_id and r.json()["manifest"]["model_id"] == own_id
        body = post_image(client, good_png).json()
        assert body["model"]["id"] == own_id
    assert {r.model_id for r in client.app.state.service.store.list_inspections()} == {own_id}


@pytest.mark.parametrize("label, edit", [(c[0], c[1]) for c in MANIFEST_CASES[:4] + MANIFEST_CASES[9:14]])
def test_a_refused_bundle_changes_nothing(client, tiny_bundle, good_png, label, edit):
    before = _model(client)
    r = _put(client, _edited(tiny_bundle.read_bytes(), edit))
    assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json", r.text
    after = _model(client)
    assert (after["sha256"], after["threshold"], after["previous"]) == (before["sha256"], before["threshold"], None)
    assert post_image(client, good_png).status_code == 200 and row_count(client) == 1


def test_a_swap_is_all_or_nothing(client, second_bundle, monkeypatch):
    """If the audit store refuses the event, or the response cannot be built, the old model keeps serving."""
    before = _model(client)
    store = client.app.state.service.store

    def refuse(**kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(store, "add_model_event", refuse)
    assert _put(client, second_bundle.read_bytes()).status_code == 500
    monkeypatch.undo()
    assert _model(client)["sha256"] == before["sha256"] and _model(client)["previous"] is None

    from knowngood.service.routes import model as model_routes

    def unbuildable(*args):
        raise ValueError("cannot build the response")

    monkeypatch.setattr(model_routes, "model_out", unbuildable)
    assert _put(client, second_bundle.read_bytes()).status_code == 500
    monkeypatch.undo()
    assert _model(client)["sha256"] == before["sha256"]
    assert [e.kind for e in store.model_events()] == ["load"]  # no event for a swap that did not happen
    assert _put(client, second_bundle.read_bytes()).status_code == 200
