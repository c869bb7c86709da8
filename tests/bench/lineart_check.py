"""knowngood on line art: 640 px drawings of our own (black strokes 2-3 px wide on white paper, scanned) with
defects of 10-30 px. A check outside the demo's rendered parts and photographed textures: almost every pixel is
blank paper, the strokes are thin, and a defect is a few strokes' worth of ink more or less.

    python -m tests.bench.lineart_check [--minutes 2.5] [--out bench_out/lineart_check.json] [LAYOUT ...]

Two layouts: `fixed` (one drawing, a part outline with holes, centre lines, dimension lines and lettering, each
scan shifted by up to 12 px and turned by up to 1.5 degrees: a drawing checked against its master) and `random`
(every sheet another drawing of the same kind of elements at other places: no fixed layout). 200 known-good
training sheets, 40 good and 50 defective test sheets, 10 of each defect kind: a gap (10-30 px of a stroke erased),
a stray stroke (10-30 px), an ink blot (a disc of 5-15 px radius), a smudge (a grey Gaussian of 8-15 px) and a
kink (10-30 px of a straight stroke pushed sideways by 4-8 px). knowngood trains as `train` does
(`knowngood_runner.train`, its default working size for these images); the patch-memory peer
(`peers.PatchMemoryPeer`) at 128 px, as in the bench. Image AUROC (scikit-learn) overall and per kind, pixel AUROC
on the defect masks. Design evidence, not a target.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

from tests.bench import drawn_checks

SIDE = 640
SS = 2  # drawn at 2x and averaged down: anti-aliased strokes
N_TRAIN, N_GOOD, N_BAD = 200, 40, 50
KINDS = ("gap", "stray", "blot", "smudge", "kink")
LAYOUTS = ("fixed", "random")


def _elements(rng: np.random.Generator) -> list[tuple]:
    """A drawing as a list of primitives in sheet px: ("line", x0, y0, x1, y1, width), ("circle", cx, cy, r, width),
    ("dash", x0, y0, x1, y1, width)."""
    els: list[tuple] = []
    x0, y0 = rng.uniform(70, 130, 2)
    x1, y1 = SIDE - rng.uniform(70, 130, 2)
    for a, b in (((x0, y0), (x1, y0)), ((x1, y0), (x1, y1)), ((x1, y1), (x0, y1)), ((x0, y1), (x0, y0))):
        els.append(("line", *a, *b, 3))
    for _ in range(int(rng.integers(2, 5))):  # holes with their centre lines
        r = rng.uniform(18, 45)
        cx, cy = rng.uniform(x0 + r + 20, x1 - r - 20), rng.uniform(y0 + r + 20, y1 - r - 20)
        els.append(("circle", cx, cy, r, 2))
        els.append(("dash", cx - r - 12, cy, cx + r + 12, cy, 1))
        els.append(("dash", cx, cy - r - 12, cx, cy + r + 12, 1))
    for _ in range(int(rng.integers(2, 4))):  # inner edges: steps and slots
        if rng.random() < 0.5:
            y = rng.uniform(y0 + 30, y1 - 30)
            els.append(("line", x0, y, rng.uniform(x0 + 80, x1), y, 2))
        else:
            x = rng.uniform(x0 + 30, x1 - 30)
            els.append(("line", x, y0, x, rng.uniform(y0 + 80, y1), 2))
    # a dimension line with arrowheads and a row of "lettering" under the part
    dy = y1 + 30
    els.append(("line", x0, dy, x1, dy, 1))
    for xa, s in ((x0, 1), (x1, -1)):
        els.append(("line", xa, dy, xa + 12 * s, dy - 5, 1))
        els.append(("line", xa, dy, xa + 12 * s, dy + 5, 1))
    gx = rng.uniform(x0, x0 + 60)
    for _ in range(int(rng.integers(5, 9))):  # glyphs: two or three short strokes each
        for _ in range(int(rng.integers(2, 4))):
            a, b = rng.uniform(0, 12, 2), rng.uniform(0, 12, 2)
            els.append(("line", gx + a[0], dy + 10 + 1.5 * a[1], gx + b[0], dy + 10 + 1.5 * b[1], 2))
        gx += rng.uniform(16, 22)
    return els


def _draw(d: ImageDraw.ImageDraw, el: tuple, s: float) -> None:
    kind = el[0]
    if kind == "circle":
        _, cx, cy, r, w = el
        d.ellipse([s * (cx - r), s * (cy - r), s * (cx + r), s * (cy + r)], outline=255, width=int(s * w))
    elif kind == "dash":
        _, x0, y0, x1, y1, w = el
        n = max(1, int(np.hypot(x1 - x0, y1 - y0) // 10))
        for i in range(0, n, 2):
            a, b = i / n, min(1.0, (i + 1) / n)
            d.line(
                [
                    s * (x0 + a * (x1 - x0)),
                    s * (y0 + a * (y1 - y0)),
                    s * (x0 + b * (x1 - x0)),
                    s * (y0 + b * (y1 - y0)),
                ],
                fill=255,
                width=max(1, int(s * w)),
            )
    else:
        _, x0, y0, x1, y1, w = el
        d.line([s * x0, s * y0, s * x1, s * y1], fill=255, width=max(1, int(s * w)))


def _defective(els: list[tuple], kind: str, rng: np.random.Generator) -> tuple[list[tuple], dict]:
    """One defect on the drawing: the primitives it adds (drawn after any erasure) and what else to draw."""
    lines = [e for e in els if e[0] == "line" and np.hypot(e[3] - e[1], e[4] - e[2]) > 60 and e[5] >= 2]
    _, x0, y0, x1, y1, w = lines[int(rng.integers(len(lines)))]
    length, t = rng.uniform(10, 30), rng.uniform(0.2, 0.8)
    px, py = x0 + t * (x1 - x0), y0 + t * (y1 - y0)
    ux, uy = (x1 - x0) / np.hypot(x1 - x0, y1 - y0), (y1 - y0) / np.hypot(x1 - x0, y1 - y0)
    a = (px - ux * length / 2, py - uy * length / 2)
    b = (px + ux * length / 2, py + uy * length / 2)
    if kind == "gap":  # a piece of the stroke erased; the mask is the erased band
        return [], {"erase": (*a, *b, w + 3), "mask_width": w + 4}
    if kind == "kink":  # a piece of the stroke erased and drawn again pushed sideways
        off = rng.uniform(4, 8) * rng.choice([-1, 1])
        m = (px - uy * off, py + ux * off)
        band = 2 * (abs(off) + w) + 2  # the mask covers the erased piece and the pushed stroke on either side
        return [("line", *a, *m, w), ("line", *m, *b, w)], {"erase": (*a, *b, w + 3), "mask_width": band}
    cx, cy = rng.uniform(120, SIDE - 120, 2)
    if kind == "stray":
        ang = rng.uniform(0, np.pi)
        dx, dy = np.cos(ang) * length / 2, np.sin(ang) * length / 2
        stroke = ("line", cx - dx, cy - dy, cx + dx, cy + dy, int(rng.integers(2, 4)))
        return [stroke], {"box": (cx - abs(dx) - 3, cy - abs(dy) - 3, cx + abs(dx) + 3, cy + abs(dy) + 3)}
    if kind == "blot":
        return [], {"blot": (cx, cy, rng.uniform(5, 15))}
    return [], {"smudge": (cx, cy, rng.uniform(8, 15), rng.uniform(0.25, 0.45))}


def _sheet(els, rng, kind: str | None, defect_rng: np.random.Generator | None = None) -> tuple[np.ndarray, np.ndarray]:
    """One scan of the drawing `els`, with a defect of `kind` (None: known-good) -> (sheet, bool mask). The scan's
    shift, turn, paper and noise come from `rng`, the defect from `defect_rng` (default: `rng`)."""
    shift, angle = rng.uniform(-12, 12, 2), rng.uniform(-1.5, 1.5)
    added, post = _defective(els, kind, defect_rng or rng) if kind is not None else ([], {})
    canvas = Image.new("L", (SS * SIDE, SS * SIDE), 0)
    d = ImageDraw.Draw(canvas)
    mask = Image.new("L", (SIDE, SIDE), 0)
    md = ImageDraw.Draw(mask)
    for el in els:
        _draw(d, el, SS)
    if "erase" in post:
        xa, ya, xb, yb, w = post["erase"]
        d.line([SS * xa, SS * ya, SS * xb, SS * yb], fill=0, width=int(SS * w))
        md.line([xa, ya, xb, yb], fill=255, width=int(post["mask_width"]))
    for el in added:
        _draw(d, el, SS)
    if "box" in post:
        md.rectangle(post["box"], fill=255)
    if "blot" in post:
        cx, cy, r = post["blot"]
        d.ellipse([SS * (cx - r), SS * (cy - r), SS * (cx + r), SS * (cy + r)], fill=255)
        md.ellipse([cx - r, cy - r, cx + r, cy + r], fill=255)
    ink = canvas.rotate(angle, resample=Image.BILINEAR, translate=(SS * shift[0], SS * shift[1]))
    ink = ink.resize((SIDE, SIDE), Image.BILINEAR).filter(ImageFilter.GaussianBlur(0.5))
    mask = mask.rotate(angle, resample=Image.NEAREST, translate=(shift[0], shift[1]))
    paper = rng.uniform(0.9, 0.97)
    img = paper * (1 - np.asarray(ink, np.float32) / 255 * rng.uniform(0.85, 0.95))
    m = np.asarray(mask) > 0
    if "smudge" in post:
        cx, cy, r, depth = post["smudge"]
        yy, xx = np.mgrid[:SIDE, :SIDE]
        blob = np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * r * r)).astype(np.float32)
        img = img * (1 - depth * blob)
        m = blob > 0.3
    img = img + rng.normal(0, 0.012, img.shape).astype(np.float32)
    return np.clip(img, 0, 1).astype(np.float32), m


def build(layout: str, seed: int = 0):
    """(train sheets, test sheets, labels, masks), sheets as (1, H, W) float32."""
    rng = np.random.default_rng(seed)
    master = _elements(rng)

    def drawing():
        return master if layout == "fixed" else _elements(rng)

    train = [_sheet(drawing(), rng, None)[0] for _ in range(N_TRAIN)]
    good = [_sheet(drawing(), rng, None)[0] for _ in range(N_GOOD)]
    bad, masks = zip(*(_sheet(drawing(), rng, KINDS[i % len(KINDS)]) for i in range(N_BAD)))
    return [c[None] for c in train], *drawn_checks.test_set(good, bad, masks)


def measure(layout: str, minutes: float, out_dir: Path, size: int | None = None) -> dict:
    train, test, labels, gt = build(layout)
    return drawn_checks.measure_set(train, test, labels, gt, out_dir / f"lineart-{layout}.kgm", minutes, KINDS, size)


def _save(args) -> int | None:
    """--save DIR: the first sheets of each layout and their masks as PNGs, instead of measuring."""
    if not args.save:
        return None
    args.save.mkdir(parents=True, exist_ok=True)
    for layout in args.names or LAYOUTS:
        _, test, _, gt = build(layout)
        for i in (0, 1, 40, 41, 42, 43, 44):
            Image.fromarray((test[i][0] * 255).astype(np.uint8)).save(args.save / f"{layout}-{i}.png")
            Image.fromarray(gt[i].astype(np.uint8) * 255).save(args.save / f"{layout}-{i}-mask.png")
    return 0


def main(argv: list[str] | None = None) -> int:
    return drawn_checks.main(
        argv,
        description=__doc__.splitlines()[0],
        names=LAYOUTS,
        what="layout",
        measure=measure,
        default_out=Path("bench_out/lineart_check.json"),
        extra=lambda ap: ap.add_argument("--save", type=Path, help="write the first sheets as PNGs here, and stop"),
        before=_save,
    )


if __name__ == "__main__":
    raise SystemExit(main())
