"""Simple peers for the benchmark, each with one interface and one score direction.

    peer.fit(train)            train: (N, C, S, S) float32 in [0, 1], known-good images only
    peer.score(x) -> (scores, maps)
                               scores (N,) float64, higher = less like the known-good images;
                               maps (N, S, S) float32 (same direction) or None when the peer has no heatmap

They are deliberately plain: a method that cannot beat them on a dataset has not learned anything the raw
pixels did not already say. General-purpose libraries (scikit-learn, PyTorch, NumPy), except the patch memory,
which is the published PatchCore recipe on knowngood's own frozen backbone and memory code: the strongest peer,
and the one that tells whether the GAN adds anything to pretrained features.
"""

from __future__ import annotations

import time

import numpy as np
import torch
import torch.nn.functional as F
from knowngood.training.augment import random_patches
from knowngood.training.config import ModelConfig
from knowngood.training.data import to_model_input
from knowngood.training.memory import as_patches, build_memory, local_average, nearest_distance
from knowngood.training.perceptual import load_pretrained
from knowngood.training.scoring import gaussian_kernel
from knowngood.training.selection import fine_memory_entries
from sklearn.decomposition import PCA
from sklearn.neighbors import NearestNeighbors
from torch import nn


def _resize(x: torch.Tensor, size: int) -> torch.Tensor:
    if x.shape[-1] == size:
        return x
    return F.interpolate(x, size=(size, size), mode="bilinear", antialias=True, align_corners=False)


def _flat(x: torch.Tensor, size: int) -> np.ndarray:
    return _resize(x, size).flatten(1).double().numpy()


class NearestNeighbourPeer:
    """Euclidean distance to the closest known-good image, on pixels downscaled to 32 px (scikit-learn
    `NearestNeighbors`, exact brute-force search). No heatmap."""

    name = "nearest-neighbour"

    def __init__(self, size: int = 32):
        self.size = size

    def fit(self, train: torch.Tensor) -> NearestNeighbourPeer:
        self.nn = NearestNeighbors(n_neighbors=1, algorithm="brute").fit(_flat(train, self.size))
        return self

    def score(self, x: torch.Tensor) -> tuple[np.ndarray, None]:
        dist, _ = self.nn.kneighbors(_flat(x, self.size))
        return dist[:, 0], None


class PCAPeer:
    """Reconstruction error from the principal components explaining 95 % of the known-good variance, on 64 px
    pixels (scikit-learn `PCA`). Score = mean squared residual; map = squared residual upsampled to S."""

    name = "pca"

    def __init__(self, size: int = 64, variance: float = 0.95):
        self.size, self.variance = size, variance

    def fit(self, train: torch.Tensor) -> PCAPeer:
        self.shape = train.shape[1:]
        self.pca = PCA(n_components=self.variance, svd_solver="full").fit(_flat(train, self.size))
        return self

    def score(self, x: torch.Tensor) -> tuple[np.ndarray, np.ndarray]:
        flat = _flat(x, self.size)
        residual = (flat - self.pca.inverse_transform(self.pca.transform(flat))) ** 2
        c = self.shape[0]
        small = torch.from_numpy(residual.reshape(len(x), c, self.size, self.size)).float().mean(1, keepdim=True)
        maps = F.interpolate(small, size=x.shape[-2:], mode="bilinear", align_corners=False)[:, 0]
        return residual.mean(1), maps.numpy()


class MeanGreyPeer:
    """A probe, not a detector: how far an image's mean grey level is from the known-good mean, in known-good
    standard deviations, either way: |mean(x) - mu| / sigma. Shows how much a dataset gives away by brightness."""

    name = "mean-grey"

    def fit(self, train: torch.Tensor) -> MeanGreyPeer:
        means = train.double().mean(dim=(1, 2, 3))
        self.mu, self.sigma = float(means.mean()), max(float(means.std()), 1e-12)
        return self

    def score(self, x: torch.Tensor) -> tuple[np.ndarray, None]:
        means = x.double().mean(dim=(1, 2, 3)).numpy()
        return np.abs(means - self.mu) / self.sigma, None


class PatchMemoryPeer:
    """PatchCore (Roth et al., CVPR 2022) on knowngood's backbone, no GAN: the frozen ImageNet EfficientNet-Lite0
    features of `training.perceptual.load_pretrained`, each position averaged over its 3 x 3 neighbourhood
    (`training.memory.local_average`), the known-good patches subsampled by greedy coreset to a memory of
    `ModelConfig.memory_size` entries (4096, knowngood's default; `training.memory.build_memory`). Map = each
    patch's Euclidean distance to its nearest memory entry (`nearest_distance`), upsampled bilinearly to the
    input size; score = the map's maximum (PatchCore's image score, without its re-weighting by the
    neighbourhood's density or its Gaussian smoothing of the map)."""

    name = "patch-memory"

    def __init__(
        self,
        memory_size: int = ModelConfig.memory_size,
        *,
        seed: int = 0,
        batch: int = 8,
        pool: int = 1,
        feature_scale: int = 1,
    ):
        # batch 8 at 128 px: the distance matrix is 8 x 1024 positions x 4096 entries, 128 MB
        self.memory_size, self.seed, self.batch = memory_size, seed, batch
        # levers (`memory_levers.py`), off by default: the patch features averaged over pool x pool cells (a
        # coarser stride, pool² fewer positions to search), and the images enlarged feature_scale x before the
        # backbone (features at a finer scale of the image, feature_scale² more positions)
        self.pool, self.feature_scale = pool, feature_scale

    def _features(self, x: torch.Tensor) -> torch.Tensor:
        if self.feature_scale != 1:
            x = F.interpolate(x, scale_factor=self.feature_scale, mode="bilinear", align_corners=False)
        phi = local_average(self.net(x))
        return F.avg_pool2d(phi, self.pool) if self.pool > 1 else phi

    @torch.inference_mode()
    def fit(self, train: torch.Tensor) -> PatchMemoryPeer:
        self.net = load_pretrained()
        step = max(1, 32 // self.feature_scale**2)
        patches = torch.cat([as_patches(self._features(train[i : i + step])) for i in range(0, len(train), step)])
        memory = build_memory(patches, self.memory_size, seed=self.seed)
        self.centre = memory.mean(0)  # stored centred, as nearest_distance expects (smaller float32 cancellation)
        self.memory = memory - self.centre
        self.memory_sq = (self.memory * self.memory).sum(1)
        return self

    @torch.inference_mode()
    def score(self, x: torch.Tensor) -> tuple[np.ndarray, np.ndarray]:
        maps, step = [], max(1, self.batch // self.feature_scale**2)  # the same distance matrix size
        for i in range(0, len(x), step):
            phi = self._features(x[i : i + step])  # (B, F, S/4, S/4) by default
            dist = nearest_distance(phi, self.memory, self.memory_sq, self.centre)  # (B, 1, S/4, S/4)
            maps.append(F.interpolate(dist, size=x.shape[-2:], mode="bilinear", align_corners=False)[:, 0])
        m = torch.cat(maps)
        return m.flatten(1).amax(1).double().numpy(), m.numpy()


def _down(c_in: int, c_out: int, norm: bool) -> nn.Sequential:
    layers = [nn.Conv2d(c_in, c_out, 4, stride=2, padding=1)]
    return nn.Sequential(*layers, *([nn.BatchNorm2d(c_out)] if norm else []), nn.LeakyReLU(0.2))


def _up(c_in: int, c_out: int) -> nn.Sequential:
    return nn.Sequential(
        nn.Upsample(scale_factor=2), nn.Conv2d(c_in, c_out, 3, padding=1), nn.BatchNorm2d(c_out), nn.ReLU()
    )


class ConvAutoEncoder(nn.Module):
    """A plain convolutional auto-encoder with the same widths and latent shape as knowngood's encoder and
    generator, so the comparison isolates the training (adversarial + critic features) and the standardisation."""

    def __init__(self, channels: int, width: int = 16, z_channels: int = 8):
        super().__init__()
        w = width
        self.encode = nn.Sequential(
            _down(channels, w, norm=False),  # (B, 16, S/2, S/2)
            _down(w, 2 * w, norm=True),  # (B, 32, S/4, S/4)
            _down(2 * w, 4 * w, norm=True),  # (B, 64, S/8, S/8)
            nn.Conv2d(4 * w, z_channels, 3, padding=1),  # (B, Z, S/8, S/8)
        )
        self.decode = nn.Sequential(
            _up(z_channels, 4 * w),  # (B, 64, S/4, S/4)
            _up(4 * w, 2 * w),  # (B, 32, S/2, S/2)
            _up(2 * w, w),  # (B, 16, S, S)
            nn.Conv2d(w, channels, 3, padding=1),  # (B, C, S, S)
            nn.Sigmoid(),
        )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.decode(self.encode(x * 2 - 1))


class AutoEncoderPeer:
    """`ConvAutoEncoder` trained with MSE (Adam) for a fixed CPU time budget, the same as knowngood's training
    time on that dataset, on the same kind of batches (32 random 64 px crops; the nets are fully convolutional,
    and whole images would give it a quarter of the steps). No augmentation. Map = |x - x̂| averaged over
    channels and Gaussian-smoothed; score = mean of its top `ModelConfig.top_fraction` (knowngood's aggregation,
    so the comparison is about the reconstruction, not the pooling)."""

    name = "autoencoder"

    def __init__(
        self,
        seconds: float,
        *,
        batch: int = 32,
        patch: int = 64,
        lr: float = 1e-3,
        sigma: float = 2.0,
        top_fraction: float = ModelConfig.top_fraction,
        seed: int = 0,
        max_steps: int | None = None,
    ):
        self.seconds, self.batch, self.patch, self.lr, self.seed = seconds, batch, patch, lr, seed
        self.top_fraction, self.max_steps = top_fraction, max_steps
        self.kernel = gaussian_kernel(sigma)
        self.steps_done = 0

    def fit(self, train: torch.Tensor) -> AutoEncoderPeer:
        torch.manual_seed(self.seed)
        gen = torch.Generator().manual_seed(self.seed)
        self.net = ConvAutoEncoder(train.shape[1])
        opt = torch.optim.Adam(self.net.parameters(), lr=self.lr)
        self.net.train()
        start = time.monotonic()
        while time.monotonic() - start < self.seconds and (self.max_steps is None or self.steps_done < self.max_steps):
            x = random_patches(train, self.batch, self.patch, gen)
            loss = F.mse_loss(self.net(x), x)
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
            self.steps_done += 1
        self.net.eval()
        return self

    def _smooth(self, m: torch.Tensor) -> torch.Tensor:
        k, r = self.kernel, self.kernel.numel() // 2
        m = F.conv2d(F.pad(m, (r, r, 0, 0), mode="replicate"), k.view(1, 1, 1, -1))
        return F.conv2d(F.pad(m, (0, 0, r, r), mode="replicate"), k.view(1, 1, -1, 1))

    @torch.inference_mode()
    def score(self, x: torch.Tensor) -> tuple[np.ndarray, np.ndarray]:
        maps = []
        for i in range(0, len(x), 64):
            xb = x[i : i + 64]
            maps.append(self._smooth((xb - self.net(xb)).abs().mean(1, keepdim=True))[:, 0])
        m = torch.cat(maps)
        k = max(1, int(round(self.top_fraction * m[0].numel())))
        return m.flatten(1).topk(k, dim=1).values.mean(1).double().numpy(), m.numpy()


def simple_peers() -> list:
    """The peers that need no time budget, in table order."""
    return [PatchMemoryPeer(), NearestNeighbourPeer(), PCAPeer(), MeanGreyPeer()]


def patch_memory_at(shape: tuple[int, int], train: list[np.ndarray], channels: int) -> PatchMemoryPeer:
    """The patch-memory peer fitted on `train` at a working `shape` (H, W) other than 128 px (knowngood's own, where
    `train` chose a larger one), its memory as large as knowngood's 4 px memory there (`fine_memory_entries`): as
    many entries per image position as at 128 px."""
    peer = PatchMemoryPeer(fine_memory_entries(ModelConfig.memory_size, shape))
    return peer.fit(to_model_input(train, size=shape, channels=channels))
