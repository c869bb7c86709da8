"""Load for the service benchmarks (`bench_service`, `bench_instances`): the real server (`knowngood serve` in a
subprocess on loopback), PNG parts to post, client threads that post them for a fixed time or count, a model swap,
and the answers summarised by status and latency."""

from __future__ import annotations

import io
import json
import subprocess
import threading
import time
import zipfile
from collections import Counter
from pathlib import Path

import httpx
import numpy as np
from PIL import Image

from tests.service import service_testkit as kit
from tests.service.service_testkit import ADMIN, STATION

SWAP = {"operator": "bench", "reason": "model swap under load"}  # a swap says who and why


def status_kib(pid: int, field: str) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    raise KeyError(field)


def channels(bundle_path: Path) -> int:
    with zipfile.ZipFile(bundle_path) as zf:
        return int(json.loads(zf.read("manifest.json"))["model"]["channels"])


def images(n: int, size: int, channels: int, seed: int = 0) -> list[bytes]:
    """Smooth random parts with noise, as PNG: realistic decode cost, not a constant image."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:size, 0:size] / size
    out = []
    for _ in range(n):
        cx, cy = rng.uniform(0.4, 0.6, 2)
        img = 0.2 + 0.6 * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / 0.05) + rng.normal(0, 0.02, (size, size))
        arr = (np.clip(img, 0, 1) * 255).astype(np.uint8)
        if channels == 3:
            arr = np.stack([arr, arr // 2 + 60, 255 - arr], axis=-1)
        buf = io.BytesIO()
        Image.fromarray(arr).save(buf, format="PNG")
        out.append(buf.getvalue())
    return out


def start(
    bundle_path: Path, folder: Path, threads: int, *, db: str | None = None, env_extra: dict | None = None
) -> tuple[subprocess.Popen, str, float]:
    """`knowngood serve` as the service tests start it (`service_testkit.start_server`), with `threads` scoring
    threads: its process, its URL and the seconds until it was ready."""
    env = {"KNOWNGOOD_TORCH_THREADS": str(threads), "KNOWNGOOD_LOG_LEVEL": "warning", **(env_extra or {})}
    server = kit.start_server(Path(bundle_path).resolve(), folder, extra_env=env, db=db)
    return server.proc, server.url, server.startup_s


def client(
    url: str,
    images: list[bytes],
    deadline: float,
    offset: int,
    out: list,
    lock: threading.Lock,
    *,
    count: int | None = None,
    token: str = STATION,
) -> None:
    """Posts images one after another until `deadline` (or `count` requests); (start, ms, status) per request."""
    mine = []
    with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {token}"}, timeout=60) as http:
        i = offset
        while time.perf_counter() < deadline and (count is None or i - offset < count):
            t0 = time.perf_counter()
            try:
                r = http.post("/v1/inspections", files={"image": ("part.png", images[i % len(images)])})
                status = r.status_code
            except httpx.HTTPError as exc:
                status = type(exc).__name__
            mine.append((t0, (time.perf_counter() - t0) * 1000, status))
            i += 1
    with lock:
        out.extend(mine)


def swap(url: str, data: bytes, at: float, result: dict) -> None:
    time.sleep(max(0.0, at - time.perf_counter()))
    t0 = time.perf_counter()
    with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {ADMIN}"}, timeout=120) as http:
        r = http.put("/v1/model", files={"bundle": ("model.kgm", data)}, data=SWAP)
    result.update(status=r.status_code, ms=round((time.perf_counter() - t0) * 1000, 1))


def drive(
    url: str, images: list[bytes], clients: int, *, seconds: float = 600, count: int | None = None, token: str = STATION
) -> tuple[list, float]:
    """`clients` threads posting `images` for `seconds` (or `count` requests each): the samples and the wall time."""
    samples, lock = [], threading.Lock()
    start = time.perf_counter()
    workers = [
        threading.Thread(
            target=client,
            args=(url, images, start + seconds, k, samples, lock),
            kwargs={"count": count, "token": token},
        )
        for k in range(clients)
    ]
    for w in workers:
        w.start()
    for w in workers:
        w.join()
    return samples, time.perf_counter() - start


def statuses(samples: list) -> dict[str, int]:
    """Answers counted by status code (or by the exception's name where no answer came)."""
    counts = Counter(str(status) for _, _, status in samples)
    return dict(sorted(counts.items()))


def latency(samples: list, status=200) -> dict:
    ms = np.array([m for _, m, st in samples if st == status])
    return {
        "latency_p50_ms": round(float(np.percentile(ms, 50)), 2) if len(ms) else None,
        "latency_p99_ms": round(float(np.percentile(ms, 99)), 2) if len(ms) else None,
    }
