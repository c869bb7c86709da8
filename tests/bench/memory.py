"""Memory section: peak resident memory of a real `knowngood train` process, and of the service (through
`tests/bench/bench_service.py`, when it exists)."""

from __future__ import annotations

import argparse
import importlib
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image

from tests.bench import datasets

TARGET_IMAGES = 2000  # the training-memory goal is stated for this many images (issue 9)


def cycled(images: list[np.ndarray], n: int) -> list[np.ndarray]:
    """n images from `images`, repeated as often as needed (every other round mirrored left-right, so no file is
    a copy of another): the memory a training run needs depends on how many images and how large, not on which."""
    out = []
    while len(out) < n:
        for im in images[: n - len(out)]:
            out.append(im if (len(out) // len(images)) % 2 == 0 else np.ascontiguousarray(im[..., ::-1]))
    return out


def _write_pngs(images: list[np.ndarray], folder: Path) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    for i, im in enumerate(images):
        arr = np.clip(np.round(im * 255), 0, 255).astype(np.uint8)
        arr = arr[0] if arr.shape[0] == 1 else np.moveaxis(arr, 0, -1)
        Image.fromarray(arr).save(folder / f"{i:05d}.png")


# The child reads its own peak at exit: VmHWM, the high-water RSS of its own address space. A child's rusage
# (wait4's ru_maxrss) is no good here: Linux carries the parent's high-water RSS into the child at exec, so a
# bench process holding gigabytes of datasets reported them as the training's peak (6326 MiB in the bench of
# 2026-12-03, where the training itself peaked at 3705 MiB; `test_bench_levers.py` pins the difference).
PEAK_AT_EXIT = """
import atexit, runpy, sys
out = sys.argv.pop(1)

def peak():
    with open("/proc/self/status") as f:
        kib = next(line.split()[1] for line in f if line.startswith("VmHWM"))
    with open(out, "w") as f:
        f.write(kib)

atexit.register(peak)
sys.argv[0] = "knowngood"
runpy.run_module(sys.argv.pop(1), run_name="__main__", alter_sys=True)
"""


def own_peak_rss_mib(module_args: list[str], *, stderr, scratch: Path) -> tuple[int, float | None]:
    """Runs `python -m MODULE ARGS...` (module_args[0] is the module) in a child process; its exit code and its
    own peak RSS in MiB, read by the child itself at exit (PEAK_AT_EXIT); None when it died before it could."""
    peak_file = scratch / "peak_kib.txt"
    proc = subprocess.run(
        [sys.executable, "-c", PEAK_AT_EXIT, str(peak_file), *module_args], stdout=subprocess.DEVNULL, stderr=stderr
    )
    return proc.returncode, int(peak_file.read_text()) / 1024 if peak_file.exists() else None


def training_peak_rss(images: list[np.ndarray], *, steps: int, tile: int = 0) -> dict:
    """Runs `knowngood train` on `images` (written as PNGs at their own resolution) for `steps` steps in a child
    process (`tile` > 0: `--tile`), and its own peak RSS (`own_peak_rss_mib`)."""
    with tempfile.TemporaryDirectory(prefix="kg-bench-mem-") as tmp:
        good = Path(tmp) / "good"
        _write_pngs(images, good)
        args = ["knowngood.training.cli", "train", str(good), "-o", str(Path(tmp) / "m.kgm")]
        args += ["--steps", str(steps), "--quiet", "--fresh", *(["--tile", str(tile)] if tile else [])]
        start = time.monotonic()
        with open(Path(tmp) / "stderr.txt", "w+b") as err_file:  # a file, not a pipe: a chatty child cannot block
            code, peak = own_peak_rss_mib(args, stderr=err_file, scratch=Path(tmp))
            err_file.seek(0)
            err = err_file.read().decode(errors="replace")[-2000:]
    out = {
        "command": f"knowngood train GOOD_DIR -o MODEL --steps {steps} --quiet --fresh"
        + (f" --tile {tile}" if tile else ""),
        "images": len(images),
        "image_shape": list(images[0].shape),
        "steps": steps,
        "seconds": round(time.monotonic() - start, 1),
        "exit_code": code,
        "peak_rss_mib": None if peak is None else round(peak, 1),
        "measured_as": "VmHWM of the training process itself, read at its exit",
    }
    if code:
        out["stderr_tail"] = err
    return out


def service_section(
    bundle_path: Path, *, seconds: float, clients: int, image_size: int, burst_seconds: float = 10, heavy: bool = True
) -> dict:
    """Drives the real server through `tests.bench.bench_service.run` (which adds `clients_32`: 32 clients, the
    share of 503s) and, with `heavy`, measures the peak RSS under the heaviest allowed image
    (`bench_service.heavy_image_peak_rss`, tests/service/test_memory.py's check); a note instead when it is not
    there."""
    try:
        bench_service = importlib.import_module("tests.bench.bench_service")
    except ImportError as exc:
        return {"skipped": f"tests/bench/bench_service.py is not importable ({exc})"}
    try:
        out = dict(
            bench_service.run(
                bundle_path, seconds=seconds, clients=clients, image_size=image_size, burst_seconds=burst_seconds
            )
        )
    except Exception as exc:  # the service is a colleague's moving part; the rest of the benchmark still counts
        return {"skipped": f"bench_service.run failed: {type(exc).__name__}: {exc}"}
    if heavy:
        try:
            rss = bench_service.heavy_image_peak_rss(bundle_path)
            out |= {"heavy_image_peak_rss_mib": rss["peak_rss_mib"], "heavy_image_rss": rss}
        except Exception as exc:
            out["heavy_image_rss"] = {"skipped": f"heavy_image_peak_rss failed: {type(exc).__name__}: {exc}"}
    return out


def service_memory(service: dict) -> dict:
    """The memory figures bench_service reports (any key naming RSS or memory), copied for the memory section."""
    return {k: v for k, v in service.items() if "rss" in k.lower() or "mem" in k.lower()}


def main(argv: list[str] | None = None) -> int:
    """`python -m tests.bench.memory [--images 2000] [--steps 50] [--dataset NAME] [--tile PX]`: the
    training-memory figure alone, on a dataset's training images cycled to --images."""
    ap = argparse.ArgumentParser(description=main.__doc__.splitlines()[0])
    ap.add_argument("--images", type=int, default=TARGET_IMAGES)
    ap.add_argument("--steps", type=int, default=50)
    ap.add_argument("--dataset", default="elpv-pooled", choices=datasets.NAMES)
    ap.add_argument("--tile", type=int, default=0, help="train a tiled model (tiles of PX native px)")
    ap.add_argument("--cache", type=Path, default=Path("bench_out/cache"))
    args = ap.parse_args(argv)
    images = cycled(datasets.native_images(args.dataset, args.cache, "train"), args.images)
    out = training_peak_rss(images, steps=args.steps, tile=args.tile)
    print(json.dumps({"dataset": args.dataset, **out}, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
