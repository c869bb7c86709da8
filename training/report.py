"""The tuning report: metrics of a scored, labelled holdout as JSON-ready numbers, and as one self-contained HTML
page (index.html) with PNG plots and a gallery of the worst misses beside it.

Direction, everywhere: a higher anomaly score means less like the known-good parts; a part is flagged when
score > threshold.
"""

from __future__ import annotations

import datetime as dt
import html
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from knowngood.training import __version__
from knowngood.training import report_plots as plot
from knowngood.training.data import resized
from knowngood.training.heatmap import overlay_png
from knowngood.training.metrics import average_precision, image_auroc, pixel_auroc, pro_score
from knowngood.training.tuning import Rate, ThresholdChoice, per_class_catch
from PIL import Image

if TYPE_CHECKING:  # comparison builds on this module; the report only calls its section
    from collections.abc import Sequence

    from knowngood.training.comparison import Comparison

PRO_MAX_FPR = 0.3
GALLERY_SIZE = 8
GALLERY_COLUMNS = ("image", "heatmap", "mask")
LARGE_SIDE = 512  # a gallery picture opens at least this large (small images enlarged by a whole factor)
CAUTION = (
    "The verdict is decision support, not a release decision. Safety-critical parts still need the inspection "
    "that local codes and the customer's quality standards require."
)


@dataclass
class HoldoutResult:
    """A scored, labelled holdout. Scores and heatmaps: higher = less like known-good."""

    paths: list[Path]
    labels: np.ndarray  # (N,) 0 good, 1 defective
    classes: list[str]  # "good" or the defect class (sub-folder of defective/, or "defective")
    scores: np.ndarray  # (N,) anomaly scores
    images: Sequence[np.ndarray]  # (C, H, W) float32 in [0, 1]: a list, or `ImageFiles` (decoded when asked for)
    heatmaps: list[np.ndarray]  # (H, W) float32, same units as scores
    masks: list[np.ndarray | None]  # (H, W) bool or None
    skipped: list[tuple[Path, str]] = field(default_factory=list)  # unreadable images left out (--skip-bad)
    maps_reduced: int = 0  # images over 1 MP whose heatmap and mask are held at about 1 MP (`holdout.held_shape`)


def pixel_sets(h: HoldoutResult) -> tuple[list, list] | None:
    """Masks and maps for the pixel metrics: every good image (no defect pixels) and each defective image that has
    a mask; a defective image without a mask is left out, as its pixels' labels are unknown."""
    if not any(m is not None for m, y in zip(h.masks, h.labels, strict=True) if y == 1):
        return None
    masks, maps = [], []
    for y, m, heat in zip(h.labels, h.masks, h.heatmaps, strict=True):
        if y == 0:
            masks.append(np.zeros(np.shape(heat), dtype=bool) if m is None else np.asarray(m, dtype=bool))
            maps.append(heat)
        elif m is not None:
            masks.append(np.asarray(m, dtype=bool))
            maps.append(heat)
    return masks, maps


def metrics_summary(holdout: HoldoutResult, choice: ThresholdChoice) -> dict:
    """JSON-ready metrics of `holdout` at `choice.value` (flag when score > value); rates are recomputed on this
    holdout with 95 % Clopper-Pearson intervals. A metric that needs a missing class or masks is None. `masks`
    says how many defective images had a mask; `warnings` lists what makes the numbers doubtful."""
    y, s, t = np.asarray(holdout.labels), np.asarray(holdout.scores, dtype=np.float64), float(choice.value)
    good, bad = s[y == 0], s[y == 1]
    both = len(good) > 0 and len(bad) > 0
    pix = pixel_sets(holdout)
    has_pix = pix is not None and any(m.any() for m in pix[0]) and not all(m.all() for m in pix[0])
    classes = {c: int(sum(1 for k in holdout.classes if k == c)) for c in sorted(set(holdout.classes))}
    masked = sum(1 for m, label in zip(holdout.masks, y, strict=True) if label == 1 and m is not None)
    m = {
        "n": {"good": len(good), "defective": len(bad), "per_class": classes},
        "image_auroc": image_auroc(y, s) if both else None,
        "average_precision": average_precision(y, s) if both else None,
        "pixel_auroc": pixel_auroc(*pix) if has_pix else None,
        "pro": pro_score(*pix, max_fpr=PRO_MAX_FPR) if has_pix else None,
        "pro_max_fpr": PRO_MAX_FPR,
        "masks": {"with_mask": masked, "defective": len(bad), "maps_reduced": holdout.maps_reduced} if masked else None,
        "threshold": choice.to_dict(),
        "false_reject": asdict(Rate.of(int((good > t).sum()), len(good))) if len(good) else None,
        "catch": asdict(Rate.of(int((bad > t).sum()), len(bad))) if len(bad) else None,
        "per_class_catch": {c: asdict(r) for c, r in per_class_catch(s, holdout.classes, t).items()},
    }
    m["warnings"] = holdout_warnings(m)
    return m


def mask_coverage(m: dict, *, scale: bool = True) -> str:
    """'from masks of k of n defective images': what the pixel metrics of summary `m` rest on; with `scale`, how
    many images were measured at about 1 MP."""
    masks = m["masks"]
    if masks is None:
        return ""
    text = f"from masks of {masks['with_mask']} of {masks['defective']} defective images"
    if scale and masks.get("maps_reduced"):
        text += f"; {masks['maps_reduced']} images over 1 megapixel measured at about 1 megapixel"
    return text


def holdout_warnings(m: dict) -> list[str]:
    """What makes the summary `m` doubtful, one sentence each: an image AUROC below chance (higher scores should
    mean defective), pixel metrics that rest on fewer than half of the defective images."""
    from knowngood.training.holdout import MASK_NAMING  # here: holdout imports this module

    out = []
    auroc = m["image_auroc"]
    if auroc is not None and auroc < 0.5:
        out.append(
            f"image AUROC {auroc:.3f} is below 0.5: the defective images score lower than the good ones, so the "
            "good and defective folders are probably swapped"
        )
    masks = m["masks"]
    if masks is not None and masks["with_mask"] < masks["defective"] / 2:
        out.append(
            f"pixel AUROC and PRO {mask_coverage(m, scale=False)}, fewer than half: masks match a defective image "
            f"by {MASK_NAMING}"
        )
    return out


# ---------------------------------------------------------------- plots (one PNG each)


# ---------------------------------------------------------------- gallery of the worst misses


def _to_uint8(image: np.ndarray) -> Image.Image:
    img = np.clip(np.asarray(image, dtype=np.float32), 0, 1)
    img = img[0] if img.shape[0] == 1 else img.transpose(1, 2, 0)
    return Image.fromarray((img * 255 + 0.5).astype(np.uint8))


def _large(picture: Image.Image) -> Image.Image:
    """The picture a thumbnail opens: its own resolution, enlarged by a whole factor (pixels kept sharp) when its
    long side is under LARGE_SIDE, so a small image is still large enough to judge."""
    factor = LARGE_SIDE // max(picture.size)
    if factor <= 1:
        return picture
    return picture.resize((picture.width * factor, picture.height * factor), Image.Resampling.NEAREST)


def _gallery(out: Path, h: HoldoutResult, t: float) -> dict[str, list[dict]]:
    """Escapes (defective, lowest scores, passed) and false rejects (good, highest scores, flagged), up to 8 each;
    each with its image, heatmap overlay and (when there is one) mask as PNG files in out/gallery."""
    s, y = np.asarray(h.scores, dtype=np.float64), np.asarray(h.labels)
    escapes = [i for i in np.argsort(s, kind="stable") if y[i] == 1 and s[i] <= t][:GALLERY_SIZE]
    rejects = [i for i in np.argsort(-s, kind="stable") if y[i] == 0 and s[i] > t][:GALLERY_SIZE]
    vmax = 2 * t if np.isfinite(t) and t > 0 else max(float(np.max([m.max() for m in h.heatmaps])), 1e-6)
    folder = out / "gallery"
    folder.mkdir(exist_ok=True)
    for stale in [*folder.glob("escape_*.png"), *folder.glob("false_reject_*.png")]:  # from an earlier report here
        stale.unlink()
    result: dict[str, list[dict]] = {}
    for kind, idx in (("escape", escapes), ("false_reject", rejects)):
        result[kind] = []
        for n, i in enumerate(idx, 1):
            stem = f"{kind}_{n:02d}"
            image = h.images[i]  # decoded here, once (a holdout's images may stay in their files)
            if image.shape[-2:] != h.heatmaps[i].shape:  # a multi-megapixel image's map is held at about 1 MP
                image = resized(np.ascontiguousarray(image, dtype=np.float32), h.heatmaps[i].shape)
            pictures = {"image": _to_uint8(image), "heatmap": overlay_png(image, h.heatmaps[i], vmax)}
            if h.masks[i] is not None:
                pictures["mask"] = Image.fromarray(np.asarray(h.masks[i], dtype=np.uint8) * 255)
            files = {}
            for column, picture in pictures.items():
                files[column] = f"gallery/{stem}_{column}.png"
                _large(picture).save(out / files[column])
            result[kind].append({"path": str(h.paths[i]), "class": h.classes[i], "score": float(s[i]), **files})
    return result


# ---------------------------------------------------------------- HTML

_CSS = """body{font-family:system-ui,sans-serif;max-width:1100px;margin:2em auto;padding:0 1em;color:#222}
table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #ccc;padding:.3em .7em;text-align:left}
th{background:#f3f3f3}.caution{background:#fff6e0;border-left:4px solid #e0a000;padding:.6em 1em}
.plots img{max-width:48%;margin:.5%}.warning{background:#fde8e8;border-left:4px solid #c00;padding:.6em 1em}
.gallery img{width:128px;height:128px;object-fit:contain;image-rendering:pixelated;border:1px solid #ddd}
.gallery td{vertical-align:middle;overflow-wrap:anywhere}"""


def _e(x) -> str:
    return html.escape(str(x))


def rate_text(r: dict | None) -> str:
    if r is None:
        return "n/a"
    return f"{100 * r['rate']:.1f} % ({r['k']} / {r['n']}; 95 % CI {100 * r['low']:.1f}–{100 * r['high']:.1f} %)"


def _num(x: float | None) -> str:
    return "n/a" if x is None else f"{x:.3f}"


def _rows(rows) -> str:
    return "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in rows)


def _headline(m: dict) -> str:
    th = m["threshold"]
    rows = [("Image AUROC", _num(m["image_auroc"])), ("Average precision", _num(m["average_precision"]))]
    if m["masks"] is not None:
        rows += [
            ("Pixel AUROC", f"{_num(m['pixel_auroc'])} ({mask_coverage(m)})"),
            (f"PRO (false-positive rate up to {100 * m['pro_max_fpr']:.0f} %)", _num(m["pro"])),
        ]
    rows += [
        ("Threshold", f"{th['value']:.4g} (method: {th['method']}, target {th['target']:g})"),
        ("False-reject rate (good flagged)", rate_text(m["false_reject"])),
        ("Catch rate (defective flagged)", rate_text(m["catch"])),
    ]
    rows += [("Images: good", m["n"]["good"]), ("Images: defective", m["n"]["defective"])]
    rows += [(f"Images: defective, {c}", n) for c, n in m["n"]["per_class"].items() if c != "good"]
    return f"<table>{_rows(rows)}</table>"


def _confusion_table(m: dict, cells: list[list[int]]) -> str:
    fr, ca = m["false_reject"], m["catch"]
    good = f"<tr><th>good</th><td>{cells[0][0]}</td><td>{cells[0][1]} — {_e(rate_text(fr))}</td></tr>"
    bad = f"<tr><th>defective</th><td>{cells[1][0]}</td><td>{cells[1][1]} — {_e(rate_text(ca))}</td></tr>"
    return f"<table><tr><th>actual \\ verdict</th><th>pass</th><th>flag</th></tr>{good}{bad}</table>"


def _gallery_html(g: dict[str, list[dict]]) -> str:
    """One table per kind of miss: a row per image, columns image / heatmap / mask; each thumbnail is a link to
    its large picture."""
    parts = []
    head = "<tr><th>file</th><th>class</th><th>score</th>" + "".join(f"<th>{c}</th>" for c in GALLERY_COLUMNS)
    for kind, label in (
        ("escape", "Escapes: defective parts that passed (lowest scores first)"),
        ("false_reject", "False rejects: good parts that were flagged (highest scores first)"),
    ):
        parts.append(f"<h3>{label}</h3>")
        if not g[kind]:
            parts.append("<p>None.</p>")
            continue
        rows = [head + "</tr>"]
        for it in g[kind]:
            cells = "".join(_thumbnail(it.get(column), column) for column in GALLERY_COLUMNS)
            name = f'<td title="{_e(it["path"])}">{_e(Path(it["path"]).name)}</td>'
            rows.append(f"<tr>{name}<td>{_e(it['class'])}</td><td>score {it['score']:.4g}</td>{cells}</tr>")
        parts.append(f'<table class="gallery">{"".join(rows)}</table>')
    return "\n".join(parts)


def _thumbnail(src: str | None, column: str) -> str:
    if src is None:
        return "<td>none</td>"
    return f'<td><a href="{_e(src)}" title="open large"><img src="{_e(src)}" alt="{column}"></a></td>'


def _warnings_html(m: dict, skipped: list) -> str:
    notes = [*m["warnings"]]
    if skipped:
        notes.append(f"{len(skipped)} unreadable images were skipped: " + "; ".join(f"{p}: {w}" for p, w in skipped))
    return "".join(f'<p class="warning"><strong>Warning.</strong> {_e(w)}</p>' for w in notes)


def write_report(
    out_dir: Path,
    holdout: HoldoutResult,
    choice: ThresholdChoice,
    *,
    title: str,
    model_info: dict,
    comparison: Comparison | None = None,
) -> Path:
    """Writes out_dir/index.html with its PNG plots and gallery beside it; returns the page's path. Scores:
    higher = less like known-good; flagged when score > choice.value. `model_info`: rows of the Model table
    (label: value), e.g. model id, revision, bundle sha256, the training and holdout folders. `comparison`
    (`tune --compare`): a section after the summary with both models side by side and their ROC curves."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    m = metrics_summary(holdout, choice)
    written = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    y, s, t = np.asarray(holdout.labels), np.asarray(holdout.scores, dtype=np.float64), float(choice.value)
    cells = [[int(((y == c) & (s <= t)).sum()), int(((y == c) & (s > t)).sum())] for c in (0, 1)]
    plots = [plot.plot_hist(out, y, s, t), plot.plot_confusion(out, cells)]
    if m["image_auroc"] is not None:
        plots = [plot.plot_roc(out, y, s, m["false_reject"], m["catch"]), plot.plot_pr(out, y, s, t), *plots]
    if m["per_class_catch"]:
        plots.append(plot.plot_per_class(out, m["per_class_catch"]))
    per_class = "".join(
        f"<tr><th>{_e(c)}</th><td>{r['n']}</td><td>{_e(rate_text(r))}</td></tr>"
        for c, r in m["per_class_catch"].items()
    )
    body = [
        f"<h1>{_e(title)}</h1>",
        f"<p>Written {_e(written)} by knowngood {_e(__version__)}.</p>",
        f'<p class="caution"><strong>Caution.</strong> {_e(CAUTION)}</p>',
        _warnings_html(m, holdout.skipped),
        "<p>Anomaly score: higher means less like the known-good parts. A part is <b>flagged</b> when its score is "
        "above the threshold, otherwise it <b>passes</b>. Intervals are 95 % Clopper–Pearson.</p>",
        "<h2>Summary</h2>",
        _headline(m),
        f"<p>{_e(choice.note)}</p>" if choice.note else "",
        comparison.section(out) if comparison is not None else "",
        "<h2>Confusion matrix</h2>",
        _confusion_table(m, cells),
        "<h2>Catch rate per defect class</h2>",
        f"<table><tr><th>class</th><th>n</th><th>catch rate</th></tr>{per_class}</table>" if per_class else "",
        "<h2>Plots</h2>",
        '<div class="plots">' + "".join(f'<img src="{p}" alt="{p}">' for p in plots) + "</div>",
        "<h2>Worst misses</h2>",
        "<p>Click a picture to open it large.</p>",
        _gallery_html(_gallery(out, holdout, t)),
        "<h2>Model</h2>",
        f"<table>{_rows([('Report written', written), ('Software', f'knowngood {__version__}'), *model_info.items()])}"
        "</table>",
    ]
    page = out / "index.html"
    page.write_text(
        f'<!doctype html><html lang="en"><head><meta charset="utf-8"><title>{_e(title)}</title>'
        f"<style>{_CSS}</style></head><body>\n" + "\n".join(body) + "\n</body></html>\n",
        encoding="utf-8",
    )
    return page
