"""`tune --compare`: the tuned model beside an older one on the same labelled holdout, each judged at its own
threshold: the numbers side by side (the printed summary, `--json`, the report), one ROC plot with both curves,
and the report's section.

Direction, everywhere: a higher anomaly score means less like the known-good parts; a part is flagged when
score > threshold.
"""

from __future__ import annotations

import dataclasses
import html
from dataclasses import dataclass
from pathlib import Path

import matplotlib
import numpy as np
from sklearn import metrics as skm

matplotlib.use("Agg")  # files only, never a window; must precede the pyplot import
import matplotlib.pyplot as plt  # noqa: E402
from knowngood.training.detector import Detector  # noqa: E402
from knowngood.training.holdout import score_holdout  # noqa: E402
from knowngood.training.report import HoldoutResult, metrics_summary, rate_text  # noqa: E402
from knowngood.training.tuning import Rate, ThresholdChoice  # noqa: E402

NUMBERS = ("image_auroc", "average_precision", "pixel_auroc", "pro", "masks", "false_reject", "catch")
NAMES = {"new": "this model", "old": "old model"}


@dataclass
class Comparison:
    """The tuned model (`new`) and OLD_MODEL (`old`) on one holdout: each side's identity (bundle, model_id,
    revision, sha256), its own threshold and NUMBERS (as `report.metrics_summary` gives them)."""

    new: dict
    old: dict
    labels: np.ndarray  # (N,) 0 good, 1 defective
    scores: dict[str, np.ndarray]  # "new" / "old" -> (N,) anomaly scores of the same images

    def to_dict(self) -> dict:
        """JSON-ready: the two sides."""
        return {"new": self.new, "old": self.old}

    def section(self, out: Path) -> str:
        """The report's section: writes out/roc_compare.png and returns the HTML."""
        return _section_html(self, _plot_roc(out, self))


def compare_models(
    holdout: HoldoutResult, summary: dict, tuned: Detector, tuned_path: Path, old: Detector, old_path: Path
) -> Comparison:
    """Scores `holdout`'s images with `old` too and puts the tuned model (its `summary`, from the same holdout)
    beside it. The old model flags at the threshold its bundle holds; the rates are counted on this holdout."""
    scores, heatmaps = score_holdout(old, holdout.images)
    again = dataclasses.replace(holdout, scores=scores, heatmaps=heatmaps)
    old_summary = metrics_summary(again, own_threshold(old, again))
    return Comparison(
        new=_side(tuned, tuned_path, summary),
        old=_side(old, old_path, old_summary),
        labels=np.asarray(holdout.labels),
        scores={"new": np.asarray(holdout.scores, dtype=np.float64), "old": again.scores.astype(np.float64)},
    )


def own_threshold(det: Detector, holdout: HoldoutResult) -> ThresholdChoice:
    """`det`'s threshold as its bundle holds it (with how it was set), and the rates it gives on `holdout`
    (flag when score > threshold)."""
    th = det.manifest.get("threshold", {})
    y, s, t = np.asarray(holdout.labels), np.asarray(holdout.scores, dtype=np.float64), float(det.threshold)
    good, bad = s[y == 0], s[y == 1]
    target = th.get("target")
    return ThresholdChoice(
        value=t,
        method=str(th.get("method", "as stored")),
        target=float(target) if isinstance(target, int | float) else 0.0,
        false_reject=Rate.of(int((good > t).sum()), len(good)),
        catch=Rate.of(int((bad > t).sum()), len(bad)) if len(bad) else None,
        n_good=len(good),
        n_defective=len(bad),
        note=f"the threshold the bundle holds (set by {th.get('set_by', 'an unrecorded step')})",
    )


def _side(det: Detector, path: Path, m: dict) -> dict:
    th = m["threshold"]
    identity = {"bundle": str(path), "model_id": det.model_id, "revision": det.revision, "sha256": det.sha256}
    return {**identity, "threshold": th["value"], "threshold_method": th["method"], **{k: m[k] for k in NUMBERS}}


def _num(x: float | None) -> str:
    return "n/a" if x is None else f"{x:.3f}"


def _short_rate(r: dict | None) -> str:
    return "n/a" if r is None else f"{100 * r['rate']:.1f} % ({r['k']} / {r['n']})"


def _rows(c: dict, rate) -> list[tuple[str, str, str]]:
    """(label, this model, old model) for the numbers both summaries carry; pixel rows only with masks."""
    new, old = c["new"], c["old"]
    rows = [("threshold (its own)", f"{new['threshold']:.4g}", f"{old['threshold']:.4g}")]
    keys = [("image AUROC", "image_auroc"), ("average precision", "average_precision")]
    if new["masks"] is not None:
        keys += [("pixel AUROC", "pixel_auroc"), ("PRO", "pro")]
    rows += [(label, _num(new[key]), _num(old[key])) for label, key in keys]
    rows += [
        (label, rate(new[key]), rate(old[key]))
        for label, key in (("false-reject rate", "false_reject"), ("catch rate", "catch"))
    ]
    return rows


def compare_text(c: dict) -> list[str]:
    """The printed summary's comparison lines, from `Comparison.to_dict()`."""
    old = c["old"]
    lines = [
        f"compared with {old['bundle']} (model {old['model_id']}) on the same holdout, each at its own threshold:",
        f"  {'':20} {NAMES['new']:22} {NAMES['old']}",
    ]
    return lines + [f"  {label:20} {a:22} {b}" for label, a, b in _rows(c, _short_rate)]


def _plot_roc(out: Path, c: Comparison) -> str:
    fig, ax = plt.subplots(figsize=(4.5, 4))
    for side, colour in (("new", "tab:blue"), ("old", "tab:orange")):
        entry = getattr(c, side)
        fpr, tpr, _ = skm.roc_curve(c.labels, c.scores[side])
        ax.plot(fpr, tpr, c=colour, label=f"{NAMES[side]} (AUROC {_num(entry['image_auroc'])})")
        fr, ca = entry["false_reject"], entry["catch"]
        ax.plot(fr["rate"], ca["rate"], "o", c=colour, label=f"{NAMES[side]}: its threshold")
    ax.plot([0, 1], [0, 1], ls=":", c="grey", label="chance")
    ax.set(xlabel="false-reject rate (good flagged)", ylabel="catch rate (defective flagged)", title="ROC: both models")
    ax.legend(loc="lower right", fontsize="small")
    fig.tight_layout()
    fig.savefig(out / "roc_compare.png", dpi=100)
    plt.close(fig)
    return "roc_compare.png"


def _section_html(c: Comparison, plot: str) -> str:
    e = html.escape
    new, old = c.new, c.old
    head = "".join(
        f"<th>{e(NAMES[side].capitalize())}: {e(Path(entry['bundle']).name)} (model {e(entry['model_id'])})</th>"
        for side, entry in (("new", new), ("old", old))
    )
    cells = _rows(c.to_dict(), rate_text)
    rows = "".join(f"<tr><th>{e(a)}</th><td>{e(b)}</td><td>{e(d)}</td></tr>" for a, b, d in cells)
    return (
        "<h2>Compared with the old model</h2>"
        "<p>Both models scored the same holdout images. Each flags at its own threshold: this model's was set on "
        f"this holdout (method {e(new['threshold_method'])}); the old model's is the one its bundle holds (method "
        f"{e(old['threshold_method'])}), so its rates here are on images it was not tuned on, unless it was tuned "
        "on this same holdout.</p>"
        f"<table><tr><th></th>{head}</tr>{rows}</table>"
        f'<div class="plots"><img src="{e(plot)}" alt="ROC curves of both models"></div>'
    )
