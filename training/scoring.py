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
from training.perceptual import PerceptualNet

SHRINK_PRIOR = 10.0  # pseudo-images of the global variance mixed into each pixel's variance (small holdouts)
MIN_STD = 1e-4


def gaussian_kernel(sigma: float) -> torch.Tensor:
    """1-D normalised Gaussian taps, radius 3 sigma."""
    radius = max(1, int(math.ceil(3 * sigma)))
    x = torch.arange(-radius, radius + 1, dtype=torch.float32)
    k = torch.exp(-0.5 * (x / sigma) ** 2)
    return k / k.sum()


def shifted_views(t: torch.Tensor, r: int) -> list[torch.Tensor]:
    """The (2r + 1)² views of t (B, C, H, W) moved by -r..r positions each way, edges replicated."""
    if r == 0:
        return [t]
    h, w = t.shape[-2:]
    padded = F.pad(t, (r, r, r, r), mode="replicate")
    return [padded[..., dy : dy + h, dx : dx + w] for dy in range(2 * r + 1) for dx in range(2 * r + 1)]


def _min_over(maps: list[torch.Tensor]) -> torch.Tensor:
    best = maps[0]
    for m in maps[1:]:
        best = torch.minimum(best, m)
    return best


def pixel_residual(x: torch.Tensor, recon: torch.Tensor, shift: int) -> torch.Tensor:
    """(B, 1, H, W): |x - recon| averaged over colour, at the best-matching reconstruction pixel within `shift`
    px. An edge the reconstruction draws a pixel off (fixture jitter) then costs nothing, while a pit or scratch
    the reconstruction leaves out differs from every nearby reconstruction pixel and still shows."""
    return _min_over([(x - r).abs().mean(1, keepdim=True) for r in shifted_views(recon, shift)])


def _shrunk_std(samples: torch.Tensor) -> torch.Tensor:
    """Per-position std over samples (N, T, H, W) -> (T, H, W), each position's variance shrunk towards the
    map-wide variance of its channel, so a small holdout gives stable values."""
    n = samples.shape[0]
    var = samples.var(0, unbiased=n > 1) if n > 1 else torch.zeros_like(samples[0])
    global_var = var.mean(dim=(1, 2), keepdim=True)
    return ((n * var + SHRINK_PRIOR * global_var) / (n + SHRINK_PRIOR)).sqrt().clamp(min=MIN_STD)


class ScoringGraph(nn.Module):
    """The whole inference path as one module (exportable to ONNX): x (B, C, S, S) in [0, 1] -> anomaly score
    (B,), higher = less like known-good, standardised heatmap (B, S, S) and the drift embedding (B, F).

    Terms: (0) image residual (shift-tolerant, `pixel_residual`), (1) critic-feature residual, (2) when
    `perceptual` is given, the perceptual term: how far the pretrained features of x lie from those of known-good
    images at the same place. Each is standardised per pixel; the heatmap is their weighted maximum (weights 1,
    kappa, perceptual), because the terms see different defects (the GAN terms texture flaws, the perceptual term
    shape and shading ones) and a sum dilutes whichever one alone sees the defect (measured: README, "The method").
    """

    def __init__(
        self,
        cfg: ModelConfig,
        encoder: Encoder,
        generator: Generator,
        critic: Critic,
        perceptual: PerceptualNet | None = None,
    ):
        super().__init__()
        assert (perceptual is None) == (cfg.perceptual == 0), "a perceptual net exactly when cfg weights its term"
        self.cfg = cfg
        self.encoder, self.generator, self.critic, self.perceptual = encoder, generator, critic, perceptual
        self.register_buffer("kernel", gaussian_kernel(cfg.smooth_sigma), persistent=False)
        weights = [1.0, cfg.kappa] + ([cfg.perceptual] if perceptual is not None else [])
        self.register_buffer("weights", torch.tensor(weights).view(1, -1, 1, 1), persistent=False)
        s, n_terms = cfg.size, len(weights)
        if perceptual is not None:
            # per-position mean and std of the pretrained features of known-good images, at 1/4 of the side
            c, side = perceptual.channels, perceptual.side(s)
            self.register_buffer("feature_mean", torch.zeros(c, side, side))
            self.register_buffer("feature_std", torch.ones(c, side, side))
        # per-pixel mean and std of the smoothed term maps on held-out known-good images
        self.register_buffer("term_mean", torch.zeros(n_terms, s, s))
        self.register_buffer("term_std", torch.ones(n_terms, s, s))
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
        return self._terms(x)[0]

    def _terms(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """(B, T, S, S) smoothed raw terms: |x - G(E(x))| at the best-matching reconstruction pixel within
        `residual_shift` px, |f(x) - f(G(E(x)))|² and, with a perceptual net, the mean squared standardised
        deviation of its features from the known-good ones at each position; and f(x), which the embedding
        continues from."""
        size = x.shape[-2:]
        recon = self.generator(self.encoder(x))  # (B, C, S, S)
        pixel = pixel_residual(x, recon, self.cfg.residual_shift)  # (B, 1, S, S)
        fx = self.critic.features(x)
        feat = (fx - self.critic.features(recon)).pow(2).mean(1, keepdim=True)
        terms = [pixel, F.interpolate(feat, size=size, mode="bilinear", align_corners=False)]  # (B, 1, S, S) each
        if self.perceptual is not None:
            dev = self._deviation(self.perceptual(x))  # (B, 1, S/4, S/4)
            terms.append(F.interpolate(dev, size=size, mode="bilinear", align_corners=False))  # (B, 1, S, S)
        return self._smooth(torch.cat(terms, 1)), fx

    def _deviation(self, feats: torch.Tensor) -> torch.Tensor:
        """(B, F, h, w) features -> (B, 1, h, w): the mean squared standardised distance to the known-good
        statistics of the best-matching position within `perceptual_shift` cells, so that the few pixels a
        part moves in its fixture do not count as a defect at every edge."""
        r = self.cfg.perceptual_shift
        means = shifted_views(self.feature_mean[None], r)  # (1, F, h, w) each
        stds = shifted_views(self.feature_std[None], r)
        return _min_over([((feats - m) / s).pow(2).mean(1, keepdim=True) for m, s in zip(means, stds)])

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """-> score (B,), heat (B, S, S) and the pooled critic features (B, F) that drift is measured in, which
        come almost free here: they continue from the f(x) the feature residual already computed."""
        maps, fx = self._terms(x)
        z = (maps - self.term_mean) / self.term_std  # (B, T, S, S)
        heat = (z * self.weights).amax(1).clamp(min=0)  # (B, S, S): the strongest evidence at each pixel
        score = heat.flatten(1).topk(self.top_k, dim=1).values.mean(1)  # (B,)
        return score, heat, self.critic.pool_from(fx)

    @torch.no_grad()
    def fit_features(self, good: torch.Tensor, batch: int = 64) -> None:
        """Sets the perceptual term's per-position feature statistics from known-good images (N, C, S, S).

        The pretrained net never learns from them, so the training images themselves may be used here."""
        if self.perceptual is None:
            return
        feats = torch.cat([self.perceptual(good[i : i + batch]) for i in range(0, len(good), batch)])
        self.feature_mean.copy_(feats.mean(0))
        self.feature_std.copy_(_shrunk_std(feats))

    @torch.no_grad()
    def fit_standardisation(self, good: torch.Tensor, batch: int = 64) -> None:
        """Sets the per-pixel statistics from held-out known-good images (N, C, S, S), never training images."""
        self.eval()
        maps = torch.cat([self.term_maps(good[i : i + batch]) for i in range(0, len(good), batch)])
        self.term_mean.copy_(maps.mean(0))
        self.term_std.copy_(_shrunk_std(maps))


def resize_maps(heat: torch.Tensor, sizes: list[tuple[int, int]]) -> list[np.ndarray]:
    """Working-resolution maps (B, S, S) to float32 arrays at each input image's own (H, W)."""
    out = []
    for m, (h, w) in zip(heat, sizes):
        if (h, w) != tuple(m.shape):
            m = F.interpolate(m[None, None], size=(h, w), mode="bilinear", align_corners=False)[0, 0]
        out.append(np.ascontiguousarray(m.numpy(), dtype=np.float32))
    return out
