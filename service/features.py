"""Drift features of production images: the critic's pooled features (`Detector.embed`), under ONNX Runtime when the
service scores with it. `Detector.embed` always runs eager PyTorch, which was ten times slower than the ONNX
scoring pass on a busy 2-core machine; this exports the same function, so the features are the same."""

from __future__ import annotations

import io
import warnings
from collections.abc import Callable

import numpy as np
import torch
from torch import nn

from training.detector import Detector


class _Pooled(nn.Module):
    def __init__(self, critic: nn.Module):
        super().__init__()
        self.critic = critic

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.critic.pooled_features(x)  # (B, F)


def onnx_features(det: Detector, *, threads: int) -> Callable[[torch.Tensor], np.ndarray]:
    """A function x (B, C, S, S) in [0, 1] -> (B, F) float64 features, as `det.embed(x)` gives them."""
    import onnxruntime as ort

    module = _Pooled(det.graph.critic).eval()
    c, s = det.cfg.channels, det.cfg.size
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the exporter's notes on shape inference are not for the operator
        torch.onnx.export(
            module,
            (torch.rand(1, c, s, s),),
            buf,
            input_names=["x"],
            output_names=["features"],
            dynamic_axes={"x": {0: "batch"}, "features": {0: "batch"}},
            opset_version=17,
            dynamo=False,
        )
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = threads
    opts.inter_op_num_threads = 1
    opts.log_severity_level = 3
    session = ort.InferenceSession(buf.getvalue(), opts, providers=["CPUExecutionProvider"])

    def run(x: torch.Tensor) -> np.ndarray:
        [out] = session.run(None, {"x": np.ascontiguousarray(x.numpy(), dtype=np.float32)})
        return out.astype(np.float64)

    return run
