"""Detection metrics against scikit-learn, scipy, hand-made examples and the published PRO definition."""

import numpy as np
import pytest
from knowngood.training.metrics import average_precision, binomial_ci, image_auroc, pixel_auroc, pro_score
from scipy import ndimage, stats
from sklearn import metrics as skm


def _scored(n_good=60, n_bad=25, seed=0):
    rng = np.random.default_rng(seed)
    labels = np.r_[np.zeros(n_good, int), np.ones(n_bad, int)]
    scores = np.r_[rng.normal(0, 1, n_good), rng.normal(1.2, 1, n_bad)].round(1)  # rounding makes ties
    return labels, scores


# ---------------------------------------------------------------- image AUROC and average precision


def test_image_auroc_matches_sklearn_and_mann_whitney():
    labels, scores = _scored()
    assert image_auroc(labels, scores) == pytest.approx(skm.roc_auc_score(labels, scores), abs=1e-12)  # sklearn.metrics
    # scipy.stats: AUROC = U / (n_defective * n_good), U counting ties as one half
    u = stats.mannwhitneyu(scores[labels == 1], scores[labels == 0]).statistic
    assert image_auroc(labels, scores) == pytest.approx(u / (25 * 60), abs=1e-12)


def test_average_precision_matches_sklearn_and_its_definition():
    rng = np.random.default_rng(1)
    labels = rng.integers(0, 2, 40)
    labels[:2] = [0, 1]
    scores = rng.normal(size=40) + labels  # continuous: no ties
    assert average_precision(labels, scores) == pytest.approx(skm.average_precision_score(labels, scores), abs=1e-12)
    # sklearn.metrics definition: AP = sum_n (R_n - R_{n-1}) P_n, walking down the ranking
    order = np.argsort(-scores)
    hits = labels[order] == 1
    precision_at = np.cumsum(hits) / np.arange(1, 41)
    expected = (precision_at * hits).sum() / hits.sum()
    assert average_precision(labels, scores) == pytest.approx(expected, abs=1e-12)


def test_perfect_and_reversed_ranking():
    labels = np.array([0, 0, 0, 1, 1])
    assert image_auroc(labels, [0.1, 0.2, 0.3, 0.8, 0.9]) == 1.0
    assert image_auroc(labels, [0.9, 0.8, 0.7, 0.1, 0.2]) == 0.0  # direction: higher must mean less like good
    assert average_precision(labels, [0.1, 0.2, 0.3, 0.8, 0.9]) == 1.0


@pytest.mark.parametrize(
    "labels, scores, match",
    [
        ([0, 0, 0], [0.1, 0.2, 0.3], "both good"),
        ([1, 1], [0.1, 0.2], "both good"),
        ([0, 1, 1], [0.1, np.nan, 0.3], "finite"),
        ([0, 1, 1], [0.1, np.inf, 0.3], "finite"),
        ([0, 1, 2], [0.1, 0.2, 0.3], "0 \\(good\\) or 1"),
        ([0, 1], [0.1, 0.2, 0.3], "equal length"),
    ],
)
def test_image_metrics_refuse_bad_input(labels, scores, match):
    for f in (image_auroc, average_precision):
        with pytest.raises(ValueError, match=match):
            f(labels, scores)


# ---------------------------------------------------------------- pixel AUROC


def _maps(seed=0, sizes=((32, 32), (40, 24), (16, 48))):
    rng = np.random.default_rng(seed)
    masks, maps = [], []
    for h, w in sizes:
        m = np.zeros((h, w), bool)
        m[h // 4 : h // 2, w // 3 : w // 2] = True
        masks.append(m)
        maps.append((m * 0.8 + rng.normal(0, 0.5, (h, w))).astype(np.float32))
    return masks, maps


def test_pixel_auroc_matches_sklearn_on_flattened_maps_of_different_sizes():
    masks, maps = _maps()
    y = np.concatenate([m.ravel() for m in masks])
    s = np.concatenate([h.ravel() for h in maps])
    assert pixel_auroc(masks, maps) == pytest.approx(skm.roc_auc_score(y, s), abs=1e-12)  # sklearn.metrics


def test_pixel_auroc_subsample_is_deterministic_and_close():
    masks, maps = _maps(sizes=((64, 64),) * 6)
    full = pixel_auroc(masks, maps)
    sub = pixel_auroc(masks, maps, max_pixels=8000)
    assert sub == pixel_auroc(masks, maps, max_pixels=8000)
    assert sub != full  # the subsample really is a subsample
    assert sub == pytest.approx(full, abs=0.02)


def test_pixel_auroc_refuses_mismatched_shapes_and_single_class():
    masks, maps = _maps()
    with pytest.raises(ValueError, match="same \\(H, W\\)"):
        pixel_auroc(masks, [maps[1], maps[0], maps[2]])
    with pytest.raises(ValueError, match="both defect and defect-free"):
        pixel_auroc([np.zeros((8, 8), bool)], [np.zeros((8, 8))])


# ---------------------------------------------------------------- PRO (Bergmann et al. 2020)


def _pro_reference(masks, maps, max_fpr, n=4000):
    """Slow, literal PRO: loop over evenly spaced thresholds and over each 8-connected region, integrate with a
    fine trapezoid up to max_fpr (Bergmann et al. 2020, as in the MVTec AD evaluation code from memory)."""
    comps = [ndimage.label(m, structure=np.ones((3, 3)))[0] for m in masks]
    neg = np.concatenate([h[~m] for h, m in zip(maps, masks, strict=True)])
    lo, hi = min(h.min() for h in maps), max(h.max() for h in maps)
    fprs, pros = [], []
    for t in np.linspace(hi, lo - 1e-9, n):
        overlaps = [(h[c == i] > t).mean() for h, c in zip(maps, comps, strict=True) for i in range(1, c.max() + 1)]
        fprs.append((neg > t).mean())
        pros.append(np.mean(overlaps))
    f, p = np.array(fprs), np.array(pros)
    f, p = f[f <= max_fpr], p[f <= max_fpr]
    return np.sum(np.diff(f) * (p[1:] + p[:-1]) / 2) / max_fpr


def test_pro_of_a_perfect_map_is_one():
    masks, _ = _maps()
    assert pro_score(masks, [m.astype(np.float32) for m in masks]) == pytest.approx(1.0, abs=1e-12)
    assert pro_score(masks, [5 + 3 * m for m in masks], max_fpr=0.05) == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("max_fpr", [0.3, 0.1])
def test_pro_of_a_map_unrelated_to_defects_is_chance(max_fpr):
    # independent of the masks, every region's overlap at a threshold equals the FPR there: PRO(f) = f, so the
    # normalised area is (max_fpr^2 / 2) / max_fpr = max_fpr / 2
    masks, _ = _maps(sizes=((128, 128),) * 10)
    rng = np.random.default_rng(3)
    maps = [rng.random(m.shape) for m in masks]
    assert pro_score(masks, maps, max_fpr=max_fpr) == pytest.approx(max_fpr / 2, rel=0.1)


def test_pro_weights_regions_equally_whatever_their_size():
    # a large region fully detected, a small one not at all (its pixels look like background): PRO(f) = (1 + f) / 2,
    # normalised area 1/2 + max_fpr / 4. A pixel-weighted overlap would be about 900/1044 = 0.86 instead.
    rng = np.random.default_rng(4)
    mask = np.zeros((100, 100), bool)
    mask[10:40, 10:40] = True  # 900 px, detected
    mask[70:82, 70:82] = True  # 144 px, missed
    heat = rng.random((100, 100)) * 0.5  # background: uniform on [0, 0.5)
    heat[10:40, 10:40] = 1.0
    heat[70:82, 70:82] = rng.permutation((np.arange(144) + 0.5) / 144 * 0.5).reshape(12, 12)  # evenly like background
    for max_fpr in (0.3, 0.02):
        assert pro_score([mask], [heat], max_fpr=max_fpr) == pytest.approx(0.5 + max_fpr / 4, abs=0.01)


def test_pro_matches_a_slow_literal_reference():
    masks, maps = _maps(seed=5, sizes=((40, 40), (30, 50)))
    masks[0][30:34, 5:9] = True  # a second region in the first image
    assert pro_score(masks, maps, max_fpr=0.3) == pytest.approx(_pro_reference(masks, maps, 0.3), abs=0.01)


def test_pro_over_a_subsample_of_pixels_still_matches_the_literal_reference(monkeypatch):
    """Above `MAX_PIXELS` the thresholds are placed at quantiles of the defect-free pixels of a subsample of all
    pixels (no copy of every image's defect-free pixels); the rates at each threshold stay exact, so PRO stays
    within the reference's tolerance."""
    from knowngood.training import metrics

    masks, maps = _maps(seed=5, sizes=((40, 40), (30, 50)))
    masks[0][30:34, 5:9] = True
    monkeypatch.setattr(metrics, "MAX_PIXELS", 600)  # of 3100 pixels
    assert pro_score(masks, maps, max_fpr=0.3) == pytest.approx(_pro_reference(masks, maps, 0.3), abs=0.01)


def test_pro_refuses_masks_without_regions():
    with pytest.raises(ValueError, match="defect region"):
        pro_score([np.zeros((8, 8), bool)], [np.zeros((8, 8))])
    with pytest.raises(ValueError, match="max_fpr"):
        pro_score(*_maps(), max_fpr=0)


# ---------------------------------------------------------------- binomial confidence intervals


@pytest.mark.parametrize("n", [1, 7, 10, 50, 313])
def test_binomial_ci_matches_scipy_binomtest(n):
    for k in sorted({0, 1, n // 3, n // 2, n - 1, n}):
        res = stats.binomtest(k, n)  # scipy.stats
        for ours, theirs in (("clopper-pearson", "exact"), ("wilson", "wilson")):
            ref = res.proportion_ci(confidence_level=0.95, method=theirs)
            assert binomial_ci(k, n, 0.95, ours) == pytest.approx((ref.low, ref.high), abs=1e-9)
        ref = res.proportion_ci(confidence_level=0.8, method="exact")
        assert binomial_ci(k, n, 0.8) == pytest.approx((ref.low, ref.high), abs=1e-9)


def test_binomial_ci_worked_examples():
    # from memory: Clopper-Pearson 95 % for 0/10 is [0, 0.3085], for 5/10 [0.1871, 0.8129]
    assert binomial_ci(0, 10) == pytest.approx((0.0, 0.3085), abs=1e-4)
    assert binomial_ci(5, 10) == pytest.approx((0.1871, 0.8129), abs=1e-4)
    low, high = binomial_ci(0, 10, method="wilson")
    assert low == 0.0 and high < 0.3085  # Wilson is narrower than the exact interval here


@pytest.mark.parametrize("k, n, kw", [(3, 2, {}), (-1, 5, {}), (0, 0, {}), (1, 5, {"confidence": 1.0}),
                                      (1, 5, {"method": "wald"}), (1.5, 5, {})])  # fmt: skip
def test_binomial_ci_refuses_bad_input(k, n, kw):
    with pytest.raises(ValueError):
        binomial_ci(k, n, **kw)
