"""Defects of the `casting`. Each edits a freshly sampled scene in place and returns its bool mask.

Sizes are reference pixels times `scene.scale` (see `casting`), and every defect is drawn in a window around
itself, so a large image at the camera's own scale costs little more than a small one. Strength ranges
start low on purpose: the weakest draws sit near what 128 px can show against this mottled texture (a crack
one pixel wide and 15 % darker, a shallow pore of 1.3 px radius), the strongest are obvious.
"""

from __future__ import annotations

import numpy as np
from knowngood.demo_parts import fields as f
from knowngood.demo_parts.casting import CastingScene
from scipy import ndimage


def _window(scene: CastingScene, cx: float, cy: float, reach: float):
    """The image slices within `reach` px of (cx, cy), and the pixel coordinates there."""
    x0, y0 = (max(0, int(np.floor(c - reach))) for c in (cx, cy))
    x1, y1 = (min(scene.size, int(np.ceil(c + reach)) + 1) for c in (cx, cy))
    window = (slice(y0, y1), slice(x0, x1))
    return window, scene.x[window], scene.y[window]


def _full(scene: CastingScene, window, part: np.ndarray) -> np.ndarray:
    out = np.zeros((scene.size, scene.size), dtype=part.dtype)
    out[window] = part
    return out


def _offset_within(scene: CastingScene, rng: np.random.Generator, lo: float, hi: float, margin: float) -> float:
    """A shift that puts a shape spanning lo..hi (px) at least `margin` px inside the frame (centred if it
    cannot be)."""
    low, high = margin - lo, scene.size - 1 - margin - hi
    return float(rng.uniform(low, high)) if low < high else (scene.size - 1 - lo - hi) / 2


def _place(scene: CastingScene, rng: np.random.Generator, reach: float) -> tuple[float, float]:
    """A centre at least `reach` px, plus a little slack, from every border."""
    margin = reach + 2.0 * scene.scale + 1.0
    x = _offset_within(scene, rng, 0.0, 0.0, margin)
    y = _offset_within(scene, rng, 0.0, 0.0, margin)
    return x, y


def _walk(rng: np.random.Generator, start, heading: float, length: float, s: float) -> np.ndarray:
    """(n, 2) points of a jagged path: a crack turns a little at every grain it runs through."""
    steps = max(3, int(length / (2.0 * s)))
    headings = heading + np.cumsum(rng.normal(0.0, 0.3, steps))
    moves = (length / steps) * np.stack([np.cos(headings), np.sin(headings)], axis=1)
    return np.asarray(start, dtype=np.float64) + np.concatenate([np.zeros((1, 2)), np.cumsum(moves, axis=0)])


def crack(scene: CastingScene, rng: np.random.Generator) -> np.ndarray:
    """A thin dark line that wanders between grains and forks once or twice; one or two pixels wide."""
    s = scene.scale
    length = rng.uniform(10.0, 36.0) * s
    width = rng.uniform(1.0, 2.0) * s
    depth = rng.uniform(0.15, 0.75)
    trunk = _walk(rng, (0.0, 0.0), rng.uniform(0.0, 2 * np.pi), length, s)
    lines = [(trunk, width, False)]
    for _ in range(int(rng.integers(1, 3))):
        j = int(rng.integers(len(trunk) // 4, 3 * len(trunk) // 4 + 1))
        along = trunk[min(j + 1, len(trunk) - 1)] - trunk[max(j - 1, 0)]
        heading = np.arctan2(along[1], along[0]) + rng.choice([-1.0, 1.0]) * rng.uniform(0.4, 1.1)
        lines.append((_walk(rng, trunk[j], heading, rng.uniform(0.25, 0.5) * length, s), 0.7 * width, True))
    points = np.concatenate([pts for pts, _, _ in lines])
    lo, hi = points.min(axis=0), points.max(axis=0)
    margin = width + 2.0 * s + 1.0
    shift = np.array([_offset_within(scene, rng, lo[i], hi[i], margin) for i in (0, 1)])
    centre = shift + (lo + hi) / 2
    window, xw, yw = _window(scene, *centre, np.abs(hi - lo).max() / 2 + width + 2.0)
    alpha = np.zeros(xw.shape)
    for pts, w, is_branch in lines:
        d, t = f.dist_to_polyline(xw, yw, pts + shift)
        # The trunk thins out at both tips, a branch towards its free end.
        taper = 1.0 - 0.65 * t if is_branch else 0.35 + 0.65 * np.sqrt(np.sin(np.pi * t))
        alpha = np.maximum(alpha, np.clip(w * taper / 2 + 0.5 - d, 0.0, 1.0))
    scene.gain[window] *= 1.0 - depth * alpha
    return _full(scene, window, alpha > 0.2)


def pore(scene: CastingScene, rng: np.random.Generator) -> np.ndarray:
    """A gas pore: a small round cavity, dark inside, ringed by a lip that catches the lamp."""
    s = scene.scale
    r = rng.uniform(1.3, 3.2) * s
    depth = rng.uniform(0.2, 0.7)
    rim_w = 0.5 * r + 0.5 * s
    outer = r + rim_w
    cx, cy = _place(scene, rng, outer + 1.0)
    window, xw, yw = _window(scene, cx, cy, outer + 2.0)
    dx, dy = xw - cx, yw - cy
    d = np.hypot(dx, dy)
    facing = (dx * scene.light[0] + dy * scene.light[1]) / (d + 1e-9)  # +1 on the lamp side
    # Inside, the wall opposite the lamp is the one tilted towards it; outside, the lip's lamp side is lit.
    floor = f.coverage(d - r)
    inside = (1.0 - depth) * (1.0 - 0.3 * depth * facing)
    ring = np.exp(-(((d - r - rim_w / 2) / (rim_w / 2)) ** 2)) * np.clip(outer + 0.5 - d, 0.0, 1.0)
    rim = rng.uniform(0.3, 0.7) * depth * ring * (0.4 + 0.6 * np.clip(facing, 0.0, 1.0))
    scene.layers.append((_full(scene, window, floor), _full(scene, window, inside)))
    scene.delta[window] += rim
    return _full(scene, window, d < outer + 0.5)


def inclusion(scene: CastingScene, rng: np.random.Generator) -> np.ndarray:
    """Foreign matter in the skin (slag, sand, oxide): a blob brighter or darker than the metal, glassy
    smooth or finely speckled where the metal is grainy, and ringed by a thin dark gap where it did not bond."""
    s = scene.scale
    radius = rng.uniform(2.2, 7.0) * s
    cx, cy = _place(scene, rng, 1.4 * radius + 1.0)
    window, xw, yw = _window(scene, cx, cy, 1.5 * radius + 3.0 * s + 2.0)
    sd = f.sd_blob(xw, yw, cx, cy, radius, f.blob_coeffs(rng, roughness=0.3))
    alpha = ndimage.gaussian_filter(f.coverage(sd), 0.3 * s)
    tone = 1.0 + rng.choice([-1.0, 1.0]) * rng.uniform(0.06, 0.5)
    gap = rng.uniform(0.05, 0.5) * np.exp(-((sd / (0.6 * s)) ** 2)) * (sd < 1.5 * s)
    if rng.random() < 0.5:
        grain = 0.03 * f.smooth_noise(rng, xw.shape, 2.0 * s)  # glassy
    else:
        grain = 0.15 * f.smooth_noise(rng, xw.shape, 0.5 * s)  # sandy
    scene.layers.append((_full(scene, window, alpha), _full(scene, window, tone * (1.0 + grain))))
    scene.gain[window] *= 1.0 - gap
    return _full(scene, window, (alpha > 0.3) | (sd < 1.0 * s))


def chipped_edge(scene: CastingScene, rng: np.random.Generator) -> np.ndarray:
    """A piece broken off: either a bite out of the part's edge where it meets the frame (dark beyond,
    bright fracture face around it), or a shallow patch inside where the blasted skin flaked off."""
    if rng.random() < 0.5:
        return _border_chip(scene, rng)
    return _flaked_patch(scene, rng)


def _border_chip(scene: CastingScene, rng: np.random.Generator) -> np.ndarray:
    s = scene.scale
    side = int(rng.integers(4))  # top, bottom, left, right
    half_w, depth = rng.uniform(2.0, 7.0) * s, rng.uniform(1.5, 6.0) * s
    face_w = rng.uniform(0.8, 2.0) * s
    at = _offset_within(scene, rng, -half_w, half_w, face_w + 2.0 * s + 1.0)
    edge = -0.5 if side in (0, 2) else scene.size - 0.5
    cx, cy = (at, edge) if side < 2 else (edge, at)
    window, xw, yw = _window(scene, cx, cy, max(half_w, depth) + face_w + 3.0)
    along, inward = (xw - cx, np.abs(yw - cy)) if side < 2 else (yw - cy, np.abs(xw - cx))
    sd = f.sd_ellipse(along, inward, half_w, depth) + 0.5 * s * f.smooth_noise(rng, xw.shape, s)
    void = f.coverage(sd)
    chip = f.coverage(sd - face_w)
    beyond = rng.uniform(0.08, 0.2)  # what lies past the part: dark and out of focus
    face = rng.uniform(1.25, 1.7) * (1.0 + 0.12 * f.smooth_noise(rng, xw.shape, 0.6 * s))
    scene.layers.append((_full(scene, window, chip), _full(scene, window, face)))
    scene.layers.append((_full(scene, window, void), _full(scene, window, np.full(xw.shape, beyond))))
    return _full(scene, window, chip > 0.3)


def _flaked_patch(scene: CastingScene, rng: np.random.Generator) -> np.ndarray:
    s = scene.scale
    radius = rng.uniform(2.5, 7.0) * s
    cx, cy = _place(scene, rng, 1.4 * radius + 2.0 * s)
    window, xw, yw = _window(scene, cx, cy, 1.5 * radius + 4.0 * s + 2.0)
    sd = f.sd_blob(xw, yw, cx, cy, radius, f.blob_coeffs(rng, roughness=0.35))
    alpha = ndimage.gaussian_filter(f.coverage(sd), 0.4 * s)
    fresh = rng.uniform(1.05, 1.45) * (1.0 + 0.15 * f.smooth_noise(rng, xw.shape, 0.6 * s))
    # A shallow step down: its wall away from the lamp is lit, the wall towards the lamp in shade.
    wall = np.exp(-((sd / (0.8 * s)) ** 2)) * (sd < 1.5 * s)
    scene.layers.append((_full(scene, window, alpha), _full(scene, window, fresh)))
    scene.delta[window] -= 0.25 * wall * f.light_facing(sd, scene.light)
    return _full(scene, window, (alpha > 0.3) | (sd < 1.0 * s))


def smear(scene: CastingScene, rng: np.random.Generator) -> np.ndarray:
    """A streak where a tool or a glove rubbed the blasted skin flat: the grain is wiped smooth and
    streaked along the rub, a little brighter or darker. Often faint."""
    s = scene.scale
    half_len, half_wid = rng.uniform(10.0, 28.0) * s, rng.uniform(3.0, 7.0) * s
    angle = rng.uniform(0.0, np.pi)
    cx, cy = _place(scene, rng, half_len + 2.0 * s)
    window, xw, yw = _window(scene, cx, cy, half_len + 6.0 * s + 2.0)
    u, v = f.to_local(xw, yw, cx, cy, angle)
    alpha = ndimage.gaussian_filter(f.coverage(f.sd_ellipse(u, v, half_len, half_wid)), 1.2 * s)
    wiped = ndimage.gaussian_filter(scene.texture[window], 4.0 * s)
    n = int(2 * np.ceil(half_len + 6.0 * s)) + 8
    streaks = np.interp(v + n / 2, np.arange(n), f.smooth_noise(rng, (n,), 0.6 * s))
    # Burnished metal shines; an oily glove darkens.
    tint = rng.choice([-0.6, 1.0]) * rng.uniform(0.02, 0.25)
    value = wiped * (1.0 + tint) + rng.uniform(0.02, 0.12) * streaks
    strength = rng.uniform(0.55, 0.95)
    scene.layers.append((_full(scene, window, strength * alpha), _full(scene, window, value)))
    return _full(scene, window, alpha > 0.25)


DEFECTS = {
    "crack": crack,
    "pore": pore,
    "inclusion": inclusion,
    "chipped_edge": chipped_edge,
    "smear": smear,
}
