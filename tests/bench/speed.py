"""Speed section: inspection latency (heatmap and score included), FLOPs, the machine's matmul peak, and ONNX
Runtime against eager PyTorch. Everything on `THREADS` CPU threads, medians of repeats, under inference mode.

Three parts: `measure`, a trained bundle on its dataset's images; `by_size`, ms per image at 128 and 256 px,
batch 1 and 32, eager and ONNX Runtime (as the service runs it, `Detector.use_onnx`); `tiled`, seconds per
megapixel of a tiled model (`Detector.score_images` on a 2048 x 2048 image, 128 px tiles, ONNX Runtime). The
last two use untrained graphs with every term (`synthetic_detector`): the time does not depend on the weights'
values, and every term is the most work a model can be chosen to do; `tiled` also times the run's trained tiled
bundle with the terms it was chosen with (alone: `python -m tests.bench.speed --tiled BUNDLE`).
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import statistics
import time
from pathlib import Path

import numpy as np
import torch
from knowngood.training import bundle
from knowngood.training.bundle import new_graph
from knowngood.training.config import ModelConfig
from knowngood.training.detector import Detector, tile_boxes
from knowngood.training.runtime import OnnxRunner
from knowngood.training.scoring import term_weights
from knowngood.training.selection import fine_memory_entries
from torch.utils.flop_counter import FlopCounterMode

THREADS = 2
BATCHES = (1, 32)
SIZES = (128, 256)
TILED_SIDE = 2048
TILE = 128


def median_ms(fn, repeats: int, warmup: int = 5) -> float:
    # the first calls at a new batch shape are slow (kernel selection and allocation); warm up past them
    for _ in range(warmup):
        fn()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times) * 1000


def matmul_peak_gflops(n: int = 1024, repeats: int = 10) -> float:
    """Best-of-`repeats` float32 `torch.mm` of two n x n matrices: 2 n³ floating-point operations each."""
    a, b = torch.rand(n, n), torch.rand(n, n)
    torch.mm(a, b)
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        torch.mm(a, b)
        best = min(best, time.perf_counter() - start)
    return 2 * n**3 / best / 1e9


def flops_per_image(det: Detector) -> int:
    """Floating-point operations of one forward of the scoring graph on one image (a multiply-add counts 2, as
    `torch.utils.flop_counter` counts); covers convolutions and the other ops it knows (not element-wise ops)."""
    x = torch.rand(1, det.cfg.channels, *det.cfg.shape)
    counter = FlopCounterMode(display=False)
    with torch.inference_mode(), counter:
        det.graph(x)
    return int(counter.get_total_flops())


def _batch(images: list[np.ndarray], n: int) -> list[np.ndarray]:
    return [images[i % len(images)] for i in range(n)]


def measure(det: Detector, native: list[np.ndarray], *, repeats: int = 20) -> dict:
    """`native`: a few test images (C, H, W) at their own resolution, cycled to fill a batch."""
    torch.set_num_threads(THREADS)
    det.graph.eval()
    peak = matmul_peak_gflops()
    flops = flops_per_image(det)
    out = {
        "threads": THREADS,
        "image_size": list(det.cfg.shape),
        "terms": term_weights(det.cfg),
        "native_size": list(native[0].shape[-2:]),
        "flops_per_image": flops,
        "matmul_peak_gflops": round(peak, 2),
        "batches": {},
    }
    onnx = OnnxRunner(det.graph, threads=THREADS)
    for b in BATCHES:
        imgs = _batch(native, b)
        x = det.prepare(imgs)
        reps = max(3, repeats // (4 if b > 1 else 1))
        with torch.inference_mode():
            score_ms = median_ms(lambda x=x: det.score_batch(x), reps)
            inspect_ms = median_ms(lambda imgs=imgs: det.inspect(imgs), reps)
            graph_ms = median_ms(lambda x=x: det.graph(x), reps)
            onnx_ms = median_ms(lambda x=x: onnx(x), reps)
        achieved = flops * b / (score_ms / 1000) / 1e9
        out["batches"][str(b)] = {
            "score_batch_ms": round(score_ms, 2),
            "score_batch_ms_per_image": round(score_ms / b, 3),
            "inspect_native_ms": round(inspect_ms, 2),  # preparation from native arrays + heatmap at native size
            "inspect_native_ms_per_image": round(inspect_ms / b, 3),
            "achieved_gflops": round(achieved, 2),
            "achieved_fraction_of_matmul_peak": round(achieved / peak, 4),
            "torch_graph_ms": round(graph_ms, 2),
            "onnxruntime_ms": round(onnx_ms, 2),
            "onnx_speedup": round(graph_ms / onnx_ms, 2),
        }
    x = det.prepare(_batch(native, 64))
    with torch.inference_mode():
        torch_scores, torch_heat, _ = det.graph(x)
    onnx_scores, onnx_heat, _ = onnx(x)
    out["onnx_max_abs_score_diff"] = float((torch_scores - onnx_scores).abs().max())
    out["onnx_max_abs_heatmap_diff"] = float((torch_heat - onnx_heat).abs().max())
    return out


def synthetic_detector(size: int, *, tile: int = 0) -> Detector:
    """An untrained model with every term at `size` px (tiles of `tile` px when > 0), its memory filled with random
    entries (a zero memory would be a degenerate matrix product); for timing only."""
    torch.manual_seed(0)
    # the 4 px memory with the entries the choice gives it at this working size (16384 at 256 px)
    cfg = ModelConfig(size=size, tile=tile)
    cfg = dataclasses.replace(cfg, memory_size=fine_memory_entries(cfg.memory_size, cfg.shape))
    graph = new_graph(cfg)
    graph.memory.normal_()
    graph.memory_sq.copy_((graph.memory * graph.memory).sum(1))
    return Detector(cfg=cfg, graph=graph.eval(), threshold=float("inf"))


def by_size(repeats: int = 20) -> dict:
    """{size: ms per image of `Detector.score_batch` (score and heatmap at the working size), eager and ONNX,
    at each batch of `BATCHES`}; a batch is scored in forward passes of `Detector.batch_size` images."""
    torch.set_num_threads(THREADS)
    out = {}
    for size in SIZES:
        det = synthetic_detector(size)
        xs = {b: torch.rand(b, 1, size, size) for b in BATCHES}
        row = {"flops_per_image": flops_per_image(det), "forward_batch": det.batch_size(), "batches": {}}
        for engine in ("eager", "onnxruntime"):
            if engine == "onnxruntime":
                det.use_onnx(threads=THREADS)
            for b, x in xs.items():
                reps, warmup = (repeats, 5) if b == 1 else (max(2, repeats // 10), 1)
                ms = median_ms(lambda x=x, det=det: det.score_batch(x), reps, warmup=warmup)
                row["batches"].setdefault(str(b), {})[f"{engine}_ms_per_image"] = round(ms / b, 2)
        out[str(size)] = row
    return out


def tiled(repeats: int = 20, det: Detector | None = None) -> dict:
    """Seconds per megapixel of `Detector.score_images` (tiles, stitched heatmap at native resolution and worst
    tile's score) on one `TILED_SIDE` px image, ONNX Runtime: of `det` (a trained tiled bundle, with the terms it
    was chosen with) or of an untrained model with every term, `TILE` px tiles at 128 px working size."""
    torch.set_num_threads(THREADS)
    det = (det or synthetic_detector(128, tile=TILE)).use_onnx(threads=THREADS)
    assert det.cfg.tile, "a tiled model"
    image = np.random.default_rng(0).random((det.cfg.channels, TILED_SIDE, TILED_SIDE), dtype=np.float32)
    ms = median_ms(lambda: det.score_images([image]), max(2, repeats // 10), warmup=1)
    megapixels = TILED_SIDE * TILED_SIDE / 1e6
    return {
        "image_side": TILED_SIDE,
        "tile": det.cfg.tile,
        "tiles": len(tile_boxes((TILED_SIDE, TILED_SIDE), det.cfg.tile)),
        "terms": list(term_weights(det.cfg)),
        "seconds_per_image": round(ms / 1000, 2),
        "seconds_per_megapixel": round(ms / 1000 / megapixels, 3),
        "engine": "onnxruntime",
    }


def markdown(speed: dict) -> str:
    lines = [
        "| batch | score_batch ms/image | inspect (native) ms/image | ONNX Runtime ms/image | ONNX speed-up | "
        "share of matmul peak |",
        "| ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for b, r in speed["batches"].items():
        n = int(b)
        lines.append(
            f"| {b} | {r['score_batch_ms_per_image']:.2f} | {r['inspect_native_ms_per_image']:.2f} | "
            f"{r['onnxruntime_ms'] / n:.2f} | {r['onnx_speedup']:.2f}x | "
            f"{100 * r['achieved_fraction_of_matmul_peak']:.1f} % |"
        )
    lines.append(
        f"\n{speed['flops_per_image'] / 1e9:.3f} GFLOP per image; matmul peak "
        f"{speed['matmul_peak_gflops']:.1f} GFLOP/s on {speed['threads']} threads; ONNX max |score diff| "
        f"{speed['onnx_max_abs_score_diff']:.2e}"
    )
    return "\n".join(lines)


def markdown_by_size(sizes: dict) -> str:
    lines = [
        "| size | batch | eager ms/image | ONNX Runtime ms/image | GFLOP/image |",
        "| ---: | ---: | ---: | ---: | ---: |",
    ]
    for size, row in sizes.items():
        for b, r in row["batches"].items():
            lines.append(
                f"| {size} px | {b} | {r['eager_ms_per_image']:.1f} | {r['onnxruntime_ms_per_image']:.1f} | "
                f"{row['flops_per_image'] / 1e9:.2f} |"
            )
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Tiled inspection speed of a trained tiled bundle (JSON).")
    parser.add_argument("--tiled", type=Path, required=True, help="a tiled .kgm bundle")
    parser.add_argument("--repeats", type=int, default=30)
    args = parser.parse_args(argv)
    print(json.dumps({"bundle": args.tiled.name, **tiled(args.repeats, det=bundle.load(args.tiled)[0])}, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
