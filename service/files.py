"""Files kept beside the audit store, under the data folder: per inspection a heatmap record (and, when asked, the
uploaded image), plus uploaded bundles. Every file name comes from an id or hash the service generated; nothing a
request sends reaches a path.

The heatmap record holds the map at the model's working resolution (float16) and the model's view of the image
(uint8), about 50 kB at 128 px. The overlay PNG is drawn from it on request, so no PNG is encoded while scoring.
"""

from __future__ import annotations

import os
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


class FileStore:
    def __init__(self, root: Path, *, keep_images: bool):
        self.root = Path(root)
        self.keep_images = keep_images
        for sub in ("heatmaps", "images", "models"):
            (self.root / sub).mkdir(parents=True, exist_ok=True)

    def _path(self, kind: str, inspection_id: str) -> Path:
        if not _ID.match(inspection_id):  # ids are generated here; anything else is a bug, not a user error
            raise ValueError(f"not a generated inspection id: {inspection_id!r}")
        suffix = {"heatmaps": ".npz", "images": ".img"}[kind]
        return self.root / kind / f"{inspection_id}{suffix}"

    def put_heatmap(self, inspection_id: str, record: HeatmapRecord) -> None:
        view = np.clip(record.view * 255 + 0.5, 0, 255).astype(np.uint8)
        _atomic_write(
            self._path("heatmaps", inspection_id),
            lambda f: np.savez(
                f, heat=record.heat.astype(np.float16), view=view, size=np.array([record.height, record.width])
            ),
        )

    def get_heatmap(self, inspection_id: str) -> HeatmapRecord | None:
        try:
            with np.load(self._path("heatmaps", inspection_id), allow_pickle=False) as z:
                h, w = (int(v) for v in z["size"])
                return HeatmapRecord(
                    heat=z["heat"].astype(np.float32), view=z["view"].astype(np.float32) / 255, height=h, width=w
                )
        except FileNotFoundError:
            return None

    def put_image(self, inspection_id: str, data: bytes) -> None:
        if self.keep_images:
            _atomic_write(self._path("images", inspection_id), lambda f: f.write(data))

    def get_image(self, inspection_id: str) -> bytes | None:
        try:
            return self._path("images", inspection_id).read_bytes()
        except FileNotFoundError:
            return None

    def delete(self, inspection_id: str) -> None:
        for kind in ("heatmaps", "images"):
            self._path(kind, inspection_id).unlink(missing_ok=True)

    def put_bundle(self, sha256: str, data: bytes) -> Path:
        """Keeps an uploaded bundle as models/<sha256>.kgm, so it can be served again after a restart."""
        path = self._bundle_path(sha256)
        if path.exists():
            os.utime(path)  # an upload again is recent use: retention keeps the newest
        else:
            _atomic_write(path, lambda f: f.write(data), durable=True)
        return path

    def get_bundle(self, sha256: str) -> bytes | None:
        try:
            return self._bundle_path(sha256).read_bytes()
        except FileNotFoundError:
            return None

    def prune_bundles(self, *, keep: int, protect: set[str]) -> list[str]:
        """Deletes kept bundles beyond the `keep` most recently stored, never one in `protect` (current, previous,
        the command-line bundle); returns the sha256 of those deleted."""
        paths = sorted(
            (p for p in (self.root / "models").glob("*.kgm") if _SHA.match(p.stem)),
            key=lambda p: p.stat().st_mtime_ns,
            reverse=True,
        )
        doomed = [p for p in paths if p.stem not in protect][keep:]
        for p in doomed:
            p.unlink(missing_ok=True)
        return [p.stem for p in doomed]

    def _bundle_path(self, sha256: str) -> Path:
        if not _SHA.match(sha256):
            raise ValueError(f"not a sha256: {sha256!r}")
        return self.root / "models" / f"{sha256}.kgm"


def _atomic_write(path: Path, write, *, durable: bool = False) -> None:
    """Temp file + rename: a crash leaves no half-written file. `durable` also fsyncs (bundles); heatmaps skip it
    because a lost heatmap costs a picture, not an audit row, and fsync would double the time to store one."""
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")
    with open(tmp, "wb") as f:
        write(f)
        if durable:
            f.flush()
            os.fsync(f.fileno())
    os.replace(tmp, path)
