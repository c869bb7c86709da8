"""Residual maps -> heatmap -> anomaly score, and their standardisation against held-out known-good images.

Direction, everywhere: a higher anomaly score means less like the known-good parts; a part is flagged when
score > threshold. Heatmap and score share one unit: standard deviations of held-out known-good images at
that pixel, so 0 means "as good parts look" and thresholds are comparable between models.
"""

from __future__ import annotations

import math

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from training.config import ModelConfig
from training.nets import Critic, Encoder, Generator

SHRINK_PRIOR = 10.0  # pseudo-images of the global variance mixed into each pixel's variance (small holdouts)
MIN_STD = 1e-4


def gaussian_kernel(sigma: float) -> torch.Tensor:
    """1-D normalised Gaussian taps, radius 3 sigma."""
    radius = max(1, int(math.ceil(3 * sigma)))
    x = torch.arange(-radius, radius + 1, dtype=torch.float32)
    k = torch.exp(-0.5 * (x / sigma) ** 2)
    return k / k.sum()


class ScoringGraph(nn.Module):
    """The whole inference path as one module (exportable to ONNX): x (B, C, S, S) in [0, 1] ->
    term maps, standardised heatmap (B, S, S) and anomaly score (B,), higher = less like known-good.
    """

    def __init__(self, cfg: ModelConfig, encoder: Encoder, generator: Generator, critic: Critic):
        super().__init__()
        self.cfg = cfg
        self.encoder, self.generator, self.critic = encoder, generator, critic
        self.register_buffer("kernel", gaussian_kernel(cfg.smooth_sigma), persistent=False)
        s = cfg.size
        # per-pixel mean and std of the two smoothed residual terms on held-out known-good images
        self.register_buffer("term_mean", torch.zeros(2, s, s))
        self.register_buffer("term_std", torch.ones(2, s, s))
        self.top_k = max(1, int(round(cfg.top_fraction * s * s)))

    def _smooth(self, m: torch.Tensor) -> torch.Tensor:
        k = self.kernel
        r = k.numel() // 2
        b, c, h, w = m.shape
        m = m.reshape(b * c, 1, h, w)  # separable Gaussian, each term map on its own
        m = F.conv2d(F.pad(m, (r, r, 0, 0), mode="replicate"), k.view(1, 1, 1, -1))
        m = F.conv2d(F.pad(m, (0, 0, r, r), mode="replicate"), k.view(1, 1, -1, 1))
        return m.reshape(b, c, h, w)

    def term_maps(self, x: torch.Tensor) -> torch.Tensor:
        """(B, 2, S, S): smoothed image residual |x - G(E(x))| and critic-feature residual |f(x) - f(G(E(x)))|²."""
        recon = self.generator(self.encoder(x))  # (B, C, S, S)
        pixel = (x - recon).abs().mean(1, keepdim=True)  # (B, 1, S, S)
        feat = (self.critic.features(x) - self.critic.features(recon)).pow(2).mean(1, keepdim=True)
        feat = F.interpolate(feat, size=x.shape[-2:], mode="bilinear", align_corners=False)  # (B, 1, S, S)
        return self._smooth(torch.cat([pixel, feat], 1))

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        z = (self.term_maps(x) - self.term_mean) / self.term_std  # (B, 2, S, S)
        kappa = self.cfg.kappa
        heat = ((z[:, 0] + kappa * z[:, 1]) / (1 + kappa)).clamp(min=0)  # (B, S, S)
        score = heat.flatten(1).topk(self.top_k, dim=1).values.mean(1)  # (B,)
        return score, heat

    @torch.no_grad()
    def fit_standardisation(self, good: torch.Tensor, batch: int = 64) -> None:
        """Sets the per-pixel statistics from held-out known-good images (N, C, S, S), never training images.

        Each pixel's variance is shrunk towards the map-wide variance so a small holdout gives stable values.
        """
        self.eval()
        maps = torch.cat([self.term_maps(good[i : i + batch]) for i in range(0, len(good), batch)])
        n = maps.shape[0]
        mean = maps.mean(0)
        var = maps.var(0, unbiased=n > 1) if n > 1 else torch.zeros_like(mean)
        global_var = var.mean(dim=(1, 2), keepdim=True)
        shrunk = (n * var + SHRINK_PRIOR * global_var) / (n + SHRINK_PRIOR)
        self.term_mean.copy_(mean)
        self.term_std.copy_(shrunk.sqrt().clamp(min=MIN_STD))


def resize_maps(heat: torch.Tensor, sizes: list[tuple[int, int]]) -> list[np.ndarray]:
    """Working-resolution maps (B, S, S) to float32 arrays at each input image's own (H, W)."""
    out = []
    for m, (h, w) in zip(heat, sizes):
        if (h, w) != tuple(m.shape):
            m = F.interpolate(m[None, None], size=(h, w), mode="bilinear", align_corners=False)[0, 0]
        out.append(np.ascontiguousarray(m.numpy(), dtype=np.float32))
    return out
