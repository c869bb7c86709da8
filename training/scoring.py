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
from knowngood.training.config import ModelConfig
from knowngood.training.feature_critic import FeatureCritic
from knowngood.training.memory import build_memory, memory_features, nearest_distance, patch_features
from knowngood.training.nets import Critic, Encoder, Generator
from knowngood.training.perceptual import PerceptualNet
from torch import nn

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


TERMS = ("pixel", "critic", "perceptual", "memory", "adversarial")  # the order of the term maps, active ones only


def term_weights(cfg: ModelConfig) -> dict[str, float]:
    """{term: weight in the heatmap (`combine`)} for the terms the model computes (weight > 0)."""
    weights = {
        "pixel": cfg.pixel,
        "critic": cfg.kappa,
        "perceptual": cfg.perceptual,
        "memory": cfg.memory,
        "adversarial": cfg.adversarial,
    }
    return {name: w for name, w in weights.items() if w > 0}


PASS_BYTES = 128 * 2**20  # the memory term's distance matrix in one forward pass of training's scoring


def images_per_pass(cfg: ModelConfig, most: int, budget: int = PASS_BYTES) -> int:
    """Images per forward pass: `most`, fewer where the memory term's distance matrix (positions x entries
    float32 per image) would pass `budget` bytes, at least one. At 128 px (1024 positions x 4096 entries, 16 MiB
    an image) 8 fit the default budget; a 256 px model with 16384 entries (256 MiB an image) goes one by one."""
    if cfg.memory <= 0:
        return most
    h, w = cfg.shape
    stride = 4 * cfg.memory_pool  # px between the memory's patches
    per_image = (h // stride) * (w // stride) * cfg.memory_size * 4
    return int(max(1, min(most, budget // per_image)))


class ScoringGraph(nn.Module):
    """The whole inference path as one module (exportable to ONNX): x (B, C, H, W) in [0, 1] -> anomaly score
    (B,), higher = less like known-good, standardised heatmap (B, H, W) and the drift embedding (B, F).

    Terms (`TERMS`; a term with weight 0 is not computed): the GAN's image residual (shift-tolerant,
    `pixel_residual`) and critic-feature residual; with the pretrained net, the per-position term (how far the
    features of x lie from those of known-good images at the same place), the position-free term (how far
    each patch's features lie from the nearest known-good patch anywhere: `memory.py`) and the feature-space
    adversarial term (a critic on the pretrained features: `feature_critic.py`). Each is standardised
    per pixel; the heatmap is their weighted maximum (`combine` "max": the terms see different defects and a
    sum dilutes whichever one alone sees the defect) or their weighted mean ("mean": terms that each see a
    defect weakly add up, and one term's noise is damped), as chosen per model (`selection.py`; measured:
    README, "The method").
    """

    def __init__(
        self,
        cfg: ModelConfig,
        encoder: Encoder,
        generator: Generator,
        critic: Critic,
        perceptual: PerceptualNet | None = None,
        feature_critic: FeatureCritic | None = None,
    ):
        super().__init__()
        assert (perceptual is None) == (not cfg.pretrained), "a pretrained net exactly when a term uses it"
        self.cfg = cfg
        self.encoder, self.generator, self.critic, self.perceptual = encoder, generator, critic, perceptual
        if cfg.adversarial > 0:
            self.feature_critic = feature_critic or FeatureCritic(perceptual.channels)
        self.register_buffer("kernel", gaussian_kernel(cfg.smooth_sigma), persistent=False)
        self.terms = term_weights(cfg)
        self.register_buffer("weights", torch.tensor(list(self.terms.values())).view(1, -1, 1, 1), persistent=False)
        h, w = cfg.shape
        if perceptual is not None:
            fh, fw = perceptual.side(h), perceptual.side(w)
            if cfg.perceptual > 0:
                # per-position mean and std of the pretrained features of known-good images, at 1/4 of the side
                self.register_buffer("feature_mean", torch.zeros(perceptual.channels, fh, fw))
                self.register_buffer("feature_std", torch.ones(perceptual.channels, fh, fw))
            if cfg.memory > 0:
                self.register_buffer("memory", torch.zeros(cfg.memory_size, perceptual.channels))
                self.register_buffer("memory_sq", torch.zeros(cfg.memory_size))
                self.register_buffer("memory_centre", torch.zeros(perceptual.channels))
        # per-pixel mean and std of the smoothed term maps on held-out known-good images
        self.register_buffer("term_mean", torch.zeros(len(self.terms), h, w))
        self.register_buffer("term_std", torch.ones(len(self.terms), h, w))
        self.top_k = max(1, int(round(cfg.top_fraction * h * w)))

    def _smooth(self, m: torch.Tensor) -> torch.Tensor:
        k = self.kernel
        r = k.numel() // 2
        b, c, h, w = m.shape
        m = m.reshape(b * c, 1, h, w)  # separable Gaussian, each term map on its own
        m = F.conv2d(F.pad(m, (r, r, 0, 0), mode="replicate"), k.view(1, 1, 1, -1))
        m = F.conv2d(F.pad(m, (0, 0, r, r), mode="replicate"), k.view(1, 1, -1, 1))
        return m.reshape(b, c, h, w)

    def term_maps(self, x: torch.Tensor) -> torch.Tensor:
        """(B, T, H, W) smoothed raw term maps, in the order of `self.terms`."""
        return self._terms(x)[0]

    def _terms(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """(B, T, H, W) smoothed raw terms: |x - G(E(x))| at the best-matching reconstruction pixel within
        `residual_shift` px, |f(x) - f(G(E(x)))|², the mean squared standardised deviation of the pretrained
        features from the known-good ones at each position, and the distance of each patch's features to the
        nearest known-good patch; and f(x), which the embedding continues from."""
        size = x.shape[-2:]
        fx = self.critic.features(x)
        maps = []
        if "pixel" in self.terms or "critic" in self.terms:
            recon = self.generator(self.encoder(x))  # (B, C, H, W)
            if "pixel" in self.terms:
                maps.append(pixel_residual(x, recon, self.cfg.residual_shift))  # (B, 1, H, W)
            if "critic" in self.terms:
                feat = (fx - self.critic.features(recon)).pow(2).mean(1, keepdim=True)
                maps.append(F.interpolate(feat, size=size, mode="bilinear", align_corners=False))
        if self.perceptual is not None:
            phi = self.perceptual(x)  # (B, F, H/4, W/4)
            coarse = []
            if "perceptual" in self.terms:
                coarse.append(self._deviation(phi))
            if "memory" in self.terms:
                coarse.append(self._memory_distance(phi))
            if "adversarial" in self.terms:
                coarse.append(self.feature_critic(phi))
            maps.append(F.interpolate(torch.cat(coarse, 1), size=size, mode="bilinear", align_corners=False))
        return self._smooth(torch.cat(maps, 1)), fx

    def _memory_distance(self, phi: torch.Tensor) -> torch.Tensor:
        """(B, F, h, w) features -> (B, 1, h, w): each patch's distance to the nearest memory entry; a pooled
        memory (`memory_pool` 2) searches every 8 px and its map is brought back to the feature grid."""
        dist = nearest_distance(
            memory_features(phi, self.cfg.memory_pool), self.memory, self.memory_sq, self.memory_centre
        )
        if self.cfg.memory_pool > 1:
            dist = F.interpolate(dist, size=phi.shape[-2:], mode="bilinear", align_corners=False)
        return dist

    def _deviation(self, feats: torch.Tensor) -> torch.Tensor:
        """(B, F, h, w) features -> (B, 1, h, w): the mean squared standardised distance to the known-good
        statistics of the best-matching position within `perceptual_shift` cells, so that the few pixels a
        part moves in its fixture do not count as a defect at every edge."""
        r = self.cfg.perceptual_shift
        means = shifted_views(self.feature_mean[None], r)  # (1, F, h, w) each
        stds = shifted_views(self.feature_std[None], r)
        return _min_over([((feats - m) / s).pow(2).mean(1, keepdim=True) for m, s in zip(means, stds)])

    def heat_from(self, maps: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Raw term maps (B, T, H, W) -> (score (B,), heatmap (B, H, W)); higher = less like known-good."""
        z = (maps - self.term_mean) / self.term_std * self.weights  # (B, T, H, W)
        if self.cfg.combine == "mean":  # terms that each see part of a defect add up; one term's noise is damped
            heat = (z.sum(1) / self.weights.sum()).clamp(min=0)
        else:  # the strongest evidence at each pixel: a defect only one term sees is not diluted
            heat = z.amax(1).clamp(min=0)  # (B, H, W)
        score = heat.flatten(1).topk(self.top_k, dim=1).values.mean(1)  # (B,)
        return score, heat

    def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
        """-> score (B,), heat (B, H, W) and the pooled critic features (B, F) that drift is measured in, which
        come almost free here: they continue from the f(x) the feature residual already computed."""
        maps, fx = self._terms(x)
        score, heat = self.heat_from(maps)
        return score, heat, self.critic.pool_from(fx)

    @torch.no_grad()
    def pretrained_features(self, x: torch.Tensor, batch: int = 32) -> torch.Tensor:
        """(N, C, H, W) images -> (N, F, H/4, W/4) frozen pretrained features."""
        return torch.cat([self.perceptual(x[i : i + batch]) for i in range(0, len(x), batch)])

    @torch.no_grad()
    def fit_features(
        self, good: torch.Tensor, batch: int = 32, seed: int = 0, feats: torch.Tensor | None = None
    ) -> None:
        """Sets the pretrained terms' reference from known-good images (N, C, H, W): the per-position feature
        statistics and the coreset memory of patch features (`feats`: their pretrained features, if at hand).

        The pretrained net never learns from them, so the training images themselves may be used here."""
        if self.perceptual is None:
            return
        feats = self.pretrained_features(good, batch) if feats is None else feats
        if "perceptual" in self.terms:
            self.feature_mean.copy_(feats.mean(0))
            self.feature_std.copy_(_shrunk_std(feats))
        if "memory" in self.terms:
            patches = patch_features(feats, batch, pool=self.cfg.memory_pool)
            memory = build_memory(patches, self.cfg.memory_size, seed=seed)
            if len(memory) < self.cfg.memory_size:  # fewer patches than places: repeat, the minimum is the same
                memory = memory[torch.arange(self.cfg.memory_size) % len(memory)]
            centre = memory.mean(0)
            self.memory_centre.copy_(centre)
            self.memory.copy_(memory - centre)
            self.memory_sq.copy_((self.memory * self.memory).sum(1))

    @torch.no_grad()
    def fit_standardisation(self, good: torch.Tensor, batch: int | None = None) -> None:
        """Sets the per-pixel statistics from held-out known-good images (N, C, H, W), never training images.
        A tiled model's tiles come from anywhere in the image, so its statistics are one per term, not per pixel.
        Batches of at most 8 (`images_per_pass`): the memory term's distance matrix is batch x positions x entries
        floats (8 x 1024 x 4096 at 128 px: 134 MB, with its temporaries a few times that), which set training's
        peak memory at batch 32."""
        self.eval()
        batch = batch or images_per_pass(self.cfg, most=8)
        maps = torch.cat([self.term_maps(good[i : i + batch]) for i in range(0, len(good), batch)])
        mean, std = maps.mean(0), _shrunk_std(maps)
        if self.cfg.tile:
            mean = mean.mean((1, 2), keepdim=True).expand_as(mean)
            std = maps.transpose(0, 1).flatten(1).std(1).clamp(min=MIN_STD)[:, None, None].expand_as(std)
        self.term_mean.copy_(mean)
        self.term_std.copy_(std)


def resize_maps(heat: torch.Tensor, sizes: list[tuple[int, int]]) -> list[np.ndarray]:
    """Working-resolution maps (B, h, w) to float32 arrays at each input image's own (H, W)."""
    out = []
    for m, (h, w) in zip(heat, sizes):
        if (h, w) != tuple(m.shape):
            m = F.interpolate(m[None, None], size=(h, w), mode="bilinear", align_corners=False)[0, 0]
        out.append(np.ascontiguousarray(m.numpy(), dtype=np.float32))
    return out
