"""The tuning report's plots, one PNG each beside index.html: ROC, precision-recall, the score histogram, the
confusion matrix and the catch rate per defect class. Each function writes its file and returns the file's name.

Direction, everywhere: a higher anomaly score means less like the known-good parts; a part is flagged when
score > threshold.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib
import numpy as np
from sklearn import metrics as skm

matplotlib.use("Agg")  # files only, never a window; must precede the pyplot import
import matplotlib.pyplot as plt  # noqa: E402


def save(fig, path: Path) -> str:
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path.name


def plot_roc(out: Path, y, s, fr: dict, catch: dict) -> str:
    fpr, tpr, _ = skm.roc_curve(y, s)
    fig, ax = plt.subplots(figsize=(4.5, 4))
    ax.plot(fpr, tpr, label="ROC")
    ax.plot([0, 1], [0, 1], ls=":", c="grey", label="chance")
    ax.plot(fr["rate"], catch["rate"], "o", c="crimson", label="threshold")
    ax.set(xlabel="false-reject rate (good flagged)", ylabel="catch rate (defective flagged)", title="ROC")
    ax.legend(loc="lower right")
    return save(fig, out / "roc.png")


def plot_pr(out: Path, y, s, t: float) -> str:
    precision, recall, _ = skm.precision_recall_curve(y, s)
    flagged = s > t
    fig, ax = plt.subplots(figsize=(4.5, 4))
    ax.step(recall, precision, where="post", label="precision-recall")
    if flagged.any():  # the operating point: recall = catch rate, precision = share of flagged that are defective
        ax.plot(
            (flagged & (y == 1)).sum() / (y == 1).sum(), (y[flagged] == 1).mean(), "o", c="crimson", label="threshold"
        )
    ax.set(xlabel="recall (catch rate)", ylabel="precision (flagged that are defective)", ylim=(0, 1.02))
    ax.set_title("Precision-recall")
    ax.legend(loc="lower left")
    return save(fig, out / "precision_recall.png")


def plot_hist(out: Path, y, s, t: float) -> str:
    bins = np.histogram_bin_edges(np.append(s, t), bins=30)
    fig, ax = plt.subplots(figsize=(6, 3.5))
    ax.hist(s[y == 0], bins=bins, alpha=0.6, label=f"good (n={int((y == 0).sum())})", color="tab:green")
    ax.hist(s[y == 1], bins=bins, alpha=0.6, label=f"defective (n={int((y == 1).sum())})", color="tab:red")
    ax.axvline(t, c="black", ls="--", label=f"threshold {t:.4g}")
    ax.set(xlabel="anomaly score (higher = less like known-good)", ylabel="images", title="Scores")
    ax.legend()
    return save(fig, out / "scores.png")


def plot_confusion(out: Path, cells: list[list[int]]) -> str:
    counts = np.array(cells, dtype=float)
    rates = counts / np.maximum(counts.sum(1, keepdims=True), 1)
    fig, ax = plt.subplots(figsize=(4, 3.5))
    ax.imshow(rates, cmap="Blues", vmin=0, vmax=1)
    for i in range(2):
        for j in range(2):
            ax.text(
                j,
                i,
                f"{int(counts[i, j])}\n{100 * rates[i, j]:.1f} %",
                ha="center",
                va="center",
                color="white" if rates[i, j] > 0.5 else "black",
            )
    ax.set_xticks([0, 1], ["pass", "flag"])
    ax.set_yticks([0, 1], ["good", "defective"])
    ax.set(xlabel="verdict", ylabel="actual", title="Confusion matrix")
    return save(fig, out / "confusion.png")


def plot_per_class(out: Path, per_class: dict) -> str:
    names = list(per_class)
    rate = np.array([per_class[c]["rate"] for c in names])
    err = np.array([rate - [per_class[c]["low"] for c in names], [per_class[c]["high"] for c in names] - rate])
    fig, ax = plt.subplots(figsize=(max(4, 0.8 * len(names) + 2), 3.5))
    ax.bar(names, rate, yerr=err, capsize=4, color="tab:blue")
    ax.set(ylim=(0, 1.05), ylabel="catch rate", title="Catch rate per defect class (95 % CI)")
    ax.tick_params(axis="x", rotation=30)
    return save(fig, out / "catch_per_class.png")
