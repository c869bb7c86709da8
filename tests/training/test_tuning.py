"""Threshold choice: the split-conformal rank and its guarantee, the labelled-holdout optima, the strict
`score > threshold` direction, and the JSON form written into the bundle manifest."""

import json

import numpy as np
import pytest
from knowngood.training.errors import BadConfig, BadDataset
from knowngood.training.tuning import (
    Rate,
    conformal_threshold,
    per_class_catch,
    threshold_for_catch,
    threshold_for_false_reject,
)
from scipy import stats

# ---------------------------------------------------------------- split-conformal (Vovk et al. 2005)


def test_conformal_rank_on_a_hand_example():
    scores = np.array([5.0, 2.0, 9.0, 1.0, 7.0, 3.0, 8.0, 4.0, 6.0])  # n = 9, sorted 1..9
    # alpha = 0.2: k = ceil(10 * 0.8) = 8, so any t in [8, 9) is valid; the midpoint 8.5 is used
    c = conformal_threshold(scores, 0.2)
    assert (c.value, c.method, c.n_good, c.n_defective, c.catch) == (8.5, "conformal", 9, 0, None)
    assert (c.false_reject.k, c.false_reject.n) == (1, 9)
    assert "in-sample" in c.note and "rank 8 of 9" in c.note
    # alpha = 0.1: k = ceil(10 * 0.9) = 9 = n, attainable exactly; no larger score to split to, so t = s_(9)
    c = conformal_threshold(scores, 0.1)
    assert (c.value, c.method, c.false_reject.k) == (9.0, "conformal", 0)


def test_conformal_rank_survives_float_error():
    # (19 + 1) * (1 - 0.05) is 19 in exact arithmetic: the target is attainable with 19 images, rank 19
    c = conformal_threshold(np.arange(1.0, 20.0), 0.05)
    assert (c.method, c.value) == ("conformal", 19.0)
    c = conformal_threshold(np.arange(1.0, 100.0), 0.01)  # (99 + 1) * 0.99 = 99
    assert (c.method, c.value) == ("conformal", 99.0)


def test_conformal_too_few_images_uses_the_largest_and_says_how_many_are_needed():
    c = conformal_threshold(np.arange(1.0, 10.0), 0.05)  # needs n >= 1/0.05 - 1 = 19
    assert (c.value, c.method, c.false_reject.k) == (9.0, "conformal-max", 0)
    assert "at least 19" in c.note and "got 9" in c.note


def test_conformal_guarantee_holds_on_fresh_data():
    # Vovk et al. 2005: for exchangeable scores, P(fresh > t) <= alpha, and with continuous scores and t = s_(k)
    # also >= alpha - 1/(n + 1). Our midpoint sits inside [s_(k), s_(k+1)), so both bounds still apply.
    rng = np.random.default_rng(0)
    n, alpha, reps = 99, 0.1, 2000
    cal = rng.normal(size=(reps, n))
    t = np.array([conformal_threshold(row, alpha).value for row in cal])
    true_fr = stats.norm.sf(t)  # exact false-reject rate of each threshold on fresh N(0, 1) good parts (scipy.stats)
    assert alpha - 1 / (n + 1) - 0.005 <= true_fr.mean() <= alpha + 0.005  # slack: about 7 Monte Carlo std errors
    fresh = rng.normal(size=(reps, 100))
    coverage = (fresh <= t[:, None]).mean()  # marginal P(fresh passes)
    assert coverage >= 1 - alpha - 0.005
    # one threshold, a large fresh sample: its false-reject count is Binomial(N, true rate)
    big = rng.normal(size=200_000)
    k = int((big > t[0]).sum())
    low, high = stats.binom.interval(0.999, len(big), true_fr[0])
    assert low <= k <= high


# ---------------------------------------------------------------- labelled holdout


def _holdout(seed=0, n_good=80, n_bad=30):
    rng = np.random.default_rng(seed)
    good = rng.normal(0, 1, n_good).round(1)  # rounding makes ties, the hard case
    bad = rng.normal(2, 1, n_bad).round(1)
    return good, bad


def _candidates(good, bad):
    """Every distinct verdict pattern: one threshold below, between and above all pooled scores."""
    u = np.unique(np.r_[good, bad])
    return np.r_[u[0] - 1, (u[:-1] + u[1:]) / 2, u[-1] + 1]


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("target", [0.01, 0.05, 0.2])
def test_false_reject_target_gives_the_best_catch_rate_allowed(seed, target):
    good, bad = _holdout(seed)
    c = threshold_for_false_reject(good, bad, target)
    assert c.false_reject.rate <= target
    # brute force over every distinct threshold: none meets the target with a higher catch rate
    ok = [t for t in _candidates(good, bad) if (good > t).mean() <= target]
    assert c.catch.rate == max((bad > t).mean() for t in ok)
    assert c.value == min(t for t in ok if (bad > t).mean() == c.catch.rate)  # the lowest such gap


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("target", [0.5, 0.9, 0.99])
def test_catch_target_gives_the_lowest_false_reject_rate_allowed(seed, target):
    good, bad = _holdout(seed)
    c = threshold_for_catch(good, bad, target)
    assert c.catch.rate >= target
    ok = [t for t in _candidates(good, bad) if (bad > t).mean() >= target]
    assert c.false_reject.rate == min((good > t).mean() for t in ok)
    assert c.value == max(t for t in ok if (good > t).mean() == c.false_reject.rate)  # the highest such gap


def test_catch_target_below_every_score_still_flags_them():
    c = threshold_for_catch([1.0, 2.0], [0.5, 3.0], 0.99)  # must flag the lowest-scoring defective (0.5)
    assert c.value < 0.5 and c.catch.k == 2 and c.false_reject.k == 2


@pytest.mark.parametrize("seed", range(3))
def test_threshold_direction_is_strict_and_rates_are_recomputable(seed):
    good, bad = _holdout(seed)
    for c in (
        conformal_threshold(good, 0.05),
        threshold_for_false_reject(good, bad, 0.05),
        threshold_for_catch(good, bad, 0.9),
    ):
        assert (c.false_reject.k, c.false_reject.n) == (int((good > c.value).sum()), len(good))
        assert c.false_reject.rate == pytest.approx(c.false_reject.k / c.false_reject.n)
        if c.catch is not None:
            assert (c.catch.k, c.catch.n) == (int((bad > c.value).sum()), len(bad))
        # a score equal to the threshold passes; a hair above it is flagged
        edge = np.array([c.value, np.nextafter(c.value, np.inf)])
        assert (edge > c.value).tolist() == [False, True]


def test_labelled_thresholds_sit_in_the_middle_of_a_gap():
    good, bad = _holdout(1)
    pool = np.r_[good, bad]
    for c in (threshold_for_false_reject(good, bad, 0.05), threshold_for_catch(good, bad, 0.9)):
        below, above = pool[pool < c.value].max(), pool[pool > c.value].min()
        assert c.value == pytest.approx((below + above) / 2)
        # float noise far smaller than the gap cannot change any verdict
        for eps in (1e-6, -1e-6):
            assert ((pool + eps) > c.value).tolist() == (pool > c.value).tolist()


def test_per_class_catch_on_a_hand_example():
    scores = [0.1, 5.0, 0.2, 3.0, 0.5, 2.5, 9.0]
    classes = ["good", "scratch", "scratch", "dent", "dent", "dent", "good"]
    out = per_class_catch(scores, classes, threshold=2.5)
    assert list(out) == ["dent", "scratch"]
    assert (out["scratch"].k, out["scratch"].n) == (1, 2)
    assert (out["dent"].k, out["dent"].n) == (1, 3)  # 2.5 is not above 2.5: it passes
    with pytest.raises(ValueError, match="classes"):
        per_class_catch(scores, classes[:-1], 1.0)


def test_to_dict_is_plain_json():
    good, bad = _holdout()
    for c in (threshold_for_false_reject(good, bad, 0.05), conformal_threshold(good, 0.05)):
        d = json.loads(json.dumps(c.to_dict()))  # fails on numpy scalars or dataclasses
        assert d["value"] == c.value and d["method"] == c.method and d["n_good"] == len(good)
        assert d["false_reject"]["k"] == c.false_reject.k and d["false_reject"]["method"] == "clopper-pearson"
        assert (d["catch"] is None) == (c.catch is None)


def test_rate_carries_its_interval():
    r = Rate.of(0, 10)
    assert (r.k, r.n, r.rate, r.low) == (0, 10, 0.0, 0.0)
    assert r.high == pytest.approx(0.3085, abs=1e-4)  # from memory: Clopper-Pearson 95 % upper bound for 0/10


def test_bad_input_is_refused_with_domain_errors():
    with pytest.raises(BadDataset, match="no held-out known-good"):
        conformal_threshold([], 0.05)
    with pytest.raises(BadDataset, match="NaN or infinite"):
        conformal_threshold([1.0, np.nan], 0.05)
    with pytest.raises(BadConfig, match="between 0 and 1"):
        conformal_threshold([1.0, 2.0], 1.0)
    with pytest.raises(BadConfig):
        threshold_for_catch([1.0], [2.0], 0.0)
    with pytest.raises(BadDataset, match="defective"):
        threshold_for_catch([1.0], [], 0.9)
    with pytest.raises(BadDataset, match="good"):
        threshold_for_false_reject([], [1.0], 0.1)
