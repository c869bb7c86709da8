"""Defects of the `bracket`. Each edits a freshly sampled scene in place and returns its bool mask.

Defect parameters are drawn after the scene, so the scene (and the good image) is unchanged by them.
Strength ranges start low on purpose: the weakest draws are meant to be hard, the strongest obvious. The lower
ends are set so that the weakest draw is still visible to a person at the 128 px the demo renders at (a pit of
under 2 px or a scratch of 7 % contrast is below what that resolution can show, on a camera or to a model).
"""

from __future__ import annotations

import numpy as np
from knowngood.demo_parts import fields as f
from knowngood.demo_parts.bracket import BracketScene, outer_sd, surface_mask
from knowngood.demo_parts.bracket import holes_sd as _holes_sd
from scipy import ndimage


def surface_point(scene: BracketScene, rng: np.random.Generator, clearance: float):
    """A random point on bare metal at least `clearance` px from the outline and every opening."""
    for _ in range(500):
        u = rng.uniform(-scene.half_w, scene.half_w)
        v = rng.uniform(-scene.half_h, scene.half_h)
        inside = f.sd_rounded_rect(u, v, scene.half_w, scene.half_h, scene.corner) < -clearance
        if inside and _holes_sd(scene, u, v) > clearance:
            break
    x, y = f.to_image(u, v, *scene.pose)
    return float(x), float(y)


def scratch(scene: BracketScene, rng: np.random.Generator) -> np.ndarray:
    """A thin curved line, usually brighter (fresh metal catches the lamp), sometimes darker."""
    s = scene.scale
    for _ in range(20):
        alpha = _scratch_alpha(scene, rng)
        mask = (alpha > 0.12) & surface_mask(scene)
        if mask.sum() >= 6 * s:
            break
    sign = 1.0 if rng.random() < 0.65 else -1.0
    scene.surface_delta += sign * rng.uniform(0.12, 0.3) * alpha
    return mask


def _scratch_alpha(scene: BracketScene, rng: np.random.Generator) -> np.ndarray:
    s, size = scene.scale, scene.size
    start = np.array(surface_point(scene, rng, 2.0 * s))
    length = rng.uniform(0.12, 0.45) * size
    theta = rng.uniform(0.0, np.pi)
    heading = np.array([np.cos(theta), np.sin(theta)])
    end = start + length * heading
    bend = rng.normal(0.0, 0.12) * length * np.array([-heading[1], heading[0]])
    d, t = f.dist_to_polyline(scene.x, scene.y, f.bezier(start, (start + end) / 2 + bend, end))
    width = rng.uniform(1.2, 2.2) * s
    taper = 0.45 + 0.55 * np.sqrt(np.sin(np.pi * t))  # scratches thin out where the tool lifted
    return np.clip(width / 2 + 0.5 - d, 0.0, 1.0) * taper


def pit(scene: BracketScene, rng: np.random.Generator) -> np.ndarray:
    """A small crater: dark floor, and a bright wall on the side that faces the lamp."""
    s = scene.scale
    x0, y0 = surface_point(scene, rng, 4.0 * s)
    r = rng.uniform(1.8, 3.5) * s
    depth = rng.uniform(0.2, 0.45)
    dx, dy = scene.x - x0, scene.y - y0
    d = np.hypot(dx, dy)
    core = np.exp(-((d / r) ** 2))
    wall = np.exp(-(((d - r) / (0.6 * r + 0.3)) ** 2))
    # The crater wall opposite the lamp is the one tilted towards it.
    lit = np.clip(-(dx * scene.light[0] + dy * scene.light[1]) / (d + 1e-9), 0.0, 1.0)
    scene.surface_delta += -depth * core + 0.5 * depth * wall * lit
    return (d < 1.3 * r + 0.5) & surface_mask(scene)


def missing_hole(scene: BracketScene, rng: np.random.Generator) -> np.ndarray:
    """One of the four drilled holes was never drilled: plain metal where an opening belongs."""
    hu, hv, hr = scene.holes.pop(int(rng.integers(len(scene.holes))))
    return f.sd_circle(scene.u, scene.v, hu, hv, hr) < 2.6 * scene.scale


def edge_burr(scene: BracketScene, rng: np.random.Generator) -> np.ndarray:
    """A torn lip of material standing out of a straight stretch of the outline."""
    s = scene.scale
    before = f.coverage(outer_sd(scene))
    (pu, pv), (nu, nv) = _edge_point(scene, rng)
    depth = rng.uniform(1.6, 4.5) * s
    width = rng.uniform(2.5, 7.0) * s
    lean = rng.uniform(-0.6, 0.6)
    du, dv = scene.u - pu, scene.v - pv
    normal = du * nu + dv * nv
    tangent = -du * nv + dv * nu - lean * normal
    lump = f.sd_ellipse(tangent, normal, width / 2, depth)
    scene.lumps.append(lump)
    grain = f.smooth_noise(rng, (scene.size, scene.size), 0.7)
    scene.surface_delta += f.coverage(lump) * (0.06 + 0.05 * grain)  # torn metal is rougher and brighter
    after = f.coverage(outer_sd(scene))
    # The whole lip counts, including its root on the plate, where it disturbs the rolled edge.
    return ((after - before) > 0.2) | ((f.coverage(lump - 1.5 * s) > 0.3) & (after > 0.2))


def _edge_point(scene: BracketScene, rng: np.random.Generator):
    """A point on a straight side of the outline and the outward normal there, plate frame."""
    s = scene.scale
    side = int(rng.integers(4))
    if side < 2:
        t = rng.uniform(-1.0, 1.0) * (scene.half_w - scene.corner - 3 * s)
        sign = -1.0 if side == 0 else 1.0
        return (t, sign * scene.half_h), (0.0, sign)
    t = rng.uniform(-1.0, 1.0) * (scene.half_h - scene.corner - 3 * s)
    sign = -1.0 if side == 2 else 1.0
    return (sign * scene.half_w, t), (sign, 0.0)


def stain(scene: BracketScene, rng: np.random.Generator) -> np.ndarray:
    """A dried coolant spot: a soft dark blotch with a slightly darker tide mark at its edge."""
    s = scene.scale
    x0, y0 = surface_point(scene, rng, 3.0 * s)
    radius = rng.uniform(4.0, 11.0) * s
    sd = f.sd_blob(scene.x, scene.y, x0, y0, radius, f.blob_coeffs(rng))
    alpha = ndimage.gaussian_filter(f.coverage(sd), 0.8 * s)
    tide = np.exp(-(((sd + 0.8 * s) / (0.9 * s)) ** 2)) * alpha
    strength = rng.uniform(0.12, 0.32)
    scene.surface_gain *= 1.0 - strength * alpha - 0.4 * strength * tide
    return (alpha > 0.3) & surface_mask(scene)


DEFECTS = {
    "scratch": scratch,
    "pit": pit,
    "missing_hole": missing_hole,
    "edge_burr": edge_burr,
    "stain": stain,
}
