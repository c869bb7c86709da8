"""Drift: do recent production images still look like the training images?

The Fréchet distance between the last n production images and the training reference (train_mu, train_sigma from
the bundle) is biased upwards at small n, so it is compared with what n known-good holdout images score against the
same reference (`training.frechet.reference_distance`), never with a fixed number.

Two choices make that comparison trustworthy on real features (bench `drift`, measured on images the figures are
not reported on):

- The distance is taken on the leading principal components of the training features, whitened (`Whitening`).
  The critic's pooled features spread almost all their variance along one direction (effective dimension about 1
  on the demo parts), so on the raw features the distance hears only that direction: a blur or a shift that moves
  the quieter directions by many of their own spreads went unnoticed. Whitened, each component counts in units of
  its own known-good spread.
- The limit is a tail quantile, not mean + k std. A window's distance is close to a quadratic form of Gaussian
  variables, whose distribution is long-tailed (a scaled chi-square of few degrees of freedom when few directions
  dominate); mean + 3 std of chi-square(1) is exceeded 2.2 % of the time, which is what the monitor's false alarms
  were. The reference subsets' mean and spread are matched to a scaled chi-square (a gamma distribution; the
  Satterthwaite-Welch approximation, Satterthwaite 1946), and the limit is its quantile with the tail a normal
  leaves beyond `sigmas` standard deviations (3: 0.135 %).
"""

from __future__ import annotations

import threading
from collections import deque
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
from knowngood.training.frechet import frechet_distance, gaussian_stats, reference_distance
from scipy import stats

Status = Literal["ok", "drifting", "not_enough_images", "no_reference"]
STATES: tuple[str, ...] = get_args(Status)  # every state an assessment can be in (/metrics shows each)
STD_FLOOR = 0.1  # the reference spread is at least this share of its mean (a tiny holdout can give almost none)
REFERENCE_SUBSETS = 64  # holdout subsets the reference is taken over: 8 gave a spread too noisy (bench `drift`)
COMPONENTS = 16  # most principal components the distance is taken on; 8 to 32 did about as well on the demo parts
EIGEN_FLOOR = 1e-9  # components whose training variance is below this share of the largest are left out


class Whitening:
    """x -> (x - train_mu) projected on the k leading eigenvectors of train_sigma, each divided by its standard
    deviation; in those coordinates the training reference is N(0, I). k is at most `COMPONENTS` and a quarter of
    the holdout (the monitor compares half the holdout, and a covariance of n images in more than n / 2
    dimensions is mostly estimation noise)."""

    def __init__(self, mu: np.ndarray, sigma: np.ndarray, holdout: int):
        lam, vec = np.linalg.eigh(np.asarray(sigma, np.float64))
        order = np.argsort(lam)[::-1]
        lam, vec = lam[order], vec[:, order]
        keep = int(np.sum(lam > EIGEN_FLOOR * max(lam[0], 0.0))) if lam[0] > 0 else 0
        k = max(1, min(COMPONENTS, max(holdout // 4, 2), keep or 1))
        self.mu = np.asarray(mu, np.float64)
        self.w = vec[:, :k] / np.sqrt(np.clip(lam[:k], np.finfo(np.float64).tiny, None))
        self.components = k

    def __call__(self, features: np.ndarray) -> np.ndarray:
        return (np.asarray(features, np.float64) - self.mu) @ self.w

    def distance(self, features: np.ndarray) -> float:
        """Fréchet distance of these images (N, F) to the training reference, in whitened coordinates."""
        k = self.components
        return frechet_distance(*gaussian_stats(self(features)), np.zeros(k), np.eye(k))


def tail_limit(mean: float, std: float, sigmas: float) -> float:
    """The distance a known-good window exceeds as rarely as a normal variable exceeds `sigmas` standard
    deviations, for distances of this mean and spread matched to a gamma (scaled chi-square) distribution."""
    if mean <= 0:
        return 0.0
    shape, scale = (mean / std) ** 2, std**2 / mean
    return float(stats.gamma.isf(stats.norm.sf(sigmas), shape, scale=scale))


@dataclass(frozen=True)
class DriftReport:
    status: Status
    detail: str
    images: int
    needed: int
    n: int | None = None
    distance: float | None = None
    reference_mean: float | None = None
    reference_std: float | None = None
    limit: float | None = None

    @property
    def drifting(self) -> bool | None:
        return {"ok": False, "drifting": True}.get(self.status)


class DriftMonitor:
    """The drift assessment of one model (a swap starts a new one), with cached references per n; the window is
    given to `assess` or collected with `add`."""

    def __init__(self, frechet: dict[str, np.ndarray], *, window: int):
        self.frechet = frechet
        self._feats: deque[np.ndarray] = deque(maxlen=window)
        self._lock = threading.Lock()
        self._reference: dict[int, tuple[float, float]] = {}
        self._whitening: Whitening | None = None

    def add(self, features: np.ndarray) -> None:
        """features (N, F): one row per accepted production image."""
        with self._lock:
            self._feats.extend(np.asarray(features, dtype=np.float64))

    def __len__(self) -> int:
        return len(self._feats)

    def has_reference(self) -> bool:
        return all(k in self.frechet for k in ("train_mu", "train_sigma", "holdout_features"))

    def assess(self, *, min_images: int, sigmas: float, features: np.ndarray | None = None) -> DriftReport:
        """The window is `features` (N, F), oldest first, when given (the service reads it from the audit store,
        so it spans instances and restarts), else what `add` collected."""
        if features is None:
            with self._lock:
                feats = np.array(self._feats)
        else:
            feats = np.asarray(features, dtype=np.float64)
            feats = feats.reshape(len(feats), -1) if len(feats) else np.zeros((0, 1))
        count = len(feats)
        if not self.has_reference():
            return DriftReport(
                "no_reference", "the model bundle holds no Fréchet reference statistics", count, min_images
            )
        holdout = self.frechet["holdout_features"]
        if len(holdout) < 4:
            return DriftReport(
                "no_reference", f"the bundle holds features of only {len(holdout)} holdout images", count, min_images
            )
        n = min(count, len(holdout) // 2)  # half the holdout, so reference subsets differ from each other
        if count < min_images:
            return DriftReport(
                "not_enough_images", f"{count} of the {min_images} production images needed so far", count, min_images
            )
        distance = self._whiten().distance(feats[-n:])
        ref_mean, ref_std = self._reference_at(n)
        # subsets of one finite holdout overlap, which understates how much independent samples of good parts
        # differ: the finite-population correction undoes that (n of N drawn without replacement)
        big_n = len(holdout)
        ref_std = ref_std / np.sqrt(max(1 - (n - 1) / max(big_n - 1, 1), 1e-6))
        limit = tail_limit(ref_mean, max(ref_std, STD_FLOOR * ref_mean), sigmas)
        drifting = distance > limit
        detail = (
            f"the last {n} production images are {'further from' if drifting else 'as close to'} the training "
            f"images {'than' if drifting else 'as'} known-good holdout images of the same number"
            f" (distance {distance:.4g}, limit {limit:.4g})"
        )
        return DriftReport(
            "drifting" if drifting else "ok", detail, count, min_images, n, distance, ref_mean, ref_std, limit
        )

    def _whiten(self) -> Whitening:
        if self._whitening is None:
            fr = self.frechet
            self._whitening = Whitening(fr["train_mu"], fr["train_sigma"], len(fr["holdout_features"]))
        return self._whitening

    def _reference_at(self, n: int) -> tuple[float, float]:
        if n not in self._reference:
            white = self._whiten()
            k = white.components
            self._reference[n] = reference_distance(
                white(self.frechet["holdout_features"]), n, mu=np.zeros(k), sigma=np.eye(k), repeats=REFERENCE_SUBSETS
            )
        return self._reference[n]
