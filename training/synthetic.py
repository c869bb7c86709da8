"""Synthetic defects pasted into held-out known-good images, to choose a model's terms without any real defect.

Six kinds of mask, each filled with another image's content, a brightness change or a noise texture, blended at
a random opacity:
- CutPaste (Li et al., CVPR 2021): a rectangle cut from another known-good image, optionally flipped and with its
  brightness changed, pasted at a random place; and its "scar" variant, a thin rotated strip;
- Perlin-noise masks (Zavrtanik et al., DRAEM, ICCV 2021): a blob of thresholded Perlin noise;
- three of our own, for the commonest defects the three above leave out (common practice: cracks and large
  discoloured or inactive areas are everyday defects of cast, sintered and laminated parts and of solar cells): a
  crack, a thin line whose direction wanders; a large Perlin area of 15-35 % of the side; and a region cut off by
  a wandering edge, 10-45 % of the image (a side of the part inactive, shaded or discoloured).
Strengths run from faint to obvious, so the choice is made on defects near the limit of what a model sees, not
only on ones every term catches (model selection on synthetic anomalies: Fung et al. 2023).
"""

from __future__ import annotations

import math

import numpy as np
import torch


def perlin(shape: tuple[int, int], cells: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    """2-D Perlin gradient noise (Perlin 1985/2002) in about [-1, 1], `cells` lattice cells along each axis."""
    h, w = shape
    gy, gx = cells
    angles = rng.uniform(0, 2 * math.pi, (gy + 1, gx + 1))
    grads = np.stack([np.cos(angles), np.sin(angles)], -1)
    y = np.linspace(0, gy, h, endpoint=False)
    x = np.linspace(0, gx, w, endpoint=False)
    yi, xi = np.floor(y).astype(int), np.floor(x).astype(int)
    yf, xf = (y - yi)[:, None], (x - xi)[None, :]

    def dot(oy: int, ox: int) -> np.ndarray:
        g = grads[(yi + oy)[:, None], (xi + ox)[None, :]]  # (h, w, 2)
        return g[..., 0] * (yf - oy) + g[..., 1] * (xf - ox)

    fade_y, fade_x = (6 * t**5 - 15 * t**4 + 10 * t**3 for t in (yf, xf))
    top = dot(0, 0) * (1 - fade_x) + dot(0, 1) * fade_x
    bottom = dot(1, 0) * (1 - fade_x) + dot(1, 1) * fade_x
    return (top * (1 - fade_y) + bottom * fade_y) * math.sqrt(2)


def _ellipse(shape: tuple[int, int], rng: np.random.Generator, radius: tuple[float, float]) -> np.ndarray:
    h, w = shape
    cy, cx = rng.uniform(0.1, 0.9) * h, rng.uniform(0.1, 0.9) * w
    ry, rx = (rng.uniform(*radius) * min(h, w) for _ in range(2))
    yy, xx = np.mgrid[0:h, 0:w]
    return ((yy - cy) / ry) ** 2 + ((xx - cx) / rx) ** 2 <= 1


def perlin_mask(
    shape: tuple[int, int], rng: np.random.Generator, radius: tuple[float, float] = (0.04, 0.15)
) -> np.ndarray:
    """A local blob: thresholded Perlin noise inside a random ellipse (so a defect is local, not all over)."""
    for _ in range(10):
        cells = tuple(int(2 ** rng.integers(1, 5)) for _ in range(2))
        noise = perlin(shape, cells, rng)
        mask = (noise > rng.uniform(0.1, 0.4)) & _ellipse(shape, rng, radius)
        if mask.sum() >= 4:
            return mask
    return _ellipse(shape, rng, (0.03, 0.06))


def _patch(shape: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    """A large area (a stain, an inactive or discoloured region): a Perlin blob of 15-35 % of the side."""
    return perlin_mask(shape, rng, (0.15, 0.35))


def _crack(shape: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    """A crack: a thin wandering line, 1 or 3 px wide, 10-40 % of the side long, its direction drifting."""
    h, w = shape
    side = min(h, w)
    y, x = rng.uniform(0.15, 0.85) * h, rng.uniform(0.15, 0.85) * w
    angle = rng.uniform(0, 2 * math.pi)
    mask = np.zeros(shape, dtype=bool)
    radius = int(rng.integers(0, 2))  # 0: 1 px wide, 1: 3 px
    for _ in range(int(rng.uniform(0.1, 0.4) * side)):
        angle += rng.normal(0, 0.3)
        y, x = y + math.sin(angle), x + math.cos(angle)
        iy, ix = int(round(y)), int(round(x))
        if not (0 <= iy < h and 0 <= ix < w):
            break
        mask[max(0, iy - radius) : iy + radius + 1, max(0, ix - radius) : ix + radius + 1] = True
    if mask.sum() < 4:
        return _strip(shape, rng)
    return mask


def _region(shape: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    """A region cut off by a wandering edge (an inactive or delaminated part, a shaded or discoloured side): the
    side of a random line that holds 10-45 % of the area, its edge bent by low-frequency Perlin noise."""
    h, w = shape
    side = min(h, w)
    a = rng.uniform(0, 2 * math.pi)
    yy, xx = np.mgrid[0:h, 0:w]
    across = ((xx - w / 2) * math.cos(a) + (yy - h / 2) * math.sin(a)) / side
    across = across + rng.uniform(0.02, 0.08) * perlin(shape, (2, 2), rng)
    return across >= np.quantile(across, 1 - rng.uniform(0.1, 0.45))


def _strip(shape: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    """CutPaste-scar: a thin strip, 1-3 % of the side wide, 10-30 % long, at a random angle."""
    h, w = shape
    side = min(h, w)
    cy, cx = rng.uniform(0.15, 0.85) * h, rng.uniform(0.15, 0.85) * w
    half_len = rng.uniform(0.05, 0.15) * side
    half_wid = max(0.6, rng.uniform(0.005, 0.015) * side)
    a = rng.uniform(0, math.pi)
    yy, xx = np.mgrid[0:h, 0:w]
    along = (xx - cx) * math.cos(a) + (yy - cy) * math.sin(a)
    across = -(xx - cx) * math.sin(a) + (yy - cy) * math.cos(a)
    return (np.abs(along) <= half_len) & (np.abs(across) <= half_wid)


def _rectangle(shape: tuple[int, int], rng: np.random.Generator) -> np.ndarray:
    h, w = shape
    area = rng.uniform(0.003, 0.03) * h * w
    aspect = math.exp(rng.uniform(math.log(0.3), math.log(3.3)))
    rh, rw = max(2, int(round(math.sqrt(area * aspect)))), max(2, int(round(math.sqrt(area / aspect))))
    rh, rw = min(rh, h - 2), min(rw, w - 2)
    y, x = rng.integers(0, h - rh), rng.integers(0, w - rw)
    mask = np.zeros(shape, dtype=bool)
    mask[y : y + rh, x : x + rw] = True
    return mask


def _filling(img: np.ndarray, donor: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """What the defect shows: moved content of another known-good image, a brightness change, or noise."""
    kind = rng.integers(3)
    if kind == 0:
        dy, dx = (int(rng.integers(-s // 3, s // 3 + 1)) for s in img.shape[-2:])
        source = np.roll(donor, (dy, dx), axis=(-2, -1))
        if rng.random() < 0.5:
            source = source[..., ::-1]
        return np.clip(source * rng.uniform(0.7, 1.3) + rng.uniform(-0.15, 0.15), 0, 1)
    if kind == 1:
        return np.clip(img + rng.choice([-1, 1]) * rng.uniform(0.08, 0.4), 0, 1)
    texture = perlin(img.shape[-2:], (int(rng.integers(4, 17)),) * 2, rng)
    return np.clip(img.mean() + rng.uniform(0.1, 0.35) * texture[None] + rng.normal(0, 0.03, img.shape), 0, 1)


KINDS = (_rectangle, _strip, perlin_mask, _crack, _patch, _region)


def paste_defects(x: torch.Tensor, *, copies: int = 1, seed: int = 0) -> tuple[torch.Tensor, torch.Tensor]:
    """x (N, C, H, W) known-good images in [0, 1] -> (defective copies (copies * N, C, H, W), masks
    (copies * N, H, W) bool); copy k of image i is at k * N + i.

    Each copy has one defect, of the `KINDS` in turn (copy k of image i: kind (i + k) mod len(KINDS): five
    copies of an image are five different kinds, and each kind is about as frequent); the content comes
    from another image of x (or is a brightness change / noise texture) and is blended at opacity 0.3-1."""
    rng = np.random.default_rng(seed)
    imgs = x.numpy()
    n = len(imgs)
    out = np.concatenate([imgs] * copies)
    masks = np.zeros((copies * n, *x.shape[-2:]), dtype=bool)
    for k in range(copies):
        for i, img in enumerate(imgs):
            mask = KINDS[(i + k) % len(KINDS)](img.shape[-2:], rng)
            donor = imgs[(i + 1 + rng.integers(max(1, n - 1))) % n]
            fill = _filling(img, donor, rng)
            m = mask[None].astype(np.float32) * rng.uniform(0.3, 1.0)  # the opacity
            out[k * n + i] = img * (1 - m) + fill * m
            masks[k * n + i] = mask
    return torch.from_numpy(out.astype(np.float32)), torch.from_numpy(masks)
