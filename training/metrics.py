"""Detection metrics on a labelled holdout: image AUROC and average precision, pixel AUROC, PRO, and binomial
confidence intervals for the rates we report.

Direction, everywhere: a higher anomaly score (or heatmap value) means less like the known-good parts; a part or
pixel counts as flagged when its value is strictly above the threshold.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage, stats
from sklearn import metrics as skm

MAX_PIXELS = 2_000_000  # pixel AUROC subsamples above this, so a large holdout stays fast
PRO_THRESHOLDS = 200


def _image_inputs(labels, scores) -> tuple[np.ndarray, np.ndarray]:
    y = np.asarray(labels)
    s = np.asarray(scores, dtype=np.float64)
    if y.ndim != 1 or s.ndim != 1 or len(y) != len(s):
        raise ValueError(f"labels and scores must be 1-D of equal length, got shapes {y.shape} and {s.shape}")
    if not np.isin(y, (0, 1)).all():
        raise ValueError(f"labels must be 0 (good) or 1 (defective), got values {np.unique(y)[:5].tolist()}")
    y = y.astype(np.int64)
    if y.min(initial=1) != 0 or y.max(initial=0) != 1:
        raise ValueError(
            f"need both good (0) and defective (1) examples, got {int((y == 0).sum())} good and "
            f"{int((y == 1).sum())} defective"
        )
    if not np.isfinite(s).all():
        raise ValueError(f"scores must be finite, got {int((~np.isfinite(s)).sum())} NaN or infinite values")
    return y, s


def image_auroc(labels, scores) -> float:
    """Area under the ROC curve. labels (N,) 0 good / 1 defective; scores (N,) higher = less like known-good."""
    y, s = _image_inputs(labels, scores)
    return float(skm.roc_auc_score(y, s))


def average_precision(labels, scores) -> float:
    """Average precision with defective as the positive class; scores (N,) higher = less like known-good."""
    y, s = _image_inputs(labels, scores)
    return float(skm.average_precision_score(y, s))


def _pixel_inputs(masks, heatmaps) -> tuple[list[np.ndarray], list[np.ndarray]]:
    if len(masks) != len(heatmaps) or not masks:
        raise ValueError(f"need one mask per heatmap and at least one, got {len(masks)} masks, {len(heatmaps)} maps")
    ms, hs = [], []
    for i, (m, h) in enumerate(zip(masks, heatmaps, strict=True)):
        m, h = np.asarray(m, dtype=bool), np.asarray(h)  # maps keep their dtype: large holdouts, float32
        if m.ndim != 2 or m.shape != h.shape:
            raise ValueError(f"image {i}: mask {m.shape} and heatmap {h.shape} must be the same (H, W)")
        if not np.issubdtype(h.dtype, np.number) or not np.isfinite(h).all():
            raise ValueError(f"image {i}: heatmap must be finite numbers (got dtype {h.dtype} or NaN / infinity)")
        ms.append(m)
        hs.append(h)
    return ms, hs


def _subsample(arrays: list[np.ndarray], max_n: int) -> list[np.ndarray]:
    """The same fixed-seed random positions from each group of equally long flat arrays, at most max_n in all,
    taken image by image so the whole holdout is never copied into one array."""
    total = sum(a[0].size for a in arrays)
    if total <= max_n:
        return [np.concatenate([a[j].ravel() for a in arrays]) for j in range(len(arrays[0]))]
    rng, parts = np.random.default_rng(0), []
    for a in arrays:
        keep = rng.choice(a[0].size, size=int(round(a[0].size * max_n / total)), replace=False)
        parts.append([x.ravel()[keep] for x in a])
    return [np.concatenate([p[j] for p in parts]) for j in range(len(arrays[0]))]


def pixel_auroc(masks, heatmaps, max_pixels: int = MAX_PIXELS) -> float:
    """AUROC over all pixels of all images. masks: list of (H, W) bool (True = defect); heatmaps: list of (H, W)
    floats, higher = less like known-good; sizes may differ between images. Above `max_pixels` a fixed-seed
    random subsample (the same share of each image) is used, so the result is deterministic."""
    ms, hs = _pixel_inputs(masks, heatmaps)
    y, s = _subsample([(m, h) for m, h in zip(ms, hs, strict=True)], max_pixels)
    if y.all() or not y.any():
        raise ValueError("pixel AUROC needs both defect and defect-free pixels in the masks")
    return float(skm.roc_auc_score(y, s))


def _counts_above(values: np.ndarray, thresholds: np.ndarray, groups: np.ndarray | None = None) -> np.ndarray:
    """How many `values` lie strictly above each of the ascending `thresholds`, per group if given: (G, T)."""
    t = len(thresholds)
    idx = np.searchsorted(thresholds, values, side="left")  # value > thresholds[j] exactly for j < idx
    g = np.zeros(len(values), dtype=np.int64) if groups is None else groups
    n_groups = int(g.max(initial=0)) + 1
    hist = np.bincount(g * (t + 1) + idx, minlength=n_groups * (t + 1)).reshape(n_groups, t + 1)
    return np.cumsum(hist[:, ::-1], axis=1)[:, ::-1][:, 1:]  # above[:, j] = sum(hist[:, j + 1:])


def pro_curve(masks, heatmaps, max_fpr: float = 0.3, n_thresholds: int = PRO_THRESHOLDS):
    """Per-region overlap against false-positive rate (Bergmann et al. 2020). Returns (fpr, pro), both ascending,
    from (0, 0) to (1, 1). Each connected defect region counts equally, whatever its size."""
    ms, hs = _pixel_inputs(masks, heatmaps)
    if not any(m.any() for m in ms):
        raise ValueError("PRO needs at least one defect region in the masks")
    if all(m.all() for m in ms):
        raise ValueError("PRO needs defect-free pixels to measure the false-positive rate")
    # thresholds at defect-free quantiles (from a subsample: it only places them; the rates at each are exact),
    # dense where the integral is taken (FPR in [0, max_fpr]) plus a few beyond, and one above / below every value
    (neg,) = _subsample([(h[~m],) for m, h in zip(ms, hs, strict=True)], MAX_PIXELS)
    levels = np.concatenate([np.linspace(0, min(1.0, 1.2 * max_fpr), n_thresholds), np.linspace(0, 1, 21)])
    ends = [max(float(h.max()) for h in hs), min(float(h.min()) for h in hs) - 1.0]
    thr = np.unique(np.concatenate([np.quantile(neg, 1 - levels), ends]))
    neg_above, n_neg = np.zeros(len(thr)), 0
    region_above, sizes = [], []
    for m, h in zip(ms, hs, strict=True):
        # 8-connected regions, as in the MVTec AD evaluation code (from memory: it labels with a 3x3 structure);
        # labelled one image at a time (an int32 per pixel: for a holdout of large images, gigabytes at once)
        lab, n = ndimage.label(m, structure=np.ones((3, 3), dtype=int))
        neg_above += _counts_above(h[~m], thr)[0]
        n_neg += int((~m).sum())
        if n:
            region = lab[lab > 0] - 1
            region_above.append(_counts_above(h[lab > 0], thr, region))
            sizes.append(np.bincount(region, minlength=n))
    fpr = neg_above / n_neg
    pro = (np.concatenate(region_above) / np.concatenate(sizes)[:, None]).mean(0)
    return fpr[::-1], pro[::-1]  # thresholds ascend, so reversing gives ascending fpr and pro


def pro_score(masks, heatmaps, max_fpr: float = 0.3) -> float:
    """Normalised area under the PRO curve up to `max_fpr` (Bergmann et al. 2020): 1.0 for a perfect map,
    about max_fpr / 2 for a map unrelated to the defects. masks: list of (H, W) bool; heatmaps: list of (H, W)
    floats, higher = less like known-good."""
    if not 0 < max_fpr <= 1:
        raise ValueError(f"max_fpr must be in (0, 1], got {max_fpr}")
    fpr, pro = pro_curve(masks, heatmaps, max_fpr)
    # trapezoid up to max_fpr, interpolating the curve there (as the MVTec AD evaluation code does, from memory)
    i = int(np.searchsorted(fpr, max_fpr, side="left"))  # fpr[0] = 0 < max_fpr <= 1 = fpr[-1], so 1 <= i < len
    if fpr[i] == max_fpr:
        end = pro[i]
    else:
        end = pro[i - 1] + (pro[i] - pro[i - 1]) * (max_fpr - fpr[i - 1]) / (fpr[i] - fpr[i - 1])
    x, y = np.append(fpr[:i], max_fpr), np.append(pro[:i], end)
    return float(np.sum(np.diff(x) * (y[1:] + y[:-1]) / 2) / max_fpr)


def binomial_ci(k: int, n: int, confidence: float = 0.95, method: str = "clopper-pearson") -> tuple[float, float]:
    """Two-sided confidence interval (low, high) for a proportion k / n: "clopper-pearson" (exact, conservative)
    or "wilson" (score interval, without continuity correction)."""
    if not (isinstance(n, (int, np.integer)) and isinstance(k, (int, np.integer)) and 0 <= k <= n and n >= 1):
        raise ValueError(f"need integers 0 <= k <= n and n >= 1, got k={k}, n={n}")
    if not 0 < confidence < 1:
        raise ValueError(f"confidence must be in (0, 1), got {confidence}")
    alpha = 1 - confidence
    if method == "clopper-pearson":
        low = 0.0 if k == 0 else float(stats.beta.ppf(alpha / 2, k, n - k + 1))
        high = 1.0 if k == n else float(stats.beta.ppf(1 - alpha / 2, k + 1, n - k))
        return low, high
    if method == "wilson":
        z = float(stats.norm.ppf(1 - alpha / 2))
        centre = (k + z * z / 2) / (n + z * z)
        half = z / (n + z * z) * math.sqrt(k * (n - k) / n + z * z / 4)
        return max(0.0, centre - half), min(1.0, centre + half)
    raise ValueError(f"method must be 'clopper-pearson' or 'wilson', got {method!r}")
