"""knowngood on real photographed textures: the gravel, grass and brick photographs that ship with scikit-image
(`skimage.data`, 512 x 512 px gray) and its immunohistochemistry photograph (512 x 512 px colour: stained tissue),
cut into 128 px crops, with defects drawn here. A check outside the demo's rendered parts: random textures
(gravel, grass, tissue) where every crop shows other stones, blades or cells, a regular one (brick, photographed
at an angle), and the colour path on a real colour photograph (its stains also shift the hue; its foreign
patches come from the coffee photograph).

    pip install -e ".[textures]"   (scikit-image, only for this script; not installed by `make test`)
    python -m tests.bench.texture_check [--minutes 2.5] [--out bench_out/texture_check.json] [NAME ...]

Per photograph: 200 known-good training crops from its top 320 rows; 40 good and 50 defective test crops from its
bottom 192 rows (the test crops never overlap a training crop), 10 of each defect kind: a scratch (a line of 20-50
px, 1-2 px wide, dark or bright), a pore (a dark ellipse of 3-8 px radius), a stain (a Gaussian blob of 8-20 px,
brightness x 0.55 or x 1.5), a foreign patch (14-30 px of another of the photographs) and a smear (a disc of 10-16
px blurred). knowngood trains as `train` does (`knowngood_runner.train`, whole crops at 128 px, or at `--size`
as `train --size` gives it); the patch-memory peer (`peers.PatchMemoryPeer`) on the same crops, and at
knowngood's working size too where that is another. Image AUROC (scikit-learn) overall and per defect kind, pixel
AUROC on the drawn masks. The defects are drawn, not real, but the surfaces are real: design evidence for the
README's levers, not a target.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

from tests.bench import drawn_checks

CROP = 128
TRAIN_ROWS, TEST_ROWS = (0, 320), (320, 512)
N_TRAIN, N_GOOD, N_BAD = 200, 40, 50
KINDS = ("scratch", "pore", "stain", "foreign", "smear")
PHOTOGRAPHS = ("gravel", "grass", "brick", "immunohistochemistry")
# the photograph a foreign patch comes from
FOREIGN = {"gravel": "grass", "grass": "gravel", "brick": "gravel", "immunohistochemistry": "coffee"}


def photograph(name: str) -> np.ndarray:
    try:
        from skimage import data
    except ImportError as exc:
        raise SystemExit("this check reads scikit-image's sample photographs: pip install -e '.[textures]'") from exc
    return np.asarray(getattr(data, name)(), dtype=np.float32) / 255


def crops(img: np.ndarray, n: int, rows: tuple[int, int], rng: np.random.Generator) -> list[np.ndarray]:
    out = []
    for _ in range(n):
        y = rng.integers(rows[0], rows[1] - CROP + 1)
        x = rng.integers(0, img.shape[1] - CROP + 1)
        out.append(img[y : y + CROP, x : x + CROP].copy())
    return out


def _supersampled(draw) -> np.ndarray:
    """A mask drawn at 4x by `draw(ImageDraw, scale)` and averaged down: anti-aliased edges."""
    big = Image.new("L", (4 * CROP, 4 * CROP), 0)
    draw(ImageDraw.Draw(big), 4)
    return np.asarray(big.resize((CROP, CROP), Image.BILINEAR), np.float32) / 255


def draw_defect(crop: np.ndarray, kind: str, rng: np.random.Generator, other: np.ndarray):
    """crop (H, W) gray or (H, W, 3) colour -> (defective crop, bool (H, W) mask). A colour stain also shifts the
    hue (each channel by its own share); the gray photographs' crops are drawn as before, draw for draw."""
    cy, cx = rng.integers(24, CROP - 24, 2)
    yy, xx = np.mgrid[:CROP, :CROP]
    out = crop.copy()
    px = (lambda m: m) if crop.ndim == 2 else (lambda m: m[..., None])  # a (H, W) map against the crop's pixels
    if kind == "scratch":
        length, angle, width = rng.uniform(20, 50), rng.uniform(0, np.pi), int(rng.integers(4, 9))
        dy, dx = length / 2 * np.sin(angle), length / 2 * np.cos(angle)
        m = _supersampled(
            lambda d, s: d.line([(s * (cx - dx), s * (cy - dy)), (s * (cx + dx), s * (cy + dy))], 255, width)
        )
        tone, opacity = rng.choice([0.05, 0.95]), rng.uniform(0.6, 1)
        out = out * (1 - opacity * px(m)) + tone * opacity * px(m)
    elif kind == "pore":
        ry = rng.uniform(3, 8)
        rx = ry * rng.uniform(0.6, 1.4)
        m = _supersampled(lambda d, s: d.ellipse([s * (cx - rx), s * (cy - ry), s * (cx + rx), s * (cy + ry)], 255))
        out = out * (1 - px(m)) + rng.uniform(0.02, 0.15) * px(m)
    elif kind == "stain":
        r = rng.uniform(8, 20)
        blob = np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * r * r)).astype(np.float32)
        change = (rng.choice([0.55, 1.5]) - 1) * px(blob)
        out = out * (1 + (change if crop.ndim == 2 else change * rng.uniform(0.2, 1, 3)))
        m = (blob > 0.3).astype(np.float32)
    elif kind == "foreign":
        s = int(rng.integers(14, 30))
        oy, ox = rng.integers(0, other.shape[0] - s, 2)
        y0, x0 = cy - s // 2, cx - s // 2
        out[y0 : y0 + s, x0 : x0 + s] = other[oy : oy + s, ox : ox + s]
        m = np.zeros(out.shape[:2], np.float32)
        m[y0 : y0 + s, x0 : x0 + s] = 1
    else:  # smear
        m = (((yy - cy) ** 2 + (xx - cx) ** 2) < rng.uniform(10, 16) ** 2).astype(np.float32)
        blurred = Image.fromarray((crop * 255).astype(np.uint8)).filter(ImageFilter.GaussianBlur(3))
        out = out * (1 - px(m)) + np.asarray(blurred, np.float32) / 255 * px(m)
    return np.clip(out, 0, 1).astype(np.float32), m > 0.5


def build(name: str, seed: int = 0):
    """(train crops, test crops, labels, masks), crops as (C, H, W) float32."""
    rng = np.random.default_rng(seed)
    img, other = photograph(name), photograph(FOREIGN[name])
    train = crops(img, N_TRAIN, TRAIN_ROWS, rng)
    good = crops(img, N_GOOD, TEST_ROWS, rng)
    defective = crops(img, N_BAD, TEST_ROWS, rng)
    bad, masks = zip(*(draw_defect(c, KINDS[i % len(KINDS)], rng, other) for i, c in enumerate(defective)))
    return [drawn_checks.chw(c) for c in train], *drawn_checks.test_set(good, bad, masks)


def measure(name: str, minutes: float, out_dir: Path, size: int | None = None) -> dict:
    train, test, labels, gt = build(name)
    return drawn_checks.measure_set(train, test, labels, gt, out_dir / f"texture-{name}.kgm", minutes, KINDS, size)


def main(argv: list[str] | None = None) -> int:
    return drawn_checks.main(
        argv,
        description=__doc__.splitlines()[0],
        names=PHOTOGRAPHS,
        what="photograph",
        measure=measure,
        default_out=Path("bench_out/texture_check.json"),
    )


if __name__ == "__main__":
    raise SystemExit(main())
