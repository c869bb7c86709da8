"""Generator, encoder and critic: small, fully convolutional DCGAN-style networks sized by one ModelConfig.

The latent is spatial (z_channels x size/8 x size/8), so the same weights work on training patches and on
whole images; shapes in the comments are for a 128 px grayscale input with the default widths.
"""

from __future__ import annotations

import torch
from knowngood.training.config import ModelConfig
from torch import nn


def _down(c_in: int, c_out: int, norm: bool) -> nn.Sequential:
    layers: list[nn.Module] = [nn.Conv2d(c_in, c_out, 4, stride=2, padding=1, bias=not norm)]
    if norm:
        layers.append(nn.BatchNorm2d(c_out))
    layers.append(nn.LeakyReLU(0.2, inplace=True))
    return nn.Sequential(*layers)


def _up(c_in: int, c_out: int) -> nn.Sequential:
    # nearest upsampling + conv instead of a transposed conv: no checkerboard pattern in the residual
    return nn.Sequential(
        nn.Upsample(scale_factor=2, mode="nearest"),
        nn.Conv2d(c_in, c_out, 3, padding=1, bias=False),
        nn.BatchNorm2d(c_out),
        nn.ReLU(inplace=True),
    )


class Encoder(nn.Module):
    """E(x): image (B, C, S, S) in [0, 1] to latent (B, Z, S/8, S/8) in [-1, 1]."""

    def __init__(self, cfg: ModelConfig):
        super().__init__()
        w = cfg.width
        self.blocks = nn.Sequential(
            _down(cfg.channels, w, norm=False),  # (B, 16, 64, 64)
            _down(w, 2 * w, norm=True),  # (B, 32, 32, 32)
            _down(2 * w, 4 * w, norm=True),  # (B, 64, 16, 16)
            nn.Conv2d(4 * w, cfg.z_channels, 3, padding=1),  # (B, Z, 16, 16)
            nn.Tanh(),
        )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.blocks(x * 2 - 1)


class Generator(nn.Module):
    """G(z): latent (B, Z, S/8, S/8) to image (B, C, S, S) in [0, 1]."""

    def __init__(self, cfg: ModelConfig):
        super().__init__()
        w = cfg.width
        self.blocks = nn.Sequential(
            nn.Conv2d(cfg.z_channels, 4 * w, 3, padding=1, bias=False),
            nn.BatchNorm2d(4 * w),
            nn.ReLU(inplace=True),  # (B, 64, 16, 16)
            _up(4 * w, 2 * w),  # (B, 32, 32, 32)
            _up(2 * w, w),  # (B, 16, 64, 64)
            nn.Upsample(scale_factor=2, mode="bilinear", align_corners=False),  # (B, 16, 128, 128)
            nn.Conv2d(w, cfg.channels, 3, padding=1),  # (B, C, 128, 128)
            nn.Sigmoid(),
        )

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        return self.blocks(z)


class Critic(nn.Module):
    """D(x): WGAN critic, no batch norm (the gradient penalty is per sample). Patch output (B, 1, S/16, S/16).

    `features(x)` returns the output of block `cfg.feature_layer` (1-based): the f(x) of the feature residual.
    """

    def __init__(self, cfg: ModelConfig):
        super().__init__()
        w = cfg.width
        self.feature_layer = cfg.feature_layer
        self.blocks = nn.ModuleList(
            [
                _down(cfg.channels, w, norm=False),  # (B, 16, 64, 64)
                _down(w, 2 * w, norm=False),  # (B, 32, 32, 32)
                _down(2 * w, 4 * w, norm=False),  # (B, 64, 16, 16)
                _down(4 * w, 8 * w, norm=False),  # (B, 128, 8, 8)
            ]
        )
        self.head = nn.Conv2d(8 * w, 1, 3, padding=1)  # (B, 1, 8, 8)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = x * 2 - 1
        for block in self.blocks:
            h = block(h)
        return self.head(h)

    def features(self, x: torch.Tensor) -> torch.Tensor:
        """f(x): (B, F, S / 2^k, S / 2^k) for k = feature_layer."""
        h = x * 2 - 1
        for block in self.blocks[: self.feature_layer]:
            h = block(h)
        return h

    def pooled_features(self, x: torch.Tensor) -> torch.Tensor:
        """(B, 8w): spatial mean of the last block, the embedding used for Fréchet distances."""
        return self.pool_from(self.features(x))

    def pool_from(self, f: torch.Tensor) -> torch.Tensor:
        """`pooled_features` from f(x), the output of `features`: the blocks after it, then the spatial mean."""
        h = f
        for block in self.blocks[self.feature_layer :]:
            h = block(h)
        return h.mean(dim=(2, 3))


def init_weights(module: nn.Module) -> None:
    """DCGAN initialisation (Radford et al. 2016): conv N(0, 0.02), batch-norm scale N(1, 0.02)."""
    if isinstance(module, nn.Conv2d):
        nn.init.normal_(module.weight, 0.0, 0.02)
        if module.bias is not None:
            nn.init.zeros_(module.bias)
    elif isinstance(module, nn.BatchNorm2d):
        nn.init.normal_(module.weight, 1.0, 0.02)
        nn.init.zeros_(module.bias)


def build(cfg: ModelConfig) -> tuple[Encoder, Generator, Critic]:
    nets = Encoder(cfg), Generator(cfg), Critic(cfg)
    for net in nets:
        net.apply(init_weights)
    return nets
