"""ONNX Runtime execution of the scoring graph: about 3x faster than eager PyTorch on 2 CPU cores for these
small convolutions (measured by `make bench`), with scores equal to float32 rounding (tests pin the tolerance)."""

from __future__ import annotations

import io
import warnings

import numpy as np
import torch
from knowngood.training.scoring import ScoringGraph


def export_onnx(graph: ScoringGraph) -> bytes:
    """The graph as ONNX bytes with a dynamic batch axis: x (B, C, H, W) -> score (B,), heat (B, H, W),
    embedding (B, F)."""
    graph.eval()
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the exporter's notes on shape inference are not for the user
        torch.onnx.export(
            graph,
            (torch.rand(1, graph.cfg.channels, *graph.cfg.shape),),
            buf,
            input_names=["x"],
            output_names=["score", "heat", "embedding"],
            dynamic_axes={"x": {0: "batch"}, "score": {0: "batch"}, "heat": {0: "batch"}, "embedding": {0: "batch"}},
            opset_version=17,
            dynamo=False,
        )
    return buf.getvalue()


class OnnxRunner:
    """Callable like the graph: (B, C, H, W) tensor -> (score, heat, embedding) tensors."""

    def __init__(self, graph: ScoringGraph, threads: int = 0):
        import onnxruntime as ort

        opts = ort.SessionOptions()
        opts.intra_op_num_threads = threads or torch.get_num_threads()
        opts.inter_op_num_threads = 1
        opts.log_severity_level = 3
        self.session = ort.InferenceSession(export_onnx(graph), opts, providers=["CPUExecutionProvider"])

    def __call__(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        outputs = self.session.run(None, {"x": np.ascontiguousarray(x.numpy(), dtype=np.float32)})
        return tuple(torch.from_numpy(o) for o in outputs)


def available() -> bool:
    try:
        import onnxruntime  # noqa: F401
    except ImportError:
        return False
    return True
