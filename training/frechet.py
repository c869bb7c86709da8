"""Fréchet distance between two Gaussians fitted to feature samples, and its small-sample reference.

d² = ‖μ₁ − μ₂‖² + Tr(Σ₁ + Σ₂ − 2 (Σ₁ Σ₂)^½)   (Dowson & Landau 1982; as used for FID by Heusel et al. 2017).
Here the features are the critic's pooled features, not Inception's, so it is not "FID". The estimate is
biased upwards at small n: compare it with `reference_distance` at the same n, never with a fixed number.
"""

from __future__ import annotations

import numpy as np


def gaussian_stats(features: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(N, F) -> mean (F,) and covariance (F, F), float64."""
    x = np.asarray(features, dtype=np.float64)
    if x.ndim != 2 or len(x) < 2:
        raise ValueError(f"need an (N >= 2, F) array of features, got shape {x.shape}")
    return x.mean(0), np.atleast_2d(np.cov(x, rowvar=False))  # one feature: (1, 1), not a scalar


def _sqrtm_trace(s1: np.ndarray, s2: np.ndarray) -> float:
    """Tr((Σ₁Σ₂)^½) through the symmetric form (Σ₁^½ Σ₂ Σ₁^½)^½, which has the same eigenvalues and
    stays real and stable for singular covariances (common when N < F)."""
    w, v = np.linalg.eigh((s1 + s1.T) / 2)
    root1 = (v * np.sqrt(np.clip(w, 0, None))) @ v.T
    m = root1 @ s2 @ root1
    eig = np.linalg.eigvalsh((m + m.T) / 2)
    return float(np.sqrt(np.clip(eig, 0, None)).sum())


def frechet_distance(mu1: np.ndarray, sigma1: np.ndarray, mu2: np.ndarray, sigma2: np.ndarray) -> float:
    """Squared Fréchet distance between N(mu1, sigma1) and N(mu2, sigma2); never negative."""
    mu1, mu2 = np.asarray(mu1, np.float64), np.asarray(mu2, np.float64)
    sigma1, sigma2 = np.asarray(sigma1, np.float64), np.asarray(sigma2, np.float64)
    diff = mu1 - mu2
    d = diff @ diff + np.trace(sigma1) + np.trace(sigma2) - 2 * _sqrtm_trace(sigma1, sigma2)
    return max(float(d), 0.0)


def sample_distance(a: np.ndarray, b: np.ndarray) -> float:
    """Fréchet distance between the Gaussians fitted to two feature samples (N, F) and (M, F)."""
    return frechet_distance(*gaussian_stats(a), *gaussian_stats(b))


def reference_distance(
    good: np.ndarray, n: int, *, mu: np.ndarray, sigma: np.ndarray, repeats: int = 8, seed: int = 0
) -> tuple[float, float]:
    """What a sample of n known-good images scores against the reference (mu, sigma): mean and std over
    `repeats` random subsets of `good` (N, F). A production window of n images drifts when it clearly
    exceeds this, whatever n is."""
    good = np.asarray(good, np.float64)
    n = min(n, len(good))
    rng = np.random.default_rng(seed)
    d = [
        frechet_distance(*gaussian_stats(good[rng.choice(len(good), n, replace=False)]), mu, sigma)
        for _ in range(repeats)
    ]
    return float(np.mean(d)), float(np.std(d))
