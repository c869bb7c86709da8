"""The `bracket`: a brushed, stamped metal plate with four drilled holes and a slot, seen from above on a
dark fixture. Grayscale.

A scene is drawn from the rng in a fixed order; defects then edit the scene (geometry or surface fields)
before `compose`, so a defective image equals the good image of the same rng state outside its defect.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np
from knowngood.demo_parts import fields as f

# Nominal geometry as fractions of the image side: the same product every time, only the pose varies.
HALF_W, HALF_H, CORNER = 0.40, 0.28, 0.07
HOLE_AT, HOLE_R = (0.25, 0.155), 0.045
SLOT_HALF_LEN, SLOT_R = 0.09, 0.035
FIXTURE_SEED = 7  # the station's one fixture plate: the same background texture in every image


@dataclass
class BracketScene:
    size: int
    x: np.ndarray
    y: np.ndarray
    u: np.ndarray  # plate-frame coordinates of every pixel, px
    v: np.ndarray
    pose: tuple[float, float, float]  # cx, cy, angle
    half_w: float
    half_h: float
    corner: float
    holes: list[tuple[float, float, float]]  # (u, v, r) in the plate frame
    slot: tuple[float, float, float, float, float]
    light: np.ndarray  # unit vector towards the lamp, image plane
    surface: np.ndarray  # lit, grained metal before edge shading
    background: np.ndarray
    noise: np.ndarray
    lumps: list[np.ndarray] = field(default_factory=list)  # extra material (burrs) as signed distances
    surface_delta: np.ndarray | None = None
    surface_gain: np.ndarray | None = None

    @property
    def scale(self) -> float:
        return self.size / 128.0


def sample(rng: np.random.Generator, size: int) -> BracketScene:
    """Draws pose, lighting and texture; every good image and its defective twin start here."""
    s = size / 128.0
    cx, cy = size / 2 + np.clip(rng.normal(0.0, 1.3 * s, 2), -3 * s, 3 * s)
    angle = np.deg2rad(rng.uniform(-4.0, 4.0))
    x, y = f.pixel_grid(size)
    u, v = f.to_local(x, y, cx, cy, angle)
    light_angle = np.deg2rad(-130.0 + rng.normal(0.0, 3.0))  # the lamp is mounted; it sags a little
    light = np.array([np.cos(light_angle), np.sin(light_angle)])
    tol = 1.0 + rng.normal(0.0, 0.004, 2)  # stamping tolerance, far below what should count as a defect
    scene = BracketScene(
        size=size,
        x=x,
        y=y,
        u=u,
        v=v,
        pose=(cx, cy, angle),
        half_w=HALF_W * size * tol[0],
        half_h=HALF_H * size * tol[1],
        corner=CORNER * size,
        holes=_hole_layout(size),
        slot=_slot_layout(size),
        light=light,
        surface=_surface(rng, x, y, v, light, size),
        background=_background(rng, size),
        noise=rng.normal(0.0, 0.008, (size, size)),
    )
    scene.surface_delta = np.zeros((size, size))
    scene.surface_gain = np.ones((size, size))
    return scene


def _hole_layout(size: int) -> list[tuple[float, float, float]]:
    hu, hv = HOLE_AT[0] * size, HOLE_AT[1] * size
    return [(su * hu, sv * hv, HOLE_R * size) for sv in (-1, 1) for su in (-1, 1)]


def _slot_layout(size: int) -> tuple[float, float, float, float, float]:
    half = SLOT_HALF_LEN * size
    return (-half, 0.0, half, 0.0, SLOT_R * size)


def _surface(rng, x, y, v, light, size: int) -> np.ndarray:
    """Metal brightness: a lamp gradient times brushing streaks that run along the plate's long axis."""
    s = size / 128.0
    level = rng.uniform(0.56, 0.68)
    tilt = rng.uniform(0.04, 0.08)  # fall-off across the part; varies with where the part sits
    toward = light + rng.normal(0.0, 0.1, 2)
    toward /= np.linalg.norm(toward)
    ramp = ((x - size / 2) * toward[0] + (y - size / 2) * toward[1]) / size
    streaks = f.smooth_noise(rng, (4 * size,), 0.7 * s)
    brushed = np.tanh(np.interp(v + 2 * size, np.arange(4 * size), streaks) / 1.5)  # no lone deep groove
    fine = f.smooth_noise(rng, (size, size), 0.6)
    mottle = f.smooth_noise(rng, (size, size), 8.0 * s)
    return level * (1.0 + tilt * ramp) * (1.0 + 0.04 * brushed + 0.02 * fine + 0.025 * mottle)


def _background(rng, size: int) -> np.ndarray:
    """The fixture nest: the same worn plate under every part, only its exposure varies a little."""
    level = rng.uniform(0.08, 0.10)
    return level * (1.0 + 0.15 * _fixture_texture(size))


@functools.lru_cache(maxsize=4)
def _fixture_texture(size: int) -> np.ndarray:
    texture = f.smooth_noise(np.random.default_rng(FIXTURE_SEED), (size, size), 6.0 * size / 128.0)
    texture.setflags(write=False)
    return texture


def outer_sd(scene: BracketScene) -> np.ndarray:
    """Signed distance to the plate outline (holes not cut), burrs included."""
    sd = f.sd_rounded_rect(scene.u, scene.v, scene.half_w, scene.half_h, scene.corner)
    for lump in scene.lumps:
        sd = np.minimum(sd, lump)
    return sd


def holes_sd(scene: BracketScene, u=None, v=None):
    """Signed distance to the nearest drilled opening (negative inside a hole or the slot); at every
    pixel, or at given plate-frame points."""
    u = scene.u if u is None else u
    v = scene.v if v is None else v
    sd = f.sd_capsule(u, v, *scene.slot)
    for hu, hv, hr in scene.holes:
        sd = np.minimum(sd, f.sd_circle(u, v, hu, hv, hr))
    return sd


def part_region(scene: BracketScene) -> np.ndarray:
    """Pixels the plate's silhouette touches (holes counted as part of the part)."""
    return f.coverage(outer_sd(scene)) > 0.0


def compose(scene: BracketScene) -> np.ndarray:
    """The scene as a float image in about 0..1."""
    s = scene.scale
    outer, holes = outer_sd(scene), holes_sd(scene)
    cov = f.coverage(np.maximum(outer, -holes))
    # Drilled holes have a chamfer that slopes into the hole; the outline has a rolled edge.
    chamfer = np.exp(-(((holes - 1.1 * s) / (0.9 * s)) ** 2)) * (holes > -0.5)
    chamfer_lit = 0.05 + 0.16 * f.light_facing(holes, scene.light, sign=-1.0)
    rim = np.exp(-(((outer + 1.0 * s) / (0.8 * s)) ** 2))
    rim_lit = 0.03 + 0.12 * f.light_facing(outer, scene.light)
    metal = scene.surface + chamfer * chamfer_lit + rim * rim_lit + scene.surface_delta
    metal = metal * scene.surface_gain
    away = (-2.0 * s * scene.light[0], -2.0 * s * scene.light[1])
    ground = scene.background * (1.0 - 0.4 * f.shadow_of(cov, away, 1.5 * s))
    return ground * (1.0 - cov) + metal * cov + scene.noise


def surface_mask(scene: BracketScene) -> np.ndarray:
    """Pixels that show metal (not background, not inside a hole); edge pixels count from a quarter
    covered, since a surface defect reaching the edge shows in them too."""
    return f.coverage(np.maximum(outer_sd(scene), -holes_sd(scene))) > 0.25
