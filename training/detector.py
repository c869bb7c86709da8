"""A trained model ready to score: the scoring graph plus its threshold and manifest. Built by `bundle.load`."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import torch

from training.config import ModelConfig
from training.data import to_model_input
from training.scoring import ScoringGraph, resize_maps


@dataclass(frozen=True)
class Inspection:
    """One image's result. score: higher = less like known-good; verdict 'flag' when score > threshold."""

    score: float
    threshold: float
    verdict: str
    heatmap: np.ndarray  # (H, W) float32 at the input image's own resolution, same unit as the score


@dataclass
class Detector:
    cfg: ModelConfig
    graph: ScoringGraph
    threshold: float
    manifest: dict = field(default_factory=dict)
    sha256: str = ""  # of the bundle file this was loaded from
    runner: Callable | None = field(default=None, repr=False)  # e.g. OnnxRunner; None = eager PyTorch

    def use_onnx(self, threads: int = 0) -> Detector:
        """Switches scoring to ONNX Runtime (faster on CPU); the same graph and weights, so the same scores."""
        from training.runtime import OnnxRunner

        self.runner = OnnxRunner(self.graph, threads=threads)
        return self

    @property
    def model_id(self) -> str:
        return self.manifest.get("model_id", "unsaved")

    def prepare(self, images: list[np.ndarray]) -> torch.Tensor:
        """(C, H, W) float arrays at any size -> one (B, C, S, S) batch in the model's colour mode."""
        return to_model_input(images, size=self.cfg.size, channels=self.cfg.channels)

    def score_batch(self, x: torch.Tensor, batch: int = 32) -> tuple[np.ndarray, torch.Tensor]:
        """x (N, C, S, S) -> anomaly scores (N,) float64 (higher = less like known-good) and heatmaps (N, S, S)."""
        scores, heats, _ = self.score_and_embed(x, batch)
        return scores, heats

    @torch.inference_mode()
    def score_and_embed(self, x: torch.Tensor, batch: int = 32) -> tuple[np.ndarray, torch.Tensor, np.ndarray]:
        """`score_batch` plus each image's `embed` features (N, F) float64, from the same pass."""
        self.graph.eval()
        run = self.runner or self.graph
        outputs = [run(x[i : i + batch]) for i in range(0, len(x), batch)]
        scores, heats, embeddings = (torch.cat(parts) for parts in zip(*outputs))
        return scores.double().numpy(), heats, embeddings.double().numpy()

    def inspect(self, images: list[np.ndarray], batch: int = 32) -> list[Inspection]:
        """Scores native-resolution images as one batch; heatmaps come back at each image's own size."""
        if not images:
            return []
        scores, heats = self.score_batch(self.prepare(images), batch=batch)
        maps = resize_maps(heats, [im.shape[-2:] for im in images])
        t = self.threshold
        return [
            Inspection(score=float(s), threshold=t, verdict="flag" if s > t else "pass", heatmap=m)
            for s, m in zip(scores, maps)
        ]

    @torch.inference_mode()
    def embed(self, images: list[np.ndarray] | torch.Tensor, batch: int = 64) -> np.ndarray:
        """(N, F) pooled critic features: the space Fréchet distances (drift) are measured in."""
        x = images if isinstance(images, torch.Tensor) else self.prepare(images)
        self.graph.eval()
        parts = [self.graph.critic.pooled_features(x[i : i + batch]) for i in range(0, len(x), batch)]
        return torch.cat(parts).double().numpy()
