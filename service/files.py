"""Heatmaps, kept images and bundles. They live in the audit store (`store.py`: every instance reads what any
wrote); this module packs a heatmap record into bytes and back, and still reads what earlier versions kept in
the data folder (heatmaps/<id>.npz, images/<id>.img, models/<sha256>.kgm), so an upgrade loses no picture.

The heatmap record holds the map at the model's working resolution (float16) and the model's view of the image
(uint8), about 50 kB at 128 px. The overlay PNG is drawn from it on request, so no PNG is encoded while scoring.
"""

from __future__ import annotations

import io
import re
import uuid
from dataclasses import dataclass
from pathlib import Path

import numpy as np

_ID = re.compile(r"^[0-9a-f]{32}$")
_SHA = re.compile(r"^[0-9a-f]{64}$")


def new_id() -> str:
    return uuid.uuid4().hex


@dataclass(frozen=True)
class HeatmapRecord:
    heat: np.ndarray  # (S, S) float32, working resolution, the anomaly score's unit
    view: np.ndarray  # (C, S, S) float32 in [0, 1]: the image as the model saw it
    height: int  # the input image's own size, which the overlay is drawn at
    width: int


def heatmap_bytes(record: HeatmapRecord) -> bytes:
    view = np.clip(record.view * 255 + 0.5, 0, 255).astype(np.uint8)
    buf = io.BytesIO()
    np.savez(buf, heat=record.heat.astype(np.float16), view=view, size=np.array([record.height, record.width]))
    return buf.getvalue()


def heatmap_from_bytes(data: bytes) -> HeatmapRecord:
    with np.load(io.BytesIO(data), allow_pickle=False) as z:
        h, w = (int(v) for v in z["size"])
        return HeatmapRecord(
            heat=z["heat"].astype(np.float32), view=z["view"].astype(np.float32) / 255, height=h, width=w
        )


class FileStore:
    """Files through the store, with the data folder of older versions as a read-only fallback."""

    def __init__(self, store, legacy_root: Path | None = None):
        self.store = store
        self.legacy = Path(legacy_root) if legacy_root is not None else None

    def _legacy(self, kind: str, name: str) -> bytes | None:
        if self.legacy is None:
            return None
        try:
            return (self.legacy / kind / name).read_bytes()
        except (FileNotFoundError, NotADirectoryError):
            return None

    def get_heatmap(self, inspection_id: str) -> HeatmapRecord | None:
        if not _ID.match(inspection_id):  # ids are generated here; anything else is a bug, not a user error
            raise ValueError(f"not a generated inspection id: {inspection_id!r}")
        data = self.store.file(inspection_id=inspection_id, kind="heatmap")
        data = data if data is not None else self._legacy("heatmaps", f"{inspection_id}.npz")
        return heatmap_from_bytes(data) if data is not None else None

    def get_image(self, inspection_id: str) -> bytes | None:
        data = self.store.file(inspection_id=inspection_id, kind="image")
        return data if data is not None else self._legacy("images", f"{inspection_id}.img")

    def put_bundle(self, sha256: str, data: bytes) -> None:
        """Keeps a bundle so any instance can serve it, now or after a restart."""
        if not _SHA.match(sha256):
            raise ValueError(f"not a sha256: {sha256!r}")
        self.store.put_bundle(sha256=sha256, data=data)

    def get_bundle(self, sha256: str) -> bytes | None:
        data = self.store.get_bundle(sha256=sha256)
        if data is None and (data := self._legacy("models", f"{sha256}.kgm")) is not None:
            self.store.put_bundle(sha256=sha256, data=data)  # moved in: other instances can serve it too
        return data

    def prune_bundles(self, *, keep: int, protect: set[str]) -> list[str]:
        """Deletes kept bundles beyond the `keep` most recently stored, never one in `protect` (what any part type
        serves, may roll back to, or was given on a command line); returns the sha256 of those deleted."""
        return self.store.prune_bundles(keep=keep, protect=protect)
