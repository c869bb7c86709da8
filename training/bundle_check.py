"""Checks of a model bundle as untrusted input, before anything is allocated from it: the zip's directory, each
member's decompressed size (declared and actual), the manifest's JSON and every value's type and range.

`bundle.from_bytes` calls `read_members` and then `check_manifest`; the ranges of the model settings themselves live
in `ModelConfig.__post_init__` (one place per rule), the types are read from its dataclass fields here.
"""

from __future__ import annotations

import dataclasses
import io
import json
import math
import struct
import typing
import zipfile

from knowngood.training.config import ModelConfig
from knowngood.training.errors import BadBundle

MEMBERS = ("manifest.json", "weights.safetensors")
MAX_MANIFEST_BYTES = 1024 * 1024  # the manifest is a few kB; evidence tables included, well under this
MAX_WEIGHTS_BYTES = 512 * 1024 * 1024  # the largest model (size 1024, width 64) is far below this
MAX_ENTRIES = 16  # a bundle has two members; a directory of millions of entries is refused before it is parsed
MAX_JSON_DEPTH = 32
_EOCD = b"PK\x05\x06"
_CHUNK = 1024 * 1024


def read_members(
    data: bytes,
    name: str,
    *,
    max_manifest_bytes: int | None = None,
    max_weights_bytes: int | None = None,
) -> tuple[dict, bytes]:
    """(manifest, weights bytes) of a bundle. Each member's size is checked from its directory entry before it is
    read and again while it is read (a directory may lie); raises BadBundle naming the bundle and the member.
    The caps default to MAX_MANIFEST_BYTES and MAX_WEIGHTS_BYTES."""
    _check_directory(data, name)
    caps = {
        "manifest.json": max_manifest_bytes or MAX_MANIFEST_BYTES,
        "weights.safetensors": max_weights_bytes or MAX_WEIGHTS_BYTES,
    }
    try:
        with zipfile.ZipFile(io.BytesIO(data)) as zf:
            infos = zf.infolist()
            names = [i.filename for i in infos]
            missing = [m for m in MEMBERS if m not in names]
            if missing:
                raise BadBundle(f"{name}: not a knowngood bundle (missing {', '.join(missing)})")
            twice = sorted({n for n in names if names.count(n) > 1})
            if twice:
                raise BadBundle(f"{name}: member {twice[0]} appears more than once")
            raw = {i.filename: _read_capped(zf, i, caps[i.filename], name) for i in infos if i.filename in caps}
    except BadBundle:
        raise
    except (zipfile.BadZipFile, EOFError, OSError, zipfile.LargeZipFile, NotImplementedError, ValueError) as exc:
        raise BadBundle(f"{name}: not a readable bundle, truncated or corrupt ({exc})") from None
    return _parse_manifest(raw["manifest.json"], name), raw["weights.safetensors"]


def _check_directory(data: bytes, name: str) -> None:
    """The end-of-directory record's entry count, read before `zipfile` builds an object per entry."""
    at = data.rfind(_EOCD, max(0, len(data) - 22 - 65535))
    if at < 0 or len(data) - at < 22:
        raise BadBundle(f"{name}: not a readable bundle, truncated or corrupt (no zip directory)")
    entries = struct.unpack("<H", data[at + 10 : at + 12])[0]
    if entries > MAX_ENTRIES:  # 0xFFFF (ZIP64) included: a bundle never needs it
        raise BadBundle(f"{name}: {entries} zip entries; a bundle holds {len(MEMBERS)}")


def _read_capped(zf: zipfile.ZipFile, info: zipfile.ZipInfo, cap: int, name: str) -> bytes:
    if info.file_size > cap:
        raise BadBundle(f"{name}: member {info.filename} declares {info.file_size} bytes, over the {cap}-byte limit")
    chunks, total = [], 0
    with zf.open(info) as f:
        while chunk := f.read(min(_CHUNK, cap + 1 - total)):
            total += len(chunk)
            if total > cap:  # zipfile stops at the declared size; this guards a reader that would not
                raise BadBundle(f"{name}: member {info.filename} is over the {cap}-byte limit")
            chunks.append(chunk)
    if total != info.file_size:
        raise BadBundle(f"{name}: member {info.filename} holds {total} bytes, its directory says {info.file_size}")
    return b"".join(chunks)


def _parse_manifest(raw: bytes, name: str) -> dict:
    def refuse_constant(word: str):
        raise ValueError(f"{word} is not a number JSON allows")

    def no_duplicates(pairs: list[tuple[str, typing.Any]]) -> dict:
        keys = [k for k, _ in pairs]
        twice = sorted({k for k in keys if keys.count(k) > 1})
        if twice:
            raise ValueError(f"key {twice[0]!r} appears more than once")
        return dict(pairs)

    try:
        manifest = json.loads(raw.decode("utf-8"), parse_constant=refuse_constant, object_pairs_hook=no_duplicates)
    except (ValueError, UnicodeDecodeError, RecursionError) as exc:
        raise BadBundle(f"{name}: manifest.json is not valid JSON ({str(exc)[:200]})") from None
    if not isinstance(manifest, dict):
        raise BadBundle(f"{name}: manifest.json must hold an object")
    if _depth(manifest) > MAX_JSON_DEPTH:
        raise BadBundle(f"{name}: manifest.json is nested deeper than {MAX_JSON_DEPTH} levels")
    return manifest


def _depth(value, level: int = 1) -> int:
    if level > MAX_JSON_DEPTH:
        return level
    children = value.values() if isinstance(value, dict) else value if isinstance(value, list) else ()
    return max((_depth(c, level + 1) for c in children), default=level)


def check_manifest(manifest: dict, name: str, *, fmt: str, newest: int) -> None:
    """Every manifest value the loader uses: format and version, the model settings' types (ranges are
    `ModelConfig`'s), a finite non-negative threshold and the weights table. Raises BadBundle naming the value."""
    if manifest.get("format") != fmt:
        raise BadBundle(f"{name}: not a knowngood bundle (format {str(manifest.get('format'))[:80]!r})")
    version = manifest.get("format_version")
    if not _is_int(version) or version < 1:
        raise BadBundle(f"{name}: format_version missing or not a positive integer")
    if version > newest:
        software = manifest.get("software_version")
        raise BadBundle(
            f"{name}: bundle format {version} is newer than this software reads ({newest}); upgrade knowngood "
            f"(the bundle was written by {software if isinstance(software, str) else 'an unknown version'})"
        )
    for key in ("model", "threshold", "weights"):
        if not isinstance(manifest.get(key), dict):
            raise BadBundle(f"{name}: manifest has no {key!r} section")
    check_model_settings(manifest["model"], name)
    check_threshold(manifest["threshold"].get("value"), name)
    for key in ("method", "set_by", "set_at", "reason"):  # served back as text in GET /v1/model
        value = manifest["threshold"].get(key)
        if value is not None and not isinstance(value, str):
            raise BadBundle(f"{name}: manifest threshold.{key} must be text, got {_show(value)}")
    for key, shape in manifest["weights"].items():
        if not (isinstance(shape, list) and len(shape) <= 8 and all(_is_int(d) and d >= 0 for d in shape)):
            raise BadBundle(f"{name}: manifest weights[{key[:80]!r}] is not a tensor shape")


def check_model_settings(model: dict, name: str) -> None:
    """Types by `ModelConfig`'s fields: bool is not int, int is not float unless the field is float, numbers are
    finite; unknown keys are errors."""
    hints = typing.get_type_hints(ModelConfig)
    fields = {f.name: hints[f.name] for f in dataclasses.fields(ModelConfig)}
    unknown = sorted(str(k)[:80] for k in model if k not in fields)
    if unknown:  # the words `config.from_dict` uses for the same mistake
        raise BadBundle(f"{name}: model settings are invalid (unknown ModelConfig keys: {', '.join(unknown[:5])})")
    for key, value in model.items():
        if not _has_type(value, fields[key]):
            raise BadBundle(
                f"{name}: model setting {key} must be {getattr(fields[key], '__name__', fields[key])}, "
                f"got {_show(value)}"
            )


def check_threshold(value, name: str) -> None:
    if not _is_number(value) or value < 0:
        raise BadBundle(f"{name}: the threshold must be a finite, non-negative number, got {_show(value)}")


def _has_type(value, kind) -> bool:
    if kind is bool:
        return isinstance(value, bool)
    if kind is int:
        return _is_int(value)
    if kind is float:
        return _is_number(value)
    if kind is str:
        return isinstance(value, str)
    return False  # a field type the manifest cannot carry yet: refuse rather than guess


def _is_int(value) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and -(2**63) <= value < 2**63


def _is_number(value) -> bool:
    return _is_int(value) or (isinstance(value, float) and math.isfinite(value))


def _show(value) -> str:
    return f"{type(value).__name__} {str(value)[:40]!r}"
