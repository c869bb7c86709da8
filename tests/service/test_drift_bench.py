"""The drift benchmark's measuring functions (`tests/bench/drift.py`): they count what they claim to count, on
hand-made features whose answer is known, and on the tiny bundle's real features."""

from __future__ import annotations

import numpy as np
import pytest
from knowngood.demo_parts.render import render
from knowngood.demo_parts.scenario import image_rng
from knowngood.training import bundle

from tests.bench import drift, drift_images

MONITOR = dict(window=200, min_images=20, sigmas=3.0)  # the service's defaults
# feature dimension of the hand-made sets (the monitor whitens them to a quarter of the holdout, 10 components);
# how rarely known-good windows alarm is `test_drift.py`'s subject, the counting is this file's
F = 16
SHIFT = 8.0  # a drifted window's feature mean, in units of the known-good spread


def _reference(seed: int = 0, holdout: int = 40) -> dict:
    """A Fréchet reference like a bundle's: known-good features ~ N(0, I); the monitor compares holdout / 2."""
    rng = np.random.default_rng(seed)
    return {"train_mu": np.zeros(F), "train_sigma": np.eye(F), "holdout_features": rng.normal(size=(holdout, F))}


def _good(n: int, seed: int) -> np.ndarray:
    return np.random.default_rng(seed).normal(size=(n, F))


def test_false_alarm_counter_counts_the_windows_that_hold_drifted_rows():
    frechet = _reference()
    feats = _good(100, seed=1)
    feats[20:40] += SHIFT  # of the five disjoint windows of 20, the second and the fourth drifted
    feats[60:80] += SHIFT
    out = drift.false_alarms(frechet, feats, **MONITOR)

    assert out["compared_images"] == 20  # half the holdout
    assert out["independent_windows"] == 5
    assert out["independent_false_alarms"] == 2
    assert out["independent_false_alarm_rate"] == pytest.approx(0.4)
    # one assessment per image once 20 are in; the one after image t compares images t-20 .. t-1, which holds a
    # drifted row exactly when that span meets 20..39 or 60..79
    assert out["assessments"] == 81
    drifted = {t for t in range(20, 101) if any(20 <= i < 40 or 60 <= i < 80 for i in range(t - 20, t))}
    assert out["false_alarms"] == len(drifted) == 78  # all but the ones after images 20, 60 and 100
    assert out["false_alarm_rate"] == pytest.approx(78 / 81)
    assert out["windows_overlap"] is True


def test_known_good_features_raise_no_alarm():
    out = drift.false_alarms(_reference(), _good(400, seed=2), **MONITOR)
    assert out["false_alarms"] == 0 and out["independent_false_alarms"] == 0
    assert out["independent_windows"] == 20
    assert 0 < out["distance_over_limit"]["max"] < 1
    assert out["independent_rate_upper_95"] == pytest.approx(1 - 0.025 ** (1 / 20), abs=1e-4)  # Clopper-Pearson, k = 0


def test_delay_counts_the_changed_images_until_drifting():
    frechet = _reference()
    found = drift.detection_delay(frechet, _good(40, 3), _good(30, 4) + SHIFT, **MONITOR)
    assert (found.images, found.alarms_before, found.drifting_at_change) == (1, 0, False)  # one far-off image will do
    assert found.final_ratio > 10
    found = drift.detection_delay(frechet, _good(40, 3), _good(30, 4), **MONITOR)
    assert (found.images, found.alarms_before) == (None, 0)  # a "change" to the same known-good distribution
    assert found.final_ratio < 1


def test_delay_says_when_the_state_was_already_drifting_at_the_change():
    good = _good(40, 3)
    good[-1] += SHIFT  # a far-off known-good image just before the change: a false alarm the delay would inherit
    found = drift.detection_delay(_reference(), good, _good(30, 4) + SHIFT, **MONITOR)
    assert found.drifting_at_change and found.alarms_before == 1
    assert found.images == 1


def test_changes_do_what_they_say():
    rng = np.random.default_rng(5)
    image = rng.uniform(0.1, 0.8, size=(1, 32, 32)).astype(np.float32)
    assert np.allclose(drift_images.brighter(image), image * drift_images.GAIN)
    moved = drift_images.shifted(image, 4)
    assert np.array_equal(moved[:, 4:, 4:], image[:, :-4, :-4])
    assert np.array_equal(moved[:, :4, 4:], np.repeat(image[:, :1, :-4], 4, axis=1))  # the top edge, repeated
    assert drift_images.blurred(image).std() < 0.5 * image.std()  # white noise loses most of its spread to sigma 1.5


def test_fresh_images_are_no_scenario_images():
    fresh = drift_images.render_fresh("bracket", 2, size=32)
    assert fresh[0].shape == (1, 32, 32) and fresh[0].dtype == np.float32
    assert not np.array_equal(fresh[0], fresh[1])
    for split in (0, 1):  # render_scenario's training and holdout-good streams
        scenario = render("bracket", None, image_rng(0, "bracket", split, 0, 0), 32).image
        assert not np.array_equal(drift_images.to_pixels(fresh[0]), scenario)


@pytest.fixture(scope="module")
def tiny(tiny_bundle):
    return bundle.load(tiny_bundle)


def test_bench_features_are_the_services(tiny, tiny_good_images):
    det, _ = tiny
    assert drift.feature_check(det, tiny_good_images[:4]) <= drift.FEATURE_TOLERANCE
    assert drift.features(det, tiny_good_images[:4]).shape == (4, 8 * det.cfg.width)  # the critic's pooled features


def test_another_material_drifts_and_the_known_good_images_do_not(tiny, tiny_good_images):
    det, frechet = tiny
    good = drift.features(det, tiny_good_images)  # the very images the bundle's reference holds
    other = drift.features(det, drift_images.render_fresh("bracket", 24, size=32))  # a stamped plate, not a soft blob
    reports = drift.assessed(drift.stream_reports(frechet, good, **MONITOR))
    assert [r.status for r in reports] == ["ok"] * 5  # images 20 .. 24
    found = drift.detection_delay(frechet, good, other, **MONITOR)
    assert found.alarms_before == 0 and not found.drifting_at_change
    assert found.images is not None and found.images <= len(frechet["holdout_features"]) // 2
    assert found.final_ratio > 1


def test_effective_dimension_counts_the_directions_the_spread_uses():
    assert drift.effective_dimension(np.eye(16)) == 16
    assert drift.effective_dimension(np.diag([1.0, 0.0, 0.0])) == 1
    assert drift.effective_dimension(np.diag([1.0, 1.0, 0.01])) == pytest.approx(2.01**2 / 2.0001, abs=0.005)
