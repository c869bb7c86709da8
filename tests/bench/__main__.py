"""`python -m tests.bench --out bench_out/bench.json [--quick] [--only NAME ...] [--minutes M] [--drift-only]`

Sections of the JSON: datasets, quality (per dataset: knowngood and the peers), ablation (per dataset: the same
trained nets with other terms, and on the tiled dataset knowngood at 128 px), best_peers, speed (a trained
bundle; 128 and 256 px, batch 1 and 32, eager and ONNX Runtime; tiled inspection in s per megapixel), memory,
service, instances (two services on one PostgreSQL against one: throughput, and the seconds until a swap on one is
served by the other; `bench_instances.py`, alone with `python -m tests.bench.bench_instances MODEL`), drift (false
alarms and detection delay of the drift monitor per demo part kind; `drift.py`; alone with `--drift-only`),
machine, settings. Training time per dataset: `train_seconds` in each knowngood row. The JSON is rewritten
after every dataset, so a long run that is stopped still leaves what it measured.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import sys
import time
from pathlib import Path

import torch
from knowngood.training import bundle

from tests.bench import bench_instances, datasets, drift, memory, quality, speed

QUICK_DATASETS = ("elpv-mono", "demo-bracket")


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(prog="python -m tests.bench", description=__doc__.splitlines()[0])
    p.add_argument("--out", type=Path, default=Path("bench_out/bench.json"))
    p.add_argument(
        "--quick",
        action="store_true",
        help=f"smoke run: {', '.join(QUICK_DATASETS)} only, 0.5 min training, short speed and service runs",
    )
    p.add_argument(
        "--only",
        action="append",
        choices=datasets.NAMES,
        metavar="NAME",
        help=f"dataset to run (repeatable); one of {', '.join(datasets.NAMES)}",
    )
    p.add_argument(
        "--minutes",
        type=float,
        default=None,
        help="knowngood training budget per dataset (2.5; quick 0.5)",
    )
    p.add_argument("--cache", type=Path, default=Path("bench_out/cache"), help="where the demo parts are rendered")
    p.add_argument(
        "--skip",
        action="append",
        default=[],
        choices=("speed", "memory", "service", "instances", "drift"),
        help="leave a section out (repeatable)",
    )
    p.add_argument(
        "--drift-only",
        action="store_true",
        help="only the drift section (the demo sets among --only, else bracket and weave), on models it trains",
    )
    p.add_argument(
        "--drift-steps", type=int, default=200, help="training steps of a drift model the quality section did not train"
    )
    args = p.parse_args(argv)
    args.drift_kinds = drift.kinds_for(args.only, args.quick)
    if args.drift_only:
        args.only = [f"demo-{kind}" for kind in args.drift_kinds]
    args.names = args.only or (list(QUICK_DATASETS) if args.quick else list(datasets.NAMES))
    args.minutes = args.minutes if args.minutes is not None else (0.5 if args.quick else 2.5)
    args.speed_repeats = 5 if args.quick else 30
    args.memory_steps = 5 if args.quick else 50
    args.service_seconds = 5 if args.quick else 30
    args.service_burst_seconds = 3 if args.quick else 10
    return args


def machine() -> dict:
    model = next(
        (
            line.split(":", 1)[1].strip()
            for line in Path("/proc/cpuinfo").read_text().splitlines()
            if line.startswith("model name")
        ),
        platform.processor() or "unknown",
    )
    import numpy
    import onnxruntime
    import sklearn

    return {
        "cpu_model": model,
        "cores": os.cpu_count(),
        "cores_usable": len(os.sched_getaffinity(0)),
        "load_average_at_start": [round(v, 2) for v in os.getloadavg()],
        "python": platform.python_version(),
        "torch": torch.__version__,
        "numpy": numpy.__version__,
        "scikit_learn": sklearn.__version__,
        "onnxruntime": onnxruntime.__version__,
        "torch_threads": torch.get_num_threads(),
        "date": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
    }


def write(result: dict, out: Path) -> None:
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text(json.dumps(result, indent=2))
    os.replace(tmp, out)


_START = time.monotonic()


def log(msg: str) -> None:
    print(f"{time.monotonic() - _START:6.0f} s  {msg}", flush=True)


def run_quality(args, result: dict) -> dict[str, Path]:
    """{dataset: its knowngood bundle} for the whole-image models (the later sections' reference candidates)."""
    bundles, fitted = {}, {}
    for name in args.names:
        ds = datasets.load(name, args.cache)
        result["datasets"][name] = ds.summary()
        rows, ablated, bundle_path = quality.evaluate(
            ds, minutes=args.minutes, bundle_dir=args.out.parent / "bundles", fitted=fitted, log=log
        )
        if not ds.tile:
            bundles[name] = bundle_path
        result["quality"][name] = rows
        result["ablation"][name] = ablated
        result["best_peers"] = quality.best_peers(result["quality"])
        write(result, args.out)
    return bundles


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    torch.set_num_threads(speed.THREADS)
    started = time.monotonic()
    result = {
        "settings": {
            "datasets": args.names,
            "knowngood_minutes": args.minutes,
            "quick": args.quick,
            "threads": speed.THREADS,
            "autoencoder_budget": "knowngood's fitting seconds",
        },
        "machine": machine(),
        "datasets": {},
        "quality": {},
        "ablation": {},
        "best_peers": {},
    }
    if args.drift_only:
        run_drift(args, result, {})
        return finish(args, result, started)
    bundles = run_quality(args, result)
    # the speed, memory and service sections use one trained whole-image bundle, elpv-pooled where it was run
    ref = "elpv-pooled" if "elpv-pooled" in bundles else next(iter(bundles), None)
    if "speed" not in args.skip:
        log("speed: 128 and 256 px, tiled 2048 px" + (f", bundle of {ref}" if ref else ""))
        result["speed"] = {
            "by_size": speed.by_size(repeats=args.speed_repeats),
            "tiled": speed.tiled(repeats=args.speed_repeats),
        }
        tiled_bundle = args.out.parent / "bundles" / f"{datasets.LARGE}.kgm"
        if datasets.LARGE in args.names and tiled_bundle.exists():  # the model as chosen, trained in this run
            det, _ = bundle.load(tiled_bundle)
            result["speed"]["tiled_bundle"] = {
                "bundle_of": datasets.LARGE,
                **speed.tiled(repeats=args.speed_repeats, det=det),
            }
        if ref:
            det, _ = bundle.load(bundles[ref])
            native = datasets.native_images(ref, args.cache, "test", 32)
            result["speed"] |= {"bundle_of": ref, **speed.measure(det, native, repeats=args.speed_repeats)}
        write(result, args.out)
    result["memory"] = {}
    if ref is None:
        args.skip += ["memory", "service"]  # they need a whole-image bundle
        result["memory"]["skipped"] = "no whole-image dataset was run"
    if "memory" not in args.skip:
        n = 200 if args.quick else memory.TARGET_IMAGES
        log(f"memory: one `knowngood train` of {args.memory_steps} steps on {n} images ({ref} training images)")
        result["memory"]["training"] = memory.training_peak_rss(
            memory.cycled(datasets.native_images(ref, args.cache, "train"), n), steps=args.memory_steps
        )
        write(result, args.out)
    if "service" not in args.skip:
        side = int(datasets.native_images(ref, args.cache, "test", 1)[0].shape[-1])
        log(
            f"service: {args.service_seconds} s, 8 clients, {side} px images; {args.service_burst_seconds} s, "
            "32 clients; 4 clients posting the heaviest image the limits allow"
        )
        result["service"] = memory.service_section(
            bundles[ref],
            seconds=args.service_seconds,
            clients=8,
            image_size=side,
            burst_seconds=args.service_burst_seconds,
        )
        result["memory"]["service"] = memory.service_memory(result["service"]) or result["service"].get("skipped")
    if "instances" not in args.skip and ref is not None:
        log("instances: one vs two services on one PostgreSQL, and how fast a swap reaches the other instance")
        try:
            result["instances"] = bench_instances.run(bundles[ref])
        except RuntimeError as exc:  # no PostgreSQL server binaries here: say so in the JSON
            result["instances"] = {"skipped": str(exc)}
        write(result, args.out)
    if "drift" not in args.skip:
        run_drift(args, result, bundles)
    return finish(args, result, started)


def run_drift(args, result: dict, bundles: dict[str, Path]) -> None:
    """The drift section; reuses the quality section's bundle of a demo set where it ran (`bundles`)."""
    if not args.drift_kinds:
        result["drift"] = {"skipped": "no demo part kind among --only"}
        return
    log(f"drift: false alarms and detection delay on {', '.join(args.drift_kinds)}")
    result["drift"] = drift.section(
        args.drift_kinds,
        cache=args.cache,
        bundle_dir=args.out.parent / "bundles",
        bundles=bundles,
        steps=args.drift_steps,
        quick=args.quick,
        log=log,
    )
    write(result, args.out)


def finish(args, result: dict, started: float) -> int:
    result["machine"]["load_average_at_end"] = [round(v, 2) for v in os.getloadavg()]
    result["seconds"] = round(time.monotonic() - started, 1)
    write(result, args.out)
    print_summary(result)
    return 0


def print_summary(result: dict) -> None:
    if result["quality"]:
        print_quality(result)
    print_sections(result)
    print(f"\n{result['seconds']:.0f} s in all")


def print_quality(result: dict) -> None:
    print("\n## Image AUROC (higher is better)\n")
    print(quality.markdown_table(result["quality"]))
    print("\n## Best peer per dataset\n")
    for name, b in result["best_peers"].items():
        print(
            f"- {name}: best peer {b['best_peer']} {b['best_peer_auroc']:.3f}; knowngood {b['knowngood_auroc']:.3f} "
            f"(margin {b['margin']:+.3f})"
        )
    print("\n## Per-term ablation, image AUROC\n")
    print(
        "The same trained nets with other terms, each standardised on the same held-out images; "
        f"{quality.TILING_ROW}: the tiled dataset's recipe trained anew on the whole image at 128 px.\n"
    )
    print(quality.ablation_table(result["quality"], result["ablation"]))
    print("\n## Training time (knowngood, `train_bundle` wall time)\n")
    for name, rows in result["quality"].items():
        kg = rows["knowngood"]
        tiles = f", {kg['tile']} px tiles" if kg.get("tile") else ""
        print(f"- {name}: {kg['train_seconds']:.0f} s ({kg['steps']} steps in {kg['fit_seconds']:.0f} s{tiles})")


def print_sections(result: dict) -> None:
    sp = result.get("speed", {})
    if "by_size" in sp:
        print("\n## Inspection speed by size (every term, heatmap and score included)\n")
        print(speed.markdown_by_size(sp["by_size"]))
        t = sp["tiled"]
        print(
            f"\nTiled inspection ({t['tile']} px tiles, ONNX Runtime): {t['seconds_per_megapixel']:.2f} s per "
            f"megapixel ({t['image_side']} px image, {t['tiles']} tiles, {t['seconds_per_image']:.1f} s)"
        )
        if t := sp.get("tiled_bundle"):
            print(
                f"The {t['bundle_of']} bundle as chosen ({' + '.join(t['terms'])}): "
                f"{t['seconds_per_megapixel']:.2f} s per megapixel ({t['tiles']} tiles of {t['tile']} px)"
            )
    if "batches" in sp:
        print(f"\n## Inspection speed of the {sp['bundle_of']} bundle ({' x '.join(map(str, sp['image_size']))} px)\n")
        print(speed.markdown(sp))
    mem = result.get("memory", {})
    if (peak := mem.get("training", {}).get("peak_rss_mib")) is not None:
        print(f"\nTraining peak RSS: {peak:.0f} MiB")
    if "service" in mem:
        print(f"Service memory: {mem['service']}")
    heavy = result.get("service", {}).get("heavy_image_rss", {})
    if "peak_rss_mib" in heavy:
        print(
            f"Service peak RSS, 4 clients posting the heaviest image (MAX_PIXELS {heavy['limits']['max_pixels']}): "
            f"{heavy['peak_rss_mib']:.0f} MiB against a bound of {heavy['bound_mib']:.0f} MiB"
        )
    crowd = result.get("service", {}).get("clients_32", {})
    if "rate_503" in crowd:
        print(f"Service at 32 clients: {crowd['requests']} requests, 503 share {crowd['rate_503']:.1%}")
    if "settings" in result.get("drift", {}):
        d = result["drift"]["settings"]
        print(
            f"\n## Drift monitor (window {d['window']}, min {d['min_images']} images, {d['sigmas']:g} sigmas): "
            f"false alarms on fresh known-good images; changed images until drifting (median of {d['repeats']})\n"
        )
        print(drift.markdown(result["drift"]))


if __name__ == "__main__":
    sys.exit(main())
