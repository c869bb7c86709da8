"""Fréchet distance against its closed form, scipy, and its expected behaviour."""

import numpy as np
import pytest
import scipy.linalg
from knowngood.training.frechet import frechet_distance, gaussian_stats, reference_distance, sample_distance


def _scipy_frechet(mu1, s1, mu2, s2):
    # the textbook computation with scipy.linalg.sqrtm (Heusel et al. 2017, reference implementation's formula)
    covmean = scipy.linalg.sqrtm(s1 @ s2).real
    return float(((mu1 - mu2) ** 2).sum() + np.trace(s1 + s2 - 2 * covmean))


def test_matches_scipy_sqrtm_on_random_covariances():
    rng = np.random.default_rng(0)
    for _ in range(5):
        a, b = rng.normal(size=(2, 6, 6))
        s1, s2 = a @ a.T + 0.1 * np.eye(6), b @ b.T + 0.1 * np.eye(6)
        mu1, mu2 = rng.normal(size=(2, 6))
        assert frechet_distance(mu1, s1, mu2, s2) == pytest.approx(_scipy_frechet(mu1, s1, mu2, s2), rel=1e-8)


def test_closed_form_for_diagonal_gaussians():
    # Dowson & Landau 1982: for commuting (here diagonal) covariances d² = ‖Δμ‖² + Σ (σ1ᵢ − σ2ᵢ)²
    mu1, mu2 = np.array([0.0, 1.0, 2.0]), np.array([1.0, 1.0, 0.0])
    sd1, sd2 = np.array([1.0, 2.0, 0.5]), np.array([2.0, 2.0, 1.5])
    expected = 1 + 0 + 4 + (1 + 0 + 1)
    assert frechet_distance(mu1, np.diag(sd1**2), mu2, np.diag(sd2**2)) == pytest.approx(expected, rel=1e-10)


def test_sampled_data_approaches_closed_form():
    rng = np.random.default_rng(1)
    n, f = 20000, 4
    a = rng.normal(0, 1, (n, f))
    b = rng.normal(0.5, 2, (n, f))
    expected = f * 0.5**2 + f * (2 - 1) ** 2  # closed form above: 1 + 4 = 5
    assert sample_distance(a, b) == pytest.approx(expected, rel=0.05)  # sampling tolerance: 5 % at n = 20000


def test_same_distribution_is_near_zero_and_mean_shift_grows_quadratically():
    rng = np.random.default_rng(2)
    base = rng.normal(size=(5000, 8))
    other = rng.normal(size=(5000, 8))
    assert sample_distance(base, other) < 0.02
    for shift in (1.0, 2.0, 3.0):
        # a pure mean shift of δ in every one of 8 dimensions adds 8 δ²
        assert sample_distance(base, other + shift) == pytest.approx(8 * shift**2, rel=0.03)


def test_singular_covariance_gives_finite_nonnegative_distance():
    rng = np.random.default_rng(3)
    a, b = rng.normal(size=(2, 5, 16))  # N < F: rank-deficient covariances
    d = sample_distance(a, b)
    assert np.isfinite(d) and d >= 0


def test_reference_distance_shrinks_with_sample_size():
    rng = np.random.default_rng(4)
    good = rng.normal(size=(400, 6))
    mu, sigma = gaussian_stats(good)
    small, _ = reference_distance(good, 10, mu=mu, sigma=sigma)
    large, _ = reference_distance(good, 200, mu=mu, sigma=sigma)
    assert small > large > 0  # the small-sample bias the design warns about
