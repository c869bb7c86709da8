"""Drift: do recent production images still look like the training images?

The Fréchet distance on the critic's pooled features between the last n production images and the training
reference (train_mu, train_sigma from the bundle) is biased upwards at small n, so it is compared with what n
known-good holdout images score against the same reference (`training.frechet.reference_distance`), never with a
fixed number.
"""

from __future__ import annotations

import threading
from collections import deque
from dataclasses import dataclass
from typing import Literal, get_args

import numpy as np
from knowngood.training.frechet import frechet_distance, gaussian_stats, reference_distance

Status = Literal["ok", "drifting", "not_enough_images", "no_reference"]
STATES: tuple[str, ...] = get_args(Status)  # every state an assessment can be in (/metrics shows each)
STD_FLOOR = 0.1  # the reference spread is at least this share of its mean (a tiny holdout can give almost none)
REFERENCE_SUBSETS = 64  # holdout subsets the reference is taken over: 8 gave a spread too noisy (bench `drift`)


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
        mu, sigma = self.frechet["train_mu"], self.frechet["train_sigma"]
        distance = frechet_distance(*gaussian_stats(feats[-n:]), mu, sigma)
        ref_mean, ref_std = self._reference_at(n)
        # subsets of one finite holdout overlap, which understates how much independent samples of good parts
        # differ: the finite-population correction undoes that (n of N drawn without replacement)
        big_n = len(holdout)
        ref_std = ref_std / np.sqrt(max(1 - (n - 1) / max(big_n - 1, 1), 1e-6))
        limit = ref_mean + sigmas * max(ref_std, STD_FLOOR * ref_mean)
        drifting = distance > limit
        detail = (
            f"the last {n} production images are {'further from' if drifting else 'as close to'} the training "
            f"images {'than' if drifting else 'as'} known-good holdout images of the same number"
            f" (distance {distance:.4g}, limit {limit:.4g})"
        )
        return DriftReport(
            "drifting" if drifting else "ok", detail, count, min_images, n, distance, ref_mean, ref_std, limit
        )

    def _reference_at(self, n: int) -> tuple[float, float]:
        if n not in self._reference:
            self._reference[n] = reference_distance(
                self.frechet["holdout_features"],
                n,
                mu=self.frechet["train_mu"],
                sigma=self.frechet["train_sigma"],
                repeats=REFERENCE_SUBSETS,
            )
        return self._reference[n]
