"""The drift section's images: fresh known-good demo images no training or holdout set holds, the changes the
monitor must notice (brighter, blurred, shifted), each through a camera file (PNG, 8 bits) as the service gets it.
"""

from __future__ import annotations

import io

import numpy as np
from knowngood.demo_parts.render import render
from knowngood.demo_parts.scenario import image_rng
from knowngood.training.data import decode_image
from PIL import Image
from scipy import ndimage

FRESH_SPLIT = 9  # scenario.image_rng's split key; render_scenario uses 0 (train), 1 (holdout good), 2 (defective)
GAIN, BLUR_SIGMA, SHIFT_PX = 1.15, 1.5, 4
SIZE = 128  # the demo sets' render size


def camera(pixels: np.ndarray) -> np.ndarray:
    """uint8 (H, W) or (H, W, 3) -> a PNG file -> (C, H, W) float32 as the service decodes an upload."""
    buf = io.BytesIO()
    Image.fromarray(pixels).save(buf, format="PNG")
    return decode_image(buf.getvalue(), name="frame.png")


def to_pixels(image: np.ndarray) -> np.ndarray:
    """(C, H, W) float in [0, 1] (clipped, as a sensor saturates) -> uint8 (H, W) or (H, W, 3)."""
    pixels = np.round(np.clip(image, 0, 1) * 255).astype(np.uint8)
    return pixels[0] if pixels.shape[0] == 1 else np.ascontiguousarray(pixels.transpose(1, 2, 0))


def render_fresh(kind: str, n: int, *, start: int = 0, size: int = SIZE, seed: int = 0) -> list[np.ndarray]:
    """n known-good images of `kind` that no training or holdout set of `render_scenario(seed=seed)` holds."""
    return [camera(render(kind, None, image_rng(seed, kind, FRESH_SPLIT, 0, start + i), size).image) for i in range(n)]


def brighter(image: np.ndarray, gain: float = GAIN) -> np.ndarray:
    return image * gain


def blurred(image: np.ndarray, sigma: float = BLUR_SIGMA) -> np.ndarray:
    return ndimage.gaussian_filter(image, (0, sigma, sigma), mode="nearest")


def shifted(image: np.ndarray, px: int = SHIFT_PX) -> np.ndarray:
    """The scene moved px right and down; the uncovered edge repeats the edge pixels."""
    h, w = image.shape[-2:]
    return np.pad(image, ((0, 0), (px, 0), (px, 0)), mode="edge")[:, :h, :w]


TRANSFORMS = {"brightness": brighter, "blur": blurred, "shift": shifted}


def changed(images: list[np.ndarray], how: str) -> list[np.ndarray]:
    """The images with one change applied, each through a camera file again."""
    return [camera(to_pixels(TRANSFORMS[how](im))) for im in images]
