"""The heatmap overlay PNG for people, drawn on request from a stored or fresh working-resolution map."""

from __future__ import annotations

import functools

import numpy as np
import torch
import torch.nn.functional as F
from knowngood.training.heatmap import heatmap_png_bytes

MAX_SIDE = 2048  # overlays of larger images are drawn scaled down to this long side (a PNG for eyes, not machines)


def vmax_for(threshold: float, heat: np.ndarray) -> float:
    """Colour scale: full tint at twice the threshold, as `knowngood inspect --heatmaps` draws it; with a threshold
    of 0 (everything flagged) the map's own maximum, so the overlay still shows where the heat is."""
    if np.isfinite(threshold) and threshold > 0:
        return 2 * threshold
    return max(float(np.nanmax(heat, initial=0.0)), 1e-6)


def overlay_size(height: int, width: int) -> tuple[int, int]:
    """The overlay's (height, width): the input image's, scaled down to MAX_SIDE on the long side."""
    scale = min(1.0, MAX_SIDE / max(height, width))
    return max(1, round(height * scale)), max(1, round(width * scale))


def overlay_base(image: np.ndarray) -> np.ndarray:
    """(C, H, W) -> the image at `overlay_size`: what an overlay needs of a large image, so the full-size one need
    not be kept while the batch is scored."""
    return _resize(torch.from_numpy(np.ascontiguousarray(image, dtype=np.float32)), overlay_size(*image.shape[-2:]))


def overlay_png(image: np.ndarray, heat: np.ndarray, *, height: int, width: int, threshold: float) -> bytes:
    """image (C, h, w) in [0, 1] at any size, heat (S, S) at the model's working resolution -> PNG of the overlay at
    the input image's (height, width), scaled down to MAX_SIDE on the long side."""
    size = overlay_size(height, width)
    img = _resize(torch.from_numpy(np.ascontiguousarray(image, dtype=np.float32)), size)
    hm = _resize(torch.from_numpy(np.ascontiguousarray(heat, dtype=np.float32))[None], size)[0]
    return heatmap_png_bytes(img, hm, vmax_for(threshold, hm))


@functools.cache
def legend_png(steps: int = 256) -> bytes:
    """The overlays' colour scale as a (1, steps) PNG: heat from 0 (left) to full tint (right) on a mid-grey part,
    drawn by the function that draws every overlay, so the page's legend cannot drift from the overlays."""
    ramp = np.linspace(0, 1, steps, dtype=np.float32)[None]  # (1, steps)
    grey = np.full((1, 1, steps), 0.5, dtype=np.float32)  # (C=1, 1, steps)
    return heatmap_png_bytes(grey, ramp, 1.0)


def _resize(t: torch.Tensor, size: tuple[int, int]) -> np.ndarray:
    if tuple(t.shape[-2:]) != size:
        t = F.interpolate(t[None], size=size, mode="bilinear", align_corners=False, antialias=True)[0]
    return t.numpy()
