"""The `weave`: a close-up of plain-woven technical fabric (blue warp, sand weft) filling the frame. RGB.

Threads live in "thread space": `coord[0]` counts warp pitches across the image, `coord[1]` weft pitches,
both gently wobbled so no two threads run perfectly straight. Axis 0 is the warp (it runs along
coord[1]), axis 1 the weft. Defects edit the scene's `keep`, `layers` and `stain_gain` before `compose`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from knowngood.demo_parts import fields as f

PITCH = 7.0  # px per thread at 128 px
WARP_RGB = np.array([0.30, 0.42, 0.60])
WEFT_RGB = np.array([0.80, 0.72, 0.54])
BACKING_RGB = np.array([0.06, 0.055, 0.05])


@dataclass
class WeaveScene:
    size: int
    x: np.ndarray
    y: np.ndarray
    pitch: float
    coord: tuple[np.ndarray, np.ndarray]  # thread-space position of every pixel, in pitches
    colours: tuple[np.ndarray, np.ndarray]  # (n_threads, 3) per axis
    thick: tuple[np.ndarray, np.ndarray]  # thread width as a fraction of the pitch, per thread
    fibre: tuple[np.ndarray, np.ndarray]  # fine streaky noise running along each axis' threads
    light: np.ndarray  # unit vector towards the lamp, image plane
    lighting: np.ndarray
    backing: np.ndarray
    noise: np.ndarray
    keep: list[np.ndarray] = field(default_factory=list)  # 1 where a thread of that axis is intact
    layers: list[tuple[np.ndarray, np.ndarray]] = field(default_factory=list)  # (alpha, rgb) on top
    stain_gain: np.ndarray | None = None

    @property
    def scale(self) -> float:
        return self.size / 128.0


def sample(rng: np.random.Generator, size: int) -> WeaveScene:
    """Draws pose, thread wobble, colours and lighting; good and defective twins both start here."""
    s = size / 128.0
    pitch = PITCH * s * (1.0 + rng.normal(0.0, 0.01))
    x, y = f.pixel_grid(size)
    angle = np.deg2rad(rng.uniform(-1.5, 1.5))
    u, v = f.to_local(x, y, size / 2, size / 2, angle)
    coord = tuple(_wobbled(rng, w, size) / pitch for w in (u, v))
    n = int(1.6 * size / pitch) + 6
    colours = (_thread_colours(rng, WARP_RGB, n), _thread_colours(rng, WEFT_RGB, n))
    thick = tuple(np.clip(0.82 + rng.normal(0.0, 0.04, n), 0.7, 0.92) for _ in range(2))
    # Fibres run along each thread: warp threads are vertical, weft horizontal.
    fibre = tuple(f.smooth_noise(rng, (size, size), sig) for sig in ((2.0 * s, 0.4), (0.4, 2.0 * s)))
    light_angle = np.deg2rad(-135.0 + rng.normal(0.0, 8.0))
    scene = WeaveScene(
        size=size,
        x=x,
        y=y,
        pitch=pitch,
        coord=coord,
        colours=colours,
        thick=thick,
        fibre=fibre,
        light=np.array([np.cos(light_angle), np.sin(light_angle)]),
        lighting=_lighting(rng, x, y, size),
        backing=_backing(rng, size),
        noise=rng.normal(0.0, 0.01, (size, size, 3)),
    )
    scene.keep = [np.ones((size, size)), np.ones((size, size))]
    scene.stain_gain = np.ones((size, size, 3))
    return scene


def _wobbled(rng, w: np.ndarray, size: int) -> np.ndarray:
    """Shifts the weave by a random phase and bends threads: fine jitter plus slow density drift."""
    s = size / 128.0
    jitter = 0.5 * s * f.smooth_noise(rng, w.shape, 4.0 * s)
    drift = 0.9 * s * f.smooth_noise(rng, w.shape, 16.0 * s)
    return w + rng.uniform(0.0, 2.0 * PITCH * s) + jitter + drift


def _thread_colours(rng, base: np.ndarray, n: int) -> np.ndarray:
    lot = base * (1.0 + rng.normal(0.0, 0.02, 3))  # dye lot: the whole image shifts slightly
    per_thread = (1.0 + rng.normal(0.0, 0.035, (n, 1))) * (1.0 + rng.normal(0.0, 0.012, (n, 3)))
    return lot * per_thread


def _lighting(rng, x, y, size: int) -> np.ndarray:
    gain = rng.uniform(0.9, 1.1)
    tilt = rng.uniform(0.0, 0.15)
    theta = rng.uniform(0.0, 2 * np.pi)
    ramp = ((x - size / 2) * np.cos(theta) + (y - size / 2) * np.sin(theta)) / size
    return gain * (1.0 + tilt * ramp)


def _backing(rng, size: int) -> np.ndarray:
    mottle = 1.0 + 0.2 * f.smooth_noise(rng, (size, size), 3.0 * size / 128.0)
    return BACKING_RGB * mottle[..., None]


def thread_geometry(scene: WeaveScene, axis: int):
    """Per pixel: index of the axis' thread it falls on, position across that thread (-1..1 inside),
    and position along it, in pitches."""
    across, along = scene.coord[axis], scene.coord[1 - axis]
    k = np.floor(across).astype(np.int64)
    idx = k % len(scene.thick[axis])
    xa = (across - k - 0.5) * 2.0 / scene.thick[axis][idx]
    return k, xa, along


def thread_shade(xa: np.ndarray, along: np.ndarray, k, fibre: np.ndarray) -> np.ndarray:
    """Brightness of a round, twisted yarn: lit crown, dark flanks, diagonal ply lines."""
    cross = np.sqrt(np.clip(1.0 - xa**2, 0.0, 1.0))
    twist = np.sin(2 * np.pi * (0.9 * xa + 2.0 * along + 0.37 * k))
    return (0.3 + 0.7 * cross**0.7) * (1.0 + 0.06 * twist + 0.05 * fibre)


def _thread_layer(scene: WeaveScene, axis: int):
    k, xa, along = thread_geometry(scene, axis)
    idx = k % len(scene.thick[axis])
    half_px = scene.thick[axis][idx] * scene.pitch / 2
    alpha = np.clip((1.0 - np.abs(xa)) * half_px + 0.5, 0.0, 1.0) * scene.keep[axis]
    # Plain weave: thread k dips under and rises over alternate crossings; warp is up where k + l is even.
    z = (1.0 if axis == 0 else -1.0) * np.sin(np.pi * (along + k))
    shade = thread_shade(xa, along, k, scene.fibre[axis]) * (0.7 + 0.3 * z)
    return alpha, scene.colours[axis][idx] * shade[..., None], z


def compose(scene: WeaveScene) -> np.ndarray:
    """The scene as a float RGB image in about 0..1."""
    warp_a, warp_rgb, warp_z = _thread_layer(scene, 0)
    weft_a, weft_rgb, weft_z = _thread_layer(scene, 1)
    warp_up = warp_z >= weft_z
    order = [
        (np.where(warp_up, weft_a, warp_a), np.where(warp_up[..., None], weft_rgb, warp_rgb)),
        (np.where(warp_up, warp_a, weft_a), np.where(warp_up[..., None], warp_rgb, weft_rgb)),
    ]
    out = scene.backing.copy()
    for alpha, rgb in order + scene.layers:
        a = alpha[..., None]
        out = out * (1.0 - a) + rgb * a
    return out * scene.stain_gain * scene.lighting[..., None] + scene.noise


def part_region(scene: WeaveScene) -> np.ndarray:
    """The fabric fills the frame: every pixel is part."""
    return np.ones((scene.size, scene.size), dtype=bool)
