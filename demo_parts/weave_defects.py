"""Defects of the `weave`. Each edits a freshly sampled scene in place and returns its bool mask.

Thread defects work in thread space (see `weave`), so a cut or a pulled thread follows the real, wobbly
thread rather than a straight line. Strength ranges start low on purpose: the weakest draws are hard.
"""

from __future__ import annotations

import numpy as np
from knowngood.demo_parts import fields as f
from knowngood.demo_parts.weave import WeaveScene, thread_geometry, thread_shade
from scipy import ndimage

STAIN_RGB = (
    np.array([0.55, 0.42, 0.25]),  # machine oil
    np.array([0.85, 0.50, 0.30]),  # rust
    np.array([0.42, 0.44, 0.40]),  # grease
)


def _grow(mask: np.ndarray) -> np.ndarray:
    """One pixel of slack covers the anti-aliased rim of an edited thread."""
    return ndimage.binary_dilation(mask, iterations=1)


def _pick_pixel(scene: WeaveScene, rng: np.random.Generator, margin: float) -> tuple[int, int]:
    m = min(int(np.ceil(margin)), scene.size // 2 - 1)
    ix, iy = rng.integers(m, scene.size - m, 2)
    return int(ix), int(iy)


def _pick_thread(scene: WeaveScene, rng: np.random.Generator, margin: float):
    """A random thread (axis, index) and a position along it, plus that axis' geometry."""
    axis = int(rng.integers(2))
    ix, iy = _pick_pixel(scene, rng, margin)
    k, xa, along = thread_geometry(scene, axis)
    return axis, int(k[iy, ix]), float(along[iy, ix]), (k, xa, along)


def _offsets_px(scene: WeaveScene, axis: int, k0: int, a0: float):
    """Pixel offsets from the centre line of thread k0 at along-position a0: (along, across)."""
    along = (scene.coord[1 - axis] - a0) * scene.pitch
    across = (scene.coord[axis] - (k0 + 0.5)) * scene.pitch
    return along, across


def _cast_shadow(scene: WeaveScene, alpha: np.ndarray, strength: float) -> np.ndarray:
    """Adds the shadow a raised piece of yarn throws on the cloth; returns its alpha."""
    s = scene.scale
    away = (-1.5 * s * scene.light[0], -1.5 * s * scene.light[1])
    shadow = strength * f.shadow_of(alpha, away, 0.9 * s)
    scene.layers.append((shadow, np.zeros((scene.size, scene.size, 3))))
    return shadow


def cut(scene: WeaveScene, rng: np.random.Generator) -> np.ndarray:
    """One or two neighbouring threads severed: a short run of them is gone, with frayed ends."""
    half = rng.uniform(0.8, 2.2)  # pitches
    # The margin must hold the cut's length along the thread and two threads across it.
    margin = (max(half, 1.7) + 0.6) * scene.pitch + 3 * scene.scale
    axis, k0, a0, (k, xa, along) = _pick_thread(scene, rng, margin)
    count = 1 if rng.random() < 0.7 else 2
    p1, p2 = rng.uniform(0.0, 2 * np.pi, 2)
    fray = 0.3 * np.sin(9.0 * xa + p1) * np.sin(5.0 * xa + p2)  # fibres of one yarn break unevenly
    gone = (k >= k0) & (k < k0 + count) & (np.abs(along - a0) < half + fray)
    scene.keep[axis] = np.where(gone, 0.0, scene.keep[axis])
    return _grow(gone & (np.abs(xa) < 1.15))


def hole(scene: WeaveScene, rng: np.random.Generator) -> np.ndarray:
    """A ragged opening through the cloth: both thread systems missing, the dark backing shows."""
    s = scene.scale
    radius = rng.uniform(2.0, 6.5) * s
    ix, iy = _pick_pixel(scene, rng, 1.4 * radius + 6 * s)
    sd = f.sd_blob(scene.x, scene.y, ix, iy, radius, f.blob_coeffs(rng, roughness=0.3))
    gone = sd < 0.0
    for axis in (0, 1):
        scene.keep[axis] = np.where(gone, 0.0, scene.keep[axis])
    return _grow(sd < 0.5)


def pulled_thread(scene: WeaveScene, rng: np.random.Generator) -> np.ndarray:
    """A snagged thread pulled out of line: it bows sideways over the cloth and leaves a gap behind."""
    half = rng.uniform(2.0, 4.5)  # pitches
    axis, k0, a0, (k, xa, along) = _pick_thread(scene, rng, half * scene.pitch + 7 * scene.scale)
    idx = k0 % len(scene.thick[axis])
    lift = rng.uniform(0.3, 1.1) * rng.choice([-1.0, 1.0])
    rel = (along - a0) / half
    bow = np.where(np.abs(rel) < 1.0, np.cos(np.pi * rel / 2) ** 2, 0.0)
    _, across = _offsets_px(scene, axis, k0, a0)
    off = across - lift * bow * scene.pitch
    width = 0.85 * scene.thick[axis][idx] * scene.pitch  # a pulled yarn is stretched thinner
    alpha = np.clip(width / 2 - np.abs(off) + 0.5, 0.0, 1.0) * (np.abs(rel) < 1.0)
    gone = (k == k0) & (np.abs(rel) < 0.75)
    scene.keep[axis] = np.where(gone, 0.0, scene.keep[axis])
    shadow = _cast_shadow(scene, alpha, 0.5)
    shade = 1.08 * thread_shade(off / (width / 2), along, k0, scene.fibre[axis])
    scene.layers.append((alpha, scene.colours[axis][idx] * shade[..., None]))
    return _grow((alpha > 0.3) | (gone & (np.abs(xa) < 1.15)) | (shadow > 0.1))


def knot(scene: WeaveScene, rng: np.random.Generator) -> np.ndarray:
    """A slub or knot: a short fat lump of the same yarn sitting on top of the weave."""
    s = scene.scale
    axis, k0, a0, _ = _pick_thread(scene, rng, 10 * s)
    idx = k0 % len(scene.thick[axis])
    length, girth = rng.uniform(2.6, 5.0) * s, rng.uniform(2.0, 3.2) * s
    d_along, d_across = _offsets_px(scene, axis, k0, a0)
    alpha = f.coverage(f.sd_ellipse(d_along, d_across, length, girth))
    dome = np.sqrt(np.clip(1.0 - (d_along / length) ** 2 - (d_across / girth) ** 2, 0.0, 1.0))
    lumpy = 1.0 + 0.15 * f.smooth_noise(rng, (scene.size, scene.size), 0.6)
    shade = (0.35 + 0.75 * dome**0.6 + 0.25 * _highlight(scene, d_along, d_across, length)) * lumpy
    tone = rng.uniform(1.0, 1.3)  # packed fibres scatter more light than the open weave
    shadow = _cast_shadow(scene, alpha, 0.7)
    scene.layers.append((alpha, tone * scene.colours[axis][idx] * shade[..., None]))
    return _grow((alpha > 0.3) | (shadow > 0.1))


def _highlight(scene: WeaveScene, d_along, d_across, length: float) -> np.ndarray:
    """A glint on the lamp side of a lump; the lump's centre is found where both offsets vanish."""
    iy, ix = np.unravel_index(np.argmin(d_along**2 + d_across**2), d_along.shape)
    hx = ix + 0.4 * length * scene.light[0]
    hy = iy + 0.4 * length * scene.light[1]
    return np.exp(-((scene.x - hx) ** 2 + (scene.y - hy) ** 2) / (0.5 * length) ** 2)


def stain(scene: WeaveScene, rng: np.random.Generator) -> np.ndarray:
    """A soaked-in blot of oil, rust or grease that tints whatever threads it covers."""
    s = scene.scale
    radius = rng.uniform(4.0, 12.0) * s
    ix, iy = _pick_pixel(scene, rng, 1.3 * radius + 3 * s)
    sd = f.sd_blob(scene.x, scene.y, ix, iy, radius, f.blob_coeffs(rng))
    alpha = ndimage.gaussian_filter(f.coverage(sd), 1.0 * s)
    colour = STAIN_RGB[int(rng.integers(len(STAIN_RGB)))]
    strength = rng.uniform(0.45, 0.85)
    scene.stain_gain *= 1.0 - strength * alpha[..., None] * (1.0 - colour)
    return alpha > 0.3


DEFECTS = {
    "cut": cut,
    "stain": stain,
    "hole": hole,
    "pulled_thread": pulled_thread,
    "knot": knot,
}
