"""Several instances on one PostgreSQL: throughput of two `knowngood serve` processes sharing one database against
one alone (same clients, same machine), and how long a swap on one instance takes to be served by the other (the
follow interval plus readying a bundle it has not seen). The PostgreSQL server is the tests' throwaway cluster
(Debian's server binaries, loopback). `run(bundle_path)` returns the JSON section; on a 2-core machine two
instances share the same cores, so the throughput ratio says what sharing costs, not what a second machine adds.
"""

from __future__ import annotations

import dataclasses
import sys
import tempfile
import time
from pathlib import Path

import httpx
import numpy as np

from tests.bench import service_load as load
from tests.bench.service_load import ADMIN, SWAP

SERVICE_TESTS = Path(__file__).resolve().parent.parent / "service"


def _postgres():
    sys.path.insert(0, str(SERVICE_TESTS))  # the tests' throwaway cluster helper (and its free-port helper)
    import postgres_server

    return postgres_server.start()


def _throughput(urls: list[str], images: list[bytes], clients: int, seconds: float) -> dict:
    """`clients` threads per URL at once; requests per second over all."""
    import threading

    results: dict[str, tuple[list, float]] = {}

    def drive(url: str) -> None:
        results[url] = load.drive(url, images, clients, seconds=seconds)

    threads = [threading.Thread(target=drive, args=(u,)) for u in urls]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    samples = [s for u in urls for s in results[u][0]]
    wall = max(results[u][1] for u in urls)
    ok = sum(status == 200 for _, _, status in samples)
    return {
        "instances": len(urls),
        "clients": clients * len(urls),
        "seconds": round(wall, 2),
        "requests_per_s": round(ok / wall, 2),
        "statuses": load.statuses(samples),
        **load.latency(samples),
    }


def _propagation(a: str, b: str, bundles: list[bytes], repeats: int) -> list[float]:
    """Seconds from a swap's 200 on `a` until `b` serves that bundle, for each of `repeats` swaps."""
    out = []
    with httpx.Client(headers={"Authorization": f"Bearer {ADMIN}"}, timeout=300) as http:
        for k in range(repeats):
            data = bundles[k % len(bundles)]
            r = http.put(a + "/v1/model", files={"bundle": ("m.kgm", data)}, data=SWAP)
            r.raise_for_status()
            sha, t0 = r.json()["sha256"], time.perf_counter()
            while http.get(b + "/v1/model").json()["sha256"] != sha:
                if time.perf_counter() - t0 > 300:
                    raise RuntimeError("the other instance did not follow the swap within 300 s")
                time.sleep(0.02)
            out.append(round(time.perf_counter() - t0, 3))
    return out


def run(bundle_path: Path, *, seconds: float = 20, clients: int = 2, repeats: int = 4, follow: float = 2.0) -> dict:
    from knowngood.training import bundle

    det, frechet = bundle.load(bundle_path)
    images = load.images(16, det.cfg.size, load.channels(bundle_path))
    pg = _postgres()
    procs = []
    try:
        with tempfile.TemporaryDirectory() as tmp:
            others = []
            for i, threshold in enumerate((det.threshold * 1.1, det.threshold * 1.2)):
                path = Path(tmp) / f"other{i}.kgm"  # same weights, another threshold: another bundle to swap in
                bundle.save(dataclasses.replace(det, threshold=float(threshold)), frechet, path)
                others.append(path.read_bytes())
            db = pg.new_database()
            env = {"KNOWNGOOD_SYNC_SECONDS": str(follow)}
            started = []
            for name in ("a", "b"):
                folder = Path(tmp) / name
                folder.mkdir()
                proc, url, startup = load.start(bundle_path, folder, threads=1, db=db, env_extra=env)
                procs.append(proc)
                started.append((url, startup))
            (a, _), (b, _) = started
            load.drive(a, images, 1, count=5)  # warm-up (first scoring pass) on both
            load.drive(b, images, 1, count=5)
            one = _throughput([a], images, clients * 2, seconds)
            two = _throughput([a, b], images, clients, seconds)
            swaps = _propagation(a, b, others + [Path(bundle_path).read_bytes()], repeats)
    finally:
        for proc in procs:
            proc.terminate()
            proc.wait(30)
        pg.stop()
    return {
        "database": "postgresql (throwaway loopback cluster)",
        "follow_interval_s": follow,
        "one_instance": one,
        "two_instances": two,
        "throughput_ratio_two_over_one": round(two["requests_per_s"] / one["requests_per_s"], 3),
        "swap_propagation_s": swaps,
        "swap_propagation_median_s": round(float(np.median(swaps)), 3),
        "note": "both instances on this machine's cores and one PostgreSQL; each instance scores on 1 thread",
    }


if __name__ == "__main__":
    import json

    print(json.dumps(run(Path(sys.argv[1])), indent=2))
