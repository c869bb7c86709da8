"""Service benchmark: the real server (`knowngood serve` in a subprocess on loopback) driven by concurrent clients
(threads with httpx, one image per request) for a fixed time, with one model swap half way through.

`run(bundle_path, seconds=30, clients=8, image_size=...)` returns throughput (req/s), p50/p99 latency (ms), errors,
the swap's duration and status, and the server's RSS at rest (after start and warm-up, before load) and its peak
(VmHWM from /proc/<pid>/status); then, on the same server with its default limits, `burst_clients` (32) clients for
`burst_seconds`: the answers counted by status and the share of 503s (`clients_32`).
`heavy_image_peak_rss(bundle_path)` is tests/service/test_memory.py's measurement (its server, limits and heaviest
image, imported from there): the peak RSS while 4 clients post the heaviest image the limits allow, against the
bound DEVELOPERS.md states. `python -m tests.bench.bench_service MODEL [--seconds S] [--heavy]` prints the JSON.
"""

from __future__ import annotations

import argparse
import io
import json
import subprocess
import sys
import tempfile
import threading
import time
import zipfile
from pathlib import Path

import httpx
import numpy as np
from PIL import Image

from tests.bench import service_load as load
from tests.bench.service_load import STATION


def _default_limits() -> dict:
    from knowngood.service.settings import Settings

    return {k: Settings.model_fields[k].default for k in ("max_decodes", "max_queue", "max_pixels")}


def burst(url: str, images: list[bytes], *, clients: int = 32, seconds: float = 10) -> dict:
    """`clients` concurrent clients for `seconds`: requests, answers by status, the share of 503s (busy, the decode
    slots and the queue full) and the p50/p99 latency of the 200 answers and of the 503 answers."""
    samples, wall = load.drive(url, images, clients, seconds=seconds)
    n = len(samples)
    busy = sum(status == 503 for _, _, status in samples)
    lat_503 = load.latency(samples, 503)
    return {
        "clients": clients,
        "seconds": round(wall, 2),
        "requests": n,
        "statuses": load.statuses(samples),
        "rate_503": round(busy / n, 4) if n else None,
        "throughput_200_rps": round(sum(status == 200 for _, _, status in samples) / wall, 2),
        **load.latency(samples, 200),
        "latency_503_p50_ms": lat_503["latency_p50_ms"],
        "latency_503_p99_ms": lat_503["latency_p99_ms"],
    }


def run(
    bundle_path,
    *,
    seconds: float = 30,
    clients: int = 8,
    image_size: int | None = None,
    threads: int = 2,
    burst_clients: int = 32,
    burst_seconds: float = 10,
) -> dict:
    """Starts the server, warms it up, drives it with `clients` threads for `seconds`, swaps the model (the same
    bundle uploaded again, so it is validated and exported afresh) half way through, then (`burst_clients` > 0)
    drives it with `burst_clients` threads for `burst_seconds`, and stops it."""
    bundle_path = Path(bundle_path)
    with zipfile.ZipFile(bundle_path) as zf:
        size = image_size or int(json.loads(zf.read("manifest.json"))["model"]["size"])
    images = load.images(16, size, load.channels(bundle_path))
    with tempfile.TemporaryDirectory(prefix="kg-bench-service-") as tmp:
        proc, url, startup = load.start(bundle_path, Path(tmp), threads)
        try:
            with httpx.Client(base_url=url, headers={"Authorization": f"Bearer {STATION}"}, timeout=60) as http:
                for data in images[:5]:
                    http.post("/v1/inspections", files={"image": ("warm.png", data)}).raise_for_status()
            rest_kib = load.status_kib(proc.pid, "VmRSS")
            samples, lock, swap = [], threading.Lock(), {}
            start = time.perf_counter()
            deadline = start + seconds
            workers = [
                threading.Thread(target=load.client, args=(url, images, deadline, k, samples, lock))
                for k in range(clients)
            ]
            workers.append(
                threading.Thread(target=load.swap, args=(url, bundle_path.read_bytes(), start + seconds / 2, swap))
            )
            for w in workers:
                w.start()
            for w in workers:
                w.join()
            wall = time.perf_counter() - start
            peak_kib = load.status_kib(proc.pid, "VmHWM")
            crowd = {}
            if burst_clients:
                crowd = burst(url, images, clients=burst_clients, seconds=burst_seconds)
                crowd["limits"] = _default_limits()  # the server runs with the defaults
        finally:
            proc.terminate()
            try:
                proc.wait(30)
            except subprocess.TimeoutExpired:
                proc.kill()
    ok = np.array([ms for _, ms, status in samples if status == 200])
    return {
        "seconds": round(wall, 2),
        "clients": clients,
        "image_size": size,
        "torch_threads": threads,
        "requests": len(samples),
        "errors": sum(status != 200 for _, _, status in samples),
        "throughput_rps": round(len(ok) / wall, 2),
        "latency_p50_ms": round(float(np.percentile(ok, 50)), 2) if len(ok) else None,
        "latency_p99_ms": round(float(np.percentile(ok, 99)), 2) if len(ok) else None,
        "swap_status": swap.get("status"),
        "swap_ms": swap.get("ms"),
        "startup_s": round(startup, 2),
        "rss_at_rest_mib": round(rest_kib / 1024, 1),
        "peak_rss_mib": round(peak_kib / 1024, 1),
        **({f"clients_{burst_clients}": crowd} if crowd else {}),
    }


def _service_tests():
    """tests/service/test_memory.py and service_testkit.py, imported as pytest imports them (tests/service on the
    path), so the benchmark measures with the test's own server, image and limits."""
    folder = str(Path(__file__).resolve().parents[1] / "service")
    if folder not in sys.path:
        sys.path.append(folder)
    import service_testkit
    import test_memory

    return test_memory, service_testkit


def heavy_image_peak_rss(
    bundle_path, *, max_pixels: int | None = None, max_decodes: int = 2, clients: int = 4, per_client: int = 3
) -> dict:
    """tests/service/test_memory.py's check, measured: a fresh server with KNOWNGOOD_MAX_PIXELS = `max_pixels`
    (default the test's 16 M), `max_decodes` decode slots and a queue of 1; one heavy request to warm up, the RSS
    at rest, then `clients` clients posting the heaviest image the limits allow `per_client` times each; the peak
    RSS (VmHWM) against the bound DEVELOPERS.md states: at rest + MAX_DECODES x 3 x BYTES_PER_PIXEL x MAX_PIXELS."""
    test_memory, kit = _service_tests()
    max_pixels = max_pixels or test_memory.MAX_PIXELS
    limits = {"max_pixels": max_pixels, "max_decodes": max_decodes, "max_queue": 1}
    image = test_memory.heaviest_png(max_pixels)
    with Image.open(io.BytesIO(image)) as im:
        width, height = im.size
    with tempfile.TemporaryDirectory(prefix="kg-bench-heavy-") as tmp:
        start = time.perf_counter()
        server = kit.start_server(
            Path(bundle_path).resolve(),
            Path(tmp) / "memory",
            extra_env={f"KNOWNGOOD_{k.upper()}": str(v) for k, v in limits.items()},
        )
        try:
            with httpx.Client(base_url=server.url, headers=kit.STATION_AUTH, timeout=60) as http:
                warm = http.post("/v1/inspections", files={"image": ("warm.png", image)})
                warm.raise_for_status()
            rest = test_memory._status_mib(server.proc.pid, "VmRSS")
            samples, wall = load.drive(server.url, [image], clients, count=per_client, token=kit.STATION)
            peak = test_memory._status_mib(server.proc.pid, "VmHWM")
        finally:
            server.stop()
        total = time.perf_counter() - start
    decoded = test_memory.BYTES_PER_PIXEL * max_pixels / test_memory.MIB
    bound = rest + max_decodes * 3 * decoded
    return {
        "limits": limits,
        "clients": clients,
        "requests_per_client": per_client,
        "image_px": [width, height],
        "image_kib": round(len(image) / 1024, 1),
        "statuses": load.statuses(samples),
        "load_seconds": round(wall, 2),
        "seconds": round(total, 2),
        "rss_at_rest_mib": round(rest, 1),
        "peak_rss_mib": round(peak, 1),
        "bound_mib": round(bound, 1),
        "bound": "RSS at rest + MAX_DECODES x 3 x (BYTES_PER_PIXEL x MAX_PIXELS) (DEVELOPERS.md)",
        "within_bound": bool(peak < bound),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("bundle", type=Path, metavar="MODEL")
    parser.add_argument("--seconds", type=float, default=30)
    parser.add_argument("--clients", type=int, default=8)
    parser.add_argument("--image-size", type=int, default=None, help="px per side (default: the model's size)")
    parser.add_argument("--threads", type=int, default=2, help="KNOWNGOOD_TORCH_THREADS for the server")
    parser.add_argument("--burst-clients", type=int, default=32, help="clients of the second phase (0: none)")
    parser.add_argument("--burst-seconds", type=float, default=10)
    parser.add_argument("--heavy", action="store_true", help="also the heavy-image peak RSS (test_memory.py's check)")
    parser.add_argument("--max-pixels", type=int, default=None, help="KNOWNGOOD_MAX_PIXELS for --heavy (16 M)")
    args = parser.parse_args(argv)
    result = run(
        args.bundle,
        seconds=args.seconds,
        clients=args.clients,
        image_size=args.image_size,
        threads=args.threads,
        burst_clients=args.burst_clients,
        burst_seconds=args.burst_seconds,
    )
    if args.heavy:
        heavy = heavy_image_peak_rss(args.bundle, max_pixels=args.max_pixels)
        result |= {"heavy_image_peak_rss_mib": heavy["peak_rss_mib"], "heavy_image_rss": heavy}
    print(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
