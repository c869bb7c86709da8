"""The drift monitor's limit and coordinates (`service/drift.py`): a tail quantile that holds for long-tailed
distances, and whitened components that hear a change in a quiet direction. Synthetic features whose distribution
is known, so each figure can be checked against a reference library (scipy.stats)."""

from __future__ import annotations

import numpy as np
import pytest
from knowngood.service.drift import DriftMonitor, Whitening, tail_limit
from knowngood.training.frechet import frechet_distance, gaussian_stats, reference_distance
from scipy import stats

MONITOR = dict(min_images=20, sigmas=3.0)  # the service's defaults (settings.drift_min_images, drift_sigmas)


@pytest.mark.parametrize("dof", [1, 2, 5, 40])
def test_the_limit_is_the_chi_square_quantile_for_chi_square_moments(dof):
    # a chi-square of ν degrees of freedom has mean ν and variance 2ν (scipy.stats.chi2); matched by its moments
    # the limit must be its own upper quantile at the tail a normal leaves beyond 3 sigma (0.135 %)
    limit = tail_limit(dof, np.sqrt(2 * dof), 3.0)
    assert limit == pytest.approx(stats.chi2.isf(stats.norm.sf(3.0), dof), rel=1e-9)
    # and it lies further out than mean + 3 std, the more so the fewer the degrees of freedom
    assert limit > dof + 3 * np.sqrt(2 * dof)


def test_more_sigmas_mean_a_rarer_alarm():
    limits = [tail_limit(1.0, 0.8, k) for k in (2.0, 3.0, 4.0)]
    assert limits == sorted(limits) and len(set(limits)) == 3


def _reference(rng, scale: np.ndarray, holdout: int = 60) -> dict:
    f = len(scale)
    return {
        "train_mu": np.zeros(f),
        "train_sigma": np.diag(scale**2),
        "holdout_features": rng.normal(size=(holdout, f)) * scale,
    }


def test_one_dimensional_features_raise_few_false_alarms():
    # one feature: a window's distance is (mean)² + (std - 1)², long-tailed like a chi-square of one degree of
    # freedom; mean + 3 std of such a distance is exceeded about 2 % of the time. Five holdout draws, 200 fresh
    # known-good windows each
    new, old = [], []
    for seed in range(5):
        rng = np.random.default_rng(seed)
        monitor = DriftMonitor(_reference(rng, np.ones(1)), window=200)
        reports = [monitor.assess(features=rng.normal(size=(30, 1)), **MONITOR) for _ in range(200)]
        new += [r.drifting for r in reports]
        first = reports[0]
        old += [r.distance > first.reference_mean + 3 * first.reference_std for r in reports]
    assert all(r.n == 30 for r in reports)  # half the holdout compared
    assert np.mean(new) <= 0.01
    assert np.mean(old) > 0.015  # the data is long-tailed enough that the former limit would fail the goal


def test_a_change_in_a_quiet_direction_is_heard():
    # one loud feature (spread 10) and seven quiet ones (spread 0.1); the window moves three quiet ones by
    # 5 of their own spreads, a twentieth of the loud one's
    rng = np.random.default_rng(0)
    scale = np.array([10.0] + [0.1] * 7)
    frechet = _reference(rng, scale)
    window = rng.normal(size=(30, 8)) * scale
    window[:, 1:4] += 0.5
    report = DriftMonitor(frechet, window=200).assess(features=window, **MONITOR)
    assert report.status == "drifting" and report.distance > 5 * report.limit
    # on the raw features the loud direction's sampling noise buries the same change
    mean, std = reference_distance(
        frechet["holdout_features"], 30, mu=frechet["train_mu"], sigma=frechet["train_sigma"], repeats=64
    )
    raw = frechet_distance(*gaussian_stats(window), frechet["train_mu"], frechet["train_sigma"])
    assert raw < tail_limit(mean, std, 3.0)
    # and the same window without the change is ok
    window[:, 1:4] -= 0.5
    assert DriftMonitor(frechet, window=200).assess(features=window, **MONITOR).status == "ok"


def test_whitening_takes_the_leading_components_in_their_own_units():
    rng = np.random.default_rng(1)
    a = rng.normal(size=(6, 6))
    sigma = a @ a.T + np.diag([1e-12, 0, 0, 0, 0, 0])
    mu = rng.normal(size=6)
    white = Whitening(mu, sigma, holdout=60)
    assert white.components == 6  # at most COMPONENTS and a quarter of the holdout; all six here
    x = rng.multivariate_normal(mu, sigma, size=20000)
    cov = np.cov(white(x), rowvar=False)
    np.testing.assert_allclose(cov, np.eye(6), atol=0.05)  # known-good features become N(0, I)
    assert Whitening(mu, sigma, holdout=12).components == 3  # a small holdout: fewer components
    flat = np.diag([4.0, 1.0, 0.0, 0.0])  # two directions without any spread are left out
    assert Whitening(np.zeros(4), flat, holdout=60).components == 2


def test_one_feature_has_a_one_by_one_covariance():
    mean, cov = gaussian_stats(np.arange(5.0)[:, None])
    assert cov.shape == (1, 1) and cov[0, 0] == pytest.approx(2.5)  # sample variance of 0..4 (ddof 1)
