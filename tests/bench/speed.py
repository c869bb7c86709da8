"""Speed section: inspection latency (heatmap and score included), FLOPs, the machine's matmul peak, and ONNX
Runtime against eager PyTorch. Everything on `THREADS` CPU threads, medians of repeats, under inference mode."""

from __future__ import annotations

import statistics
import time

import numpy as np
import torch
from torch.utils.flop_counter import FlopCounterMode

from training.detector import Detector
from training.runtime import OnnxRunner

THREADS = 2
BATCHES = (1, 32)


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
    x = torch.rand(1, det.cfg.channels, det.cfg.size, det.cfg.size)
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
        "image_size": det.cfg.size,
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
