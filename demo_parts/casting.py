"""The `casting`: a close-up of a grit-blasted cast metal surface filling the frame, photographed without a
fixture. Grayscale.

Nothing is in a fixed place: the grain field, its turn and zoom under the lens, the lamp's fall-off across
the frame, the exposure and the sensor noise are all drawn anew, so only the texture's statistics say what a
good part looks like. Sizes are in pixels at the reference scale of a 128 px render and multiplied by
`scene.scale`: `size / 128` by default (features grow with the image, as in the other kinds), or a fixed
value for a large image taken at the camera's own scale. Defects edit `layers`, `gain` and `delta` before
`compose`, so a defective image equals the good image of the same rng state outside its defect.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from knowngood.demo_parts import fields as f
from scipy import ndimage

REFERENCE_SIZE = 128  # the image side at which sizes below are given in pixels
GRAIN = (3.0, 4.0)  # mean diameter of the blasted grains, px at the reference scale
PARTICLE = (7.0, 10.0)  # mean diameter of the sintered particles that give the surface its patchy shade
PIT_RADII = (0.6, 1.1)  # the skin's own small pits, px; a `pore` defect is larger and has a rim


@dataclass
class CastingScene:
    size: int
    scale: float  # pixels per reference pixel
    x: np.ndarray
    y: np.ndarray
    light: np.ndarray  # unit vector towards the lamp, image plane
    texture: np.ndarray  # lit grain relief times particle shade, about 1.0 on average
    lighting: np.ndarray  # exposure x lamp fall-off x skin mottle
    noise: np.ndarray
    layers: list[tuple[np.ndarray, np.ndarray]] = field(default_factory=list)  # (alpha, value) over the texture
    gain: np.ndarray | None = None
    delta: np.ndarray | None = None


def sample(rng: np.random.Generator, size: int, scale: float | None = None) -> CastingScene:
    """Draws the grain field, its pose, lighting and noise; good and defective twins both start here.
    `scale` (pixels per reference pixel) defaults to size / 128."""
    s = size / REFERENCE_SIZE if scale is None else float(scale)
    x, y = f.pixel_grid(size)
    light_angle = np.deg2rad(-135.0 + rng.normal(0.0, 10.0))  # a hand-held ring light, roughly upper left
    light = np.array([np.cos(light_angle), np.sin(light_angle)])
    scene = CastingScene(
        size=size,
        scale=s,
        x=x,
        y=y,
        light=light,
        texture=_texture(rng, size, s, light),
        lighting=_lighting(rng, x, y, size, s),
        noise=rng.normal(0.0, 0.012, (size, size)),
    )
    scene.gain = np.ones((size, size))
    scene.delta = np.zeros((size, size))
    return scene


def _texture(rng, size: int, s: float, light: np.ndarray) -> np.ndarray:
    """Patchy particle shade under a fine, lamp-lit grain. Both are drawn on canvases in the texture's own
    frame, then turned and stretched into the image: no fixture holds the part, so any angle is as likely
    as any other."""
    turn = rng.uniform(0.0, np.pi)
    zoom = s * rng.uniform(0.9, 1.1)
    stretch = np.sqrt(rng.uniform(1.0, 1.3))  # the blasting angle draws grains out a little one way
    c, si = np.cos(turn), np.sin(turn)
    # Image (row, col) offsets to canvas offsets: turn, then squeeze one canvas axis (area kept).
    matrix = np.diag([1.0 / stretch, stretch]) @ np.array([[c, -si], [si, c]])
    # The lamp must light the canvas grains from where it lights the image.
    towards = np.linalg.solve(matrix.T, light[::-1])
    towards /= np.linalg.norm(towards)
    grain = _grains(rng, size, matrix, rng.uniform(*GRAIN) * zoom, towards)
    shade = _particles(rng, size, matrix, rng.uniform(*PARTICLE) * zoom)
    return 1.0 + 0.3 * grain + shade - _pits(rng, size, zoom)


def _voronoi(rng, n: int, diameter: float):
    """Random seeds about `diameter` px apart on an n x n canvas. Returns each pixel's seed label
    (1..count) and that seed's (row, col), and the number of seeds."""
    count = max(1, int(n * n / diameter**2))
    labels = np.zeros((n, n), dtype=np.int32)
    labels[rng.integers(0, n, count), rng.integers(0, n, count)] = np.arange(1, count + 1)
    # The distance transform of "not a seed" also returns where each pixel's nearest seed is.
    _, (iy, ix) = ndimage.distance_transform_edt(labels == 0, return_indices=True)
    return labels[iy, ix], iy, ix, count


def _canvas_side(size: int, matrix: np.ndarray, step: int) -> int:
    """Side of a canvas (`step` image px per canvas px) that covers the whole turned image."""
    corners = np.array([[-1, -1], [-1, 1], [1, -1], [1, 1]]) * size / 2
    return int(2 * np.ceil(np.abs(corners @ matrix.T).max() / step) + 4)


def _into_image(canvas: np.ndarray, size: int, matrix: np.ndarray, step: int) -> np.ndarray:
    n = canvas.shape[0]
    offset = np.array([n / 2, n / 2]) - matrix @ np.array([size / 2, size / 2]) / step
    return ndimage.affine_transform(canvas, matrix / step, offset, output_shape=(size, size), order=1)


def _grains(rng, size: int, matrix: np.ndarray, diameter: float, towards: np.ndarray) -> np.ndarray:
    """Grains of random tone, each a bump lit on its lamp side, with dark crevices between them.
    `towards` is the lamp direction in canvas (row, col)."""
    n = _canvas_side(size, matrix, 1)
    grain, iy, ix, count = _voronoi(rng, n, diameter)
    tone = rng.normal(0.0, 0.09, count + 1)
    facet = rng.normal(0.0, 0.05, count + 1)  # a whole grain tilted towards or away from the lamp
    ramp = np.arange(n, dtype=np.float64)
    bump = ((ramp[:, None] - iy) * towards[0] + (ramp[None, :] - ix) * towards[1]) / diameter
    crevice = (grain != np.roll(grain, 1, axis=0)) | (grain != np.roll(grain, 1, axis=1))
    crevice = ndimage.gaussian_filter(crevice.astype(np.float64), 0.25 * diameter)
    canvas = tone[grain] + facet[grain] + 0.4 * np.clip(bump, -0.8, 0.8) - 0.25 * crevice
    return _into_image(canvas, size, matrix, 1)


def _particles(rng, size: int, matrix: np.ndarray, diameter: float) -> np.ndarray:
    """Soft-edged patches of random shade, one per sintered particle; drawn at half resolution (they are
    soft anyway, and it keeps a large render fast)."""
    step = 2
    cell, _, _, count = _voronoi(rng, _canvas_side(size, matrix, step), diameter / step)
    tone = rng.normal(0.0, 0.25, count + 1)
    canvas = ndimage.gaussian_filter(tone[cell], 0.35 * diameter / step)
    return _into_image(canvas, size, matrix, step)


def _pits(rng, size: int, zoom: float) -> np.ndarray:
    """The skin's own small dark pits, as Gaussian dimples of a few sizes (round: drawn straight in the
    image)."""
    out = np.zeros((size, size))
    for radius in PIT_RADII:
        sigma = radius * zoom
        count = int(size * size / (250.0 * zoom * zoom))
        impulses = np.zeros((size, size))
        depth = rng.uniform(0.1, 0.35, count)
        np.add.at(impulses, (rng.integers(0, size, count), rng.integers(0, size, count)), depth)
        out += ndimage.gaussian_filter(impulses, sigma) * 2 * np.pi * sigma**2  # peak = depth
    return out


def _lighting(rng, x, y, size: int, s: float) -> np.ndarray:
    """Exposure, the lamp's fall-off across the frame in a random direction, and a faint skin mottle."""
    level = rng.uniform(0.43, 0.49)
    tilt = rng.uniform(0.0, 0.15)
    theta = rng.uniform(0.0, 2 * np.pi)
    ramp = ((x - size / 2) * np.cos(theta) + (y - size / 2) * np.sin(theta)) / size
    mottle = _slow_noise(rng, size, 14.0 * s)
    return level * (1.0 + tilt * ramp) * (1.0 + 0.04 * mottle)


def _slow_noise(rng, size: int, sigma: float) -> np.ndarray:
    """Unit-variance noise low-passed at `sigma` px, drawn on a grid a quarter of a sigma apart and
    interpolated: the same look as `fields.smooth_noise` at a fraction of the time for large images."""
    step = max(1, int(sigma / 4))
    coarse = f.smooth_noise(rng, (-(-size // step) + 1,) * 2, sigma / step)
    fine = ndimage.zoom(coarse, step, order=1, grid_mode=False)[:size, :size]
    return fine / (fine.std() + 1e-12)


def compose(scene: CastingScene) -> np.ndarray:
    """The scene as a float image in about 0..1."""
    texture = scene.texture
    for alpha, value in scene.layers:
        texture = texture * (1.0 - alpha) + value * alpha
    return scene.lighting * (texture * scene.gain + scene.delta) + scene.noise


def part_region(scene: CastingScene) -> np.ndarray:
    """The surface fills the frame: every pixel is part."""
    return np.ones((scene.size, scene.size), dtype=bool)
