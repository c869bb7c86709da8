"""Training batches: random patches and augmentation that mimics process variation, never defects."""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F


def random_patches(x: torch.Tensor, n: int, patch: int, gen: torch.Generator) -> torch.Tensor:
    """n random (C, patch, patch) crops from random images of x (N, C, H, W); patch >= H = W returns whole images."""
    idx = torch.randint(len(x), (n,), generator=gen)
    h, w = x.shape[-2:]
    if patch >= h and patch >= w:
        return x[idx]
    ys = torch.randint(h - patch + 1, (n,), generator=gen)
    xs = torch.randint(w - patch + 1, (n,), generator=gen)
    return torch.stack([x[i, :, y : y + patch, c : c + patch] for i, y, c in zip(idx, ys, xs)])


def process_variation(
    x: torch.Tensor, gen: torch.Generator, *, shift: float = 0.03, degrees: float = 3.0, brightness: float = 0.05
) -> torch.Tensor:
    """Small shifts (share of the side), rotations and brightness/contrast changes, per image.

    These are what a fixture, a lamp or a material lot change; defects are local, so none of this makes one.
    """
    b = len(x)
    angle = (torch.rand(b, generator=gen) * 2 - 1) * math.radians(degrees)
    t = (torch.rand(b, 2, generator=gen) * 2 - 1) * shift * 2  # affine_grid units: side = 2
    cos, sin = torch.cos(angle), torch.sin(angle)
    theta = torch.stack([torch.stack([cos, -sin, t[:, 0]], 1), torch.stack([sin, cos, t[:, 1]], 1)], 1)
    grid = F.affine_grid(theta, list(x.shape), align_corners=False)
    out = F.grid_sample(x, grid, mode="bilinear", padding_mode="reflection", align_corners=False)
    gain = 1 + (torch.rand(b, 1, 1, 1, generator=gen) * 2 - 1) * brightness
    offset = (torch.rand(b, 1, 1, 1, generator=gen) * 2 - 1) * brightness / 2
    return (out * gain + offset).clamp(0, 1)
