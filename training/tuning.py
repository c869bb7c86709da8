"""Choosing the threshold: split-conformal from held-out known-good images, or from a labelled holdout for a
target false-reject or catch rate, each reported with binomial confidence intervals.

Direction, everywhere: a higher anomaly score means less like the known-good parts; a part is flagged when
score > threshold (strictly), otherwise it passes.

Where a labelled holdout fixes only a range of equivalent thresholds (every value between two adjacent scores gives
the same verdicts on it), we take the midpoint of that gap, so that re-scoring the same image with a little float
noise (another runtime, another CPU) cannot flip its verdict.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from knowngood.training.errors import BadConfig, BadDataset
from knowngood.training.metrics import binomial_ci

CI_METHOD = "clopper-pearson"
CONFIDENCE = 0.95
_EPS = 1e-9  # guards ceil/floor of rate x count against float error (0.99 * 100 = 98.99999999999999)


@dataclass(frozen=True)
class Rate:
    """k of n, with its two-sided confidence interval [low, high] at `confidence`."""

    k: int
    n: int
    rate: float
    low: float
    high: float
    method: str
    confidence: float = CONFIDENCE

    @classmethod
    def of(cls, k: int, n: int, method: str = CI_METHOD, confidence: float = CONFIDENCE) -> Rate:
        low, high = binomial_ci(int(k), int(n), confidence, method)
        return cls(int(k), int(n), int(k) / int(n), low, high, method, confidence)


@dataclass(frozen=True)
class ThresholdChoice:
    """A threshold (flag when score > value) with how it was chosen and the rates it achieved on the scores it
    was chosen from: false_reject on good images, catch on defective ones (None without defective images)."""

    value: float
    method: str
    target: float
    false_reject: Rate
    catch: Rate | None
    n_good: int
    n_defective: int
    note: str = ""

    def to_dict(self) -> dict:
        """Plain JSON-ready types, for the bundle manifest."""
        return {
            "value": float(self.value),
            "method": self.method,
            "target": float(self.target),
            "false_reject": asdict(self.false_reject),
            "catch": None if self.catch is None else asdict(self.catch),
            "n_good": int(self.n_good),
            "n_defective": int(self.n_defective),
            "note": self.note,
        }


def _scores(name: str, scores, allow_empty: bool = False) -> np.ndarray:
    s = np.asarray(scores, dtype=np.float64).ravel()
    if len(s) == 0 and not allow_empty:
        raise BadDataset(f"no {name} scores to set a threshold from")
    if not np.isfinite(s).all():
        raise BadDataset(f"{int((~np.isfinite(s)).sum())} of the {name} scores are NaN or infinite")
    return s


def _target(name: str, target: float) -> float:
    if not 0 < target < 1:
        raise BadConfig(f"{name} must be between 0 and 1 (exclusive), got {target}")
    return float(target)


def _rates(value: float, good: np.ndarray, bad: np.ndarray) -> tuple[Rate, Rate | None]:
    fr = Rate.of(int((good > value).sum()), len(good))
    return fr, (Rate.of(int((bad > value).sum()), len(bad)) if len(bad) else None)


def _midpoint_above(x: float, pool: np.ndarray) -> float:
    """Midpoint between x and the next larger score in `pool`; x itself when none is larger."""
    higher = pool[pool > x]
    return float((x + higher.min()) / 2) if len(higher) else float(x)


def _midpoint_below(x: float, pool: np.ndarray) -> float:
    """Midpoint between x and the next smaller score in `pool`; below the smallest by half the typical gap."""
    lower = pool[pool < x]
    if len(lower):
        return float((x + lower.max()) / 2)
    gaps = np.diff(np.unique(pool))
    return float(x - (np.median(gaps) / 2 if len(gaps) else max(1e-6, 1e-6 * abs(x))))


def conformal_threshold(good_scores, target_false_reject: float = 0.01) -> ThresholdChoice:
    """Split-conformal threshold (Vovk et al. 2005) from anomaly scores of held-out known-good images (N,),
    higher = less like known-good. With k = ceil((n + 1)(1 - alpha)), any threshold t with s_(k) <= t < s_(k+1)
    (the k-th and (k+1)-th smallest scores) guarantees that a fresh, exchangeable good image is flagged
    (score > t) with probability <= alpha; we take the midpoint of that gap. When k > n the target cannot be
    met with n images (it needs n >= 1/alpha - 1): the largest score is used and method is "conformal-max"."""
    alpha = _target("target false-reject rate", target_false_reject)
    s = np.sort(_scores("held-out known-good", good_scores))
    n = len(s)
    k = math.ceil((n + 1) * (1 - alpha) - _EPS)
    needed = math.ceil(1 / alpha - 1 - _EPS)
    in_sample = "false_reject is measured on the same held-out images (in-sample), not a fresh estimate"
    if k > n:
        value, method = float(s[-1]), "conformal-max"
        note = (
            f"target {alpha:g} needs at least {needed} held-out known-good images, got {n}; the largest score "
            f"is used, so a fresh good part is flagged with probability about 1/(n+1) = {1 / (n + 1):.3g}, above "
            f"the target; {in_sample}"
        )
    else:
        value, method = _midpoint_above(float(s[k - 1]), s), "conformal"
        note = f"rank {k} of {n} held-out known-good scores (split-conformal); {in_sample}"
    fr, _ = _rates(value, s, np.empty(0))
    return ThresholdChoice(value, method, alpha, fr, None, n, 0, note)


def threshold_for_false_reject(good_scores, defective_scores, target: float) -> ThresholdChoice:
    """The lowest threshold whose false-reject rate on the good holdout (N,) is <= target, which maximises the
    catch rate on the defective holdout (M,) under that constraint. Where several thresholds catch the same
    defective images the lowest is kept: it spends the false-reject budget the user set on margin for defects
    unlike those in the holdout. Scores: higher = less like known-good."""
    target = _target("target false-reject rate", target)
    good, bad = _scores("good holdout", good_scores), _scores("defective holdout", defective_scores, True)
    allowed = math.floor(target * len(good) + _EPS)  # good images that may score above the threshold
    # any threshold >= the (allowed+1)-th largest good score flags at most `allowed` good images
    edge = float(np.sort(good)[::-1][allowed])  # allowed < len(good) because target < 1
    value = _midpoint_above(edge, np.concatenate([good, bad]))
    fr, catch = _rates(value, good, bad)
    note = f"lowest threshold with at most {allowed} of {len(good)} good images flagged"
    return ThresholdChoice(value, "false-reject", target, fr, catch, len(good), len(bad), note)


def threshold_for_catch(good_scores, defective_scores, target: float) -> ThresholdChoice:
    """The highest threshold whose catch rate on the defective holdout (M,) is >= target, which minimises the
    false-reject rate on the good holdout (N,) under that constraint. Scores: higher = less like known-good."""
    target = _target("target catch rate", target)
    good, bad = _scores("good holdout", good_scores), _scores("defective holdout", defective_scores)
    needed = max(1, math.ceil(target * len(bad) - _EPS))  # defective images that must score above the threshold
    # a threshold below the needed-th largest defective score flags at least `needed` of them
    edge = float(np.sort(bad)[::-1][needed - 1])
    value = _midpoint_below(edge, np.concatenate([good, bad]))
    fr, catch = _rates(value, good, bad)
    note = f"highest threshold with at least {needed} of {len(bad)} defective images flagged"
    return ThresholdChoice(value, "catch", target, fr, catch, len(good), len(bad), note)


def per_class_catch(scores, classes, threshold: float) -> dict[str, Rate]:
    """Catch rate per defect class: scores (N,) higher = less like known-good, classes (N,) names; images of
    class "good" are left out. A part is flagged when score > threshold."""
    s = _scores("holdout", scores, True)
    names = np.asarray(list(classes), dtype=object)
    if len(names) != len(s):
        raise ValueError(f"got {len(s)} scores but {len(names)} classes")
    out = {}
    for name in sorted({str(c) for c in names} - {"good"}):
        hit = s[names == name] > threshold
        out[name] = Rate.of(int(hit.sum()), len(hit))
    return out
