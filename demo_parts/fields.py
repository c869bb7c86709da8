"""Whole-array building blocks: pixel grids, smooth noise, signed distances and anti-aliased coverage.

Distances are in pixels (negative inside a shape) so edges stay about one pixel soft at any image size.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage


def pixel_grid(size: int) -> tuple[np.ndarray, np.ndarray]:
    """(x, y) pixel-centre coordinates, each (size, size) float64."""
    y, x = np.mgrid[0:size, 0:size].astype(np.float64)
    return x, y


def to_local(x, y, cx: float, cy: float, angle: float):
    """Image coordinates to a frame centred on (cx, cy) and turned by `angle` radians."""
    c, s = np.cos(angle), np.sin(angle)
    dx, dy = x - cx, y - cy
    return c * dx + s * dy, -s * dx + c * dy


def to_image(u, v, cx: float, cy: float, angle: float):
    """Inverse of `to_local`."""
    c, s = np.cos(angle), np.sin(angle)
    return cx + c * u - s * v, cy + s * u + c * v


def smooth_noise(rng: np.random.Generator, shape, sigma: float) -> np.ndarray:
    """Unit-variance Gaussian noise low-passed at `sigma` px; wrapped so borders carry no artefact."""
    n = ndimage.gaussian_filter(rng.standard_normal(shape), sigma, mode="wrap")
    return n / (n.std() + 1e-12)


def coverage(sd) -> np.ndarray:
    """Inside-fraction of a pixel from its signed distance: a one-pixel anti-aliased edge."""
    return np.clip(0.5 - sd, 0.0, 1.0)


def sd_circle(u, v, cu: float, cv: float, r: float):
    return np.hypot(u - cu, v - cv) - r


def sd_ellipse(u, v, a: float, b: float):
    """Approximate signed distance to an axis-aligned ellipse; exact enough for one-pixel edges."""
    k = np.hypot(u / a, v / b)
    return (k - 1.0) * min(a, b)


def sd_rounded_rect(u, v, half_w: float, half_h: float, radius: float):
    qx = np.abs(u) - (half_w - radius)
    qy = np.abs(v) - (half_h - radius)
    outside = np.hypot(np.maximum(qx, 0.0), np.maximum(qy, 0.0))
    return outside + np.minimum(np.maximum(qx, qy), 0.0) - radius


def sd_capsule(u, v, u0: float, v0: float, u1: float, v1: float, r: float):
    """Slot shape: all points within `r` of the segment (u0, v0)-(u1, v1)."""
    du, dv = u1 - u0, v1 - v0
    t = np.clip(((u - u0) * du + (v - v0) * dv) / (du * du + dv * dv + 1e-12), 0.0, 1.0)
    return np.hypot(u - (u0 + t * du), v - (v0 + t * dv)) - r


def blob_coeffs(rng: np.random.Generator, lobes: int = 4, roughness: float = 0.22) -> np.ndarray:
    """Random radial harmonics for an irregular blob: rows of (order, amplitude, phase)."""
    orders = np.arange(2, 2 + lobes, dtype=np.float64)
    amps = roughness * rng.uniform(0.2, 1.0, lobes) / np.sqrt(orders - 1.0)
    phases = rng.uniform(0.0, 2 * np.pi, lobes)
    return np.stack([orders, amps, phases], axis=1)


def sd_blob(x, y, cx: float, cy: float, radius: float, coeffs: np.ndarray):
    """Signed distance (approximate) to a star-shaped blob whose radius wobbles with angle."""
    dx, dy = x - cx, y - cy
    theta = np.arctan2(dy, dx)
    wobble = sum(a * np.cos(k * theta + p) for k, a, p in coeffs)
    return np.hypot(dx, dy) - radius * (1.0 + wobble)


def bezier(p0, p1, p2, n: int = 24) -> np.ndarray:
    """(n, 2) points on a quadratic Bezier curve."""
    t = np.linspace(0.0, 1.0, n)[:, None]
    p0, p1, p2 = (np.asarray(p, dtype=np.float64) for p in (p0, p1, p2))
    return (1 - t) ** 2 * p0 + 2 * (1 - t) * t * p1 + t**2 * p2


def dist_to_polyline(x: np.ndarray, y: np.ndarray, pts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distance from every pixel to a polyline of (x, y) points, and the arc-length fraction (0..1)
    of the nearest point on it."""
    a, b = pts[:-1], pts[1:]
    px, py = x.reshape(-1, 1), y.reshape(-1, 1)
    ab = b - a
    len2 = (ab**2).sum(axis=1) + 1e-12
    t = np.clip(((px - a[:, 0]) * ab[:, 0] + (py - a[:, 1]) * ab[:, 1]) / len2, 0.0, 1.0)
    d2 = (px - a[:, 0] - t * ab[:, 0]) ** 2 + (py - a[:, 1] - t * ab[:, 1]) ** 2
    j = d2.argmin(axis=1)
    rows = np.arange(j.size)
    seg = np.sqrt(len2)
    start = np.concatenate([[0.0], np.cumsum(seg)])
    frac = (start[j] + t[rows, j] * seg[j]) / start[-1]
    return np.sqrt(d2[rows, j]).reshape(x.shape), frac.reshape(x.shape)


def light_facing(sd: np.ndarray, light: np.ndarray, sign: float = 1.0) -> np.ndarray:
    """How much a slope along the gradient of `sd` faces the light, in -1..1."""
    gy, gx = np.gradient(sd)
    norm = np.hypot(gx, gy) + 1e-9
    return sign * (gx * light[0] + gy * light[1]) / norm


def shadow_of(alpha: np.ndarray, offset: tuple[float, float], blur: float) -> np.ndarray:
    """Soft cast shadow of a coverage map, displaced by (dx, dy) px away from the light."""
    moved = ndimage.shift(alpha, (offset[1], offset[0]), order=1, mode="constant", cval=0.0)
    return ndimage.gaussian_filter(moved, blur, mode="constant")


def to_uint8(img: np.ndarray) -> np.ndarray:
    return np.round(np.clip(img, 0.0, 1.0) * 255.0).astype(np.uint8)
