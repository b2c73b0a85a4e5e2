"""Checks of trainer.metrics against scikit-learn, statsmodels, numpy and scipy."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import brier_score_loss, confusion_matrix, log_loss, roc_auc_score
from statsmodels.stats.proportion import proportion_confint

from trainer.errors import UserError
from trainer._metrics_kernels import EPS
from trainer.metrics import (BinaryMetrics, MarginMetrics, apply_platt, fit_platt, reliability_bin_count,
                             wilson_interval)

FAST = settings(max_examples=40, deadline=None, database=None)

# Scores drawn from a handful of values (heavy ties, exact 0 and 1, values on reliability edges)
# or continuous in [0, 1].
TIED_LEVELS = [0.0, 0.1, 0.2, 0.3, 0.5, 0.7, 0.9, 1.0, 1e-18, 1.0 - 2.0 ** -50]
TIED = st.sampled_from(TIED_LEVELS)
CONTINUOUS = st.floats(0.0, 1.0, allow_nan=False)


@st.composite
def scored_rows(draw, min_size=1, max_size=120):
    """(labels, probs, integer-valued weights or None) for one random data set."""
    n = draw(st.integers(min_size, max_size))
    score = draw(st.sampled_from([TIED, CONTINUOUS]))
    probs = np.array(draw(st.lists(score, min_size=n, max_size=n)))
    labels = np.array(draw(st.lists(st.sampled_from([0.0, 1.0]), min_size=n, max_size=n)))
    weighted = draw(st.booleans())
    weights = None
    if weighted:
        weights = np.array(draw(st.lists(st.integers(1, 5), min_size=n, max_size=n)), float)
    return labels, probs, weights


def summarize(labels, probs, weights=None, **kwargs):
    acc = BinaryMetrics(**kwargs)
    acc.update(labels, probs, weights)
    return acc.summary()


def same(a, b, rel=1e-9, abs_=1e-12):
    """Recursive equality of summaries with float tolerance; NaN equals NaN."""
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(same(a[k], b[k], rel, abs_) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(same(x, y, rel, abs_) for x, y in zip(a, b))
    if isinstance(a, float) and math.isnan(a):
        return isinstance(b, float) and math.isnan(b)
    return math.isclose(a, b, rel_tol=rel, abs_tol=abs_)


@FAST
@given(scored_rows())
def test_scalar_metrics_match_sklearn(data):
    labels, probs, weights = data
    s = summarize(labels, probs, weights)
    w = np.ones_like(probs) if weights is None else weights
    # Reference: sklearn.metrics.log_loss (clips at machine epsilon, as documented in sklearn 1.9).
    assert s["log_loss"] == pytest.approx(
        log_loss(labels, probs, sample_weight=w, labels=[0, 1]), rel=1e-9, abs=1e-12)
    # Reference: sklearn.metrics.brier_score_loss.
    assert s["brier"] == pytest.approx(
        brier_score_loss(labels, probs, sample_weight=w, labels=[0, 1]), rel=1e-9, abs=1e-12)
    # Reference: sklearn.metrics.confusion_matrix of the rule p > 0.5 (rows true, cols predicted).
    cm = confusion_matrix(labels, probs > 0.5, labels=[0, 1], sample_weight=w)
    conf = s["confusion"]
    assert [conf["tn"], conf["fp"], conf["fn"], conf["tp"]] == pytest.approx(cm.ravel().tolist())
    assert s["error_rate"] == pytest.approx((cm[0, 1] + cm[1, 0]) / w.sum())
    # Reference: the definitions in the project brief, computed with numpy.
    assert s["weight_sum"] == pytest.approx(w.sum())
    assert s["rows"] == labels.size and s["positives"] == int(labels.sum())
    if labels.any():
        assert s["calibration_ratio"] == pytest.approx(np.sum(w * probs) / np.sum(w * labels))
    else:
        assert math.isnan(s["calibration_ratio"])


@FAST
@given(scored_rows())
def test_auc_matches_sklearn_within_bound(data):
    labels, probs, weights = data
    s = summarize(labels, probs, weights)
    if 0 < labels.sum() < labels.size:
        # Reference: sklearn.metrics.roc_auc_score (tied scores count 1/2).
        ref = roc_auc_score(labels, probs, sample_weight=weights)
        assert abs(s["auc"] - ref) <= s["auc_error_bound"] + 1e-12
        if np.isin(probs, TIED_LEVELS).all():
            # Each of these levels has a rank bin of its own; a few continuous draws can still share
            # one (all scores below 2^-64 do), so only tied levels promise a zero bound.
            assert s["auc_error_bound"] == 0.0
    else:
        assert math.isnan(s["auc"]) and math.isnan(s["normalized_entropy"])


def test_auc_exact_under_heavy_ties_and_extreme_scores():
    rng = np.random.default_rng(5)
    n = 200_000
    # 1000 distinct scores, a few hundred rows each, two of them within 1e-12 of 1 and of 0.
    levels = np.concatenate([np.arange(1, 999) / 999, [1.0 - 2.0 ** -40, 1e-300]])
    probs = levels[rng.integers(0, levels.size, n)]
    labels = (rng.random(n) < probs).astype(float)
    weights = rng.random(n) + 0.5
    s = summarize(labels, probs, weights)
    # Reference: sklearn.metrics.roc_auc_score.
    assert s["auc_error_bound"] == 0.0
    assert s["auc"] == pytest.approx(roc_auc_score(labels, probs, sample_weight=weights),
                                     abs=1e-12)


def test_auc_resolves_scores_near_one_and_zero():
    rng = np.random.default_rng(6)
    k = np.arange(1, 201, dtype=float)
    probs = np.concatenate([1.0 - k * 2.0 ** -45, k * 1e-17])
    labels = (rng.random(probs.size) < 0.5).astype(float)
    s = summarize(labels, probs)
    # Reference: sklearn.metrics.roc_auc_score; every score is alone in its rank bin.
    assert s["auc_error_bound"] == 0.0
    assert s["auc"] == pytest.approx(roc_auc_score(labels, probs), abs=1e-12)


def test_scores_sharing_a_rank_bin_are_covered_by_the_bound():
    labels = np.array([0.0, 1.0, 1.0, 0.0])
    probs = np.array([0.0, 1e-300, 0.6, 0.6])
    s = summarize(labels, probs)
    # Reference: sklearn.metrics.roc_auc_score = 0.625; 0 and 1e-300 share the bin below 2^-64, so
    # that one pair is counted 1/2 and the bound is (1 * 1 / 2) / (2 * 2).
    assert roc_auc_score(labels, probs) == pytest.approx(0.625)
    assert s["auc_error_bound"] == pytest.approx(0.125)
    assert abs(s["auc"] - 0.625) <= s["auc_error_bound"]


def test_single_class_gives_nan_auc_and_entropy():
    probs = np.array([0.0, 0.2, 0.9, 1.0])
    s = summarize(np.ones(4), probs)
    assert math.isnan(s["auc"]) and math.isnan(s["normalized_entropy"])
    # Reference: sklearn.metrics.log_loss with both classes declared.
    assert s["log_loss"] == pytest.approx(log_loss(np.ones(4), probs, labels=[0, 1]))
    assert s["error_rate_at_base_rate"] == 0.0


def test_zero_one_predictions_are_clipped_at_machine_epsilon():
    labels = np.array([1.0, 0.0, 1.0, 0.0])
    probs = np.array([0.0, 1.0, 1.0, 0.0])
    s = summarize(labels, probs)
    # Reference: sklearn.metrics.log_loss; each wrong certain prediction costs -log(eps).
    assert s["log_loss"] == pytest.approx(log_loss(labels, probs))
    assert s["log_loss"] == pytest.approx(-math.log(EPS) / 2)


def test_log_loss_from_margins_matches_sklearn():
    rng = np.random.default_rng(2)
    z = rng.normal(0, 4, 500)
    p = 1 / (1 + np.exp(-z))
    y = (rng.random(500) < p).astype(float)
    acc = BinaryMetrics()
    acc.update(y, p, margins=z)
    # Reference: sklearn.metrics.log_loss on the probabilities (none needs clipping here).
    assert acc.summary()["log_loss"] == pytest.approx(log_loss(y, p), rel=1e-12)


def test_normalized_entropy_is_log_loss_over_base_rate_entropy():
    rng = np.random.default_rng(3)
    p = rng.random(300)
    y = (rng.random(300) < p).astype(float)
    s = summarize(y, p)
    r = y.mean()
    # Reference: sklearn.metrics.log_loss of the constant base-rate prediction is its entropy.
    assert s["normalized_entropy"] == pytest.approx(log_loss(y, p) / log_loss(y, np.full(300, r)))


@FAST
@given(scored_rows(min_size=2), st.lists(st.floats(0, 1), min_size=1, max_size=4))
def test_merge_of_chunks_equals_whole(data, cuts):
    labels, probs, weights = data
    whole = summarize(labels, probs, weights, n_bins=7, histogram_bins=9, auc_bits=6)
    points = sorted({int(c * labels.size) for c in cuts} | {0, labels.size})
    parts = []
    for lo, hi in zip(points[:-1], points[1:]):
        acc = BinaryMetrics(n_bins=7, histogram_bins=9, auc_bits=6)
        acc.update(labels[lo:hi], probs[lo:hi], None if weights is None else weights[lo:hi])
        parts.append(acc)
    merged = parts[0]
    for part in parts[1:]:
        merged = merged.merge(part)
    # Reference: the same accumulator fed all rows at once (merge must be exact).
    assert same(merged.summary(), whole)


def test_merge_refuses_different_settings():
    with pytest.raises(ValueError):
        BinaryMetrics(n_bins=5).merge(BinaryMetrics(n_bins=6))


def _rank_gap(hi, bits):
    """Width of a rank bin at score ``hi`` (relative 2**-bits in p below 1/2, in 1 - p above)."""
    return 2.0 ** -bits * (hi if hi < 0.5 else 1.0 - hi)


@pytest.mark.parametrize("weighted", [False, True])
def test_reliability_bins_end_at_numpy_quantiles(weighted):
    rng = np.random.default_rng(4)
    probs = 1.0 / (1.0 + np.exp(-rng.normal(-3.2, 1.1, 20000)))
    labels = (rng.random(probs.size) < probs).astype(float)
    w = rng.uniform(0.5, 2.0, probs.size) if weighted else np.ones(probs.size)
    s = summarize(labels, probs, w if weighted else None, n_bins=16)
    bins = s["bins"]
    assert len(bins) == 16 and sum(b["count"] for b in bins) == probs.size
    # Reference: numpy.quantile(method="inverted_cdf", weights=...): bin j ends at the rank bin
    # holding the weighted j/16 quantile, i.e. within one rank-bin width below its largest score.
    q = np.quantile(probs, np.arange(1, 16) / 16, method="inverted_cdf", weights=w)
    for b, qj in zip(bins[:-1], q):
        assert b["hi"] - _rank_gap(b["hi"], 12) <= qj <= b["hi"]
    assert all(a["hi"] < b["lo"] for a, b in zip(bins[:-1], bins[1:]))
    # Reference: numpy sums of the rows in [lo, hi]; a bin's weight is 1/16 of the total up to
    # the weight of the rank bins at its ends.
    for b in bins:
        inside = (probs >= b["lo"]) & (probs <= b["hi"])
        assert b["count"] == inside.sum()
        assert b["weight"] == pytest.approx(w[inside].sum(), rel=1e-12)
        assert abs(b["weight"] - w.sum() / 16) <= 10.0


@FAST
@given(scored_rows(), st.integers(1, 12))
def test_reliability_bins_match_numpy_and_statsmodels(data, n_bins):
    labels, probs, weights = data
    s = summarize(labels, probs, weights, n_bins=n_bins)
    w = np.ones_like(probs) if weights is None else weights
    bins = s["bins"]
    assert 1 <= len(bins) <= n_bins and sum(b["count"] for b in bins) == probs.size
    ece = 0.0
    for b in bins:
        inside = (probs >= b["lo"]) & (probs <= b["hi"])
        wb = w[inside]
        # Reference: numpy on the rows whose score lies in the bin's [lo, hi].
        assert b["count"] == inside.sum() and b["lo"] == probs[inside].min()
        assert b["hi"] == probs[inside].max()
        assert b["mean_prediction"] == pytest.approx(np.sum(wb * probs[inside]) / wb.sum())
        assert b["observed_rate"] == pytest.approx(np.sum(wb * labels[inside]) / wb.sum())
        # Reference: statsmodels proportion_confint(method="wilson") at the effective size
        # (sum w)^2 / sum w^2 (Kish's effective sample size, from memory).
        n_eff = wb.sum() ** 2 / np.sum(wb * wb)
        lo, hi = proportion_confint(b["observed_rate"] * n_eff, n_eff, alpha=0.05, method="wilson")
        assert (b["wilson_low"], b["wilson_high"]) == pytest.approx((lo, hi), rel=1e-9, abs=1e-12)
        ece += abs(np.sum(wb * probs[inside]) - np.sum(wb * labels[inside]))
    # Reference: ECE definition of "Obtaining Well Calibrated Probabilities Using Bayesian
    # Binning", AAAI 2015 (from memory), over these bins.
    assert s["ece"] == pytest.approx(ece / w.sum(), abs=1e-12)


def test_reliability_bins_on_tied_levels_end_at_exact_quantiles():
    rng = np.random.default_rng(9)
    probs = rng.integers(1, 200, 5000) / 200.0
    labels = (rng.random(probs.size) < probs).astype(float)
    s = summarize(labels, probs, n_bins=10)
    # Reference: numpy.quantile(method="inverted_cdf"): with scores far apart from each other each
    # bin's largest score is exactly a decile (ties are never split).
    q = np.quantile(probs, np.arange(1, 10) / 10, method="inverted_cdf")
    assert {b["hi"] for b in s["bins"]} == set(q.tolist()) | {probs.max()}


def test_automatic_bin_count_gives_each_bin_enough_rows():
    # Reference: the rule stated in the README (1,000 rows per bin, 10 to 20 bins).
    for rows, expected in ((800, 10), (12_500, 12), (25_000, 20), (10**6, 20)):
        assert reliability_bin_count(rows) == expected
    rng = np.random.default_rng(3)
    probs = rng.random(25000) * 0.2
    s = summarize((rng.random(25000) < probs).astype(float), probs)
    assert len(s["bins"]) == 20 and min(b["count"] for b in s["bins"]) >= 1000


def test_wilson_interval_matches_statsmodels():
    k = np.array([0.0, 1.0, 7.5, 30.0, 100.0])
    n = np.array([10.0, 3.0, 20.0, 30.0, 1000.0])
    lo, hi = wilson_interval(k, n)
    # Reference: statsmodels.stats.proportion.proportion_confint(method="wilson").
    ref_lo, ref_hi = proportion_confint(k, n, alpha=0.05, method="wilson")
    assert lo == pytest.approx(ref_lo, rel=1e-9, abs=1e-15)
    assert hi == pytest.approx(ref_hi, rel=1e-9, abs=1e-15)


@FAST
@given(scored_rows())
def test_histogram_matches_numpy(data):
    labels, probs, weights = data
    s = summarize(labels, probs, weights, histogram_bins=12)
    w = np.ones_like(probs) if weights is None else weights
    edges = np.array(s["histogram"]["edges"])
    # Reference: numpy.histogram with the same edges ([lo, hi) bins, the last one closed).
    pos = np.histogram(probs[labels == 1], bins=edges, weights=w[labels == 1])[0]
    neg = np.histogram(probs[labels == 0], bins=edges, weights=w[labels == 0])[0]
    assert s["histogram"]["positives"] == pytest.approx(pos.tolist())
    assert s["histogram"]["negatives"] == pytest.approx(neg.tolist())


@FAST
@given(st.integers(2, 300), st.integers(0, 2**32 - 1))
def test_error_rate_at_base_rate_matches_top_k_rule(n, seed):
    rng = np.random.default_rng(seed)
    probs = (rng.permutation(n) + 1.0) / (n + 2.0)
    labels = (rng.random(n) < probs).astype(float)
    s = summarize(labels, probs)
    k = int(labels.sum())
    # Reference: sklearn.metrics.confusion_matrix when exactly the k highest scores (k = number of
    # positives) are called positive.
    pred = probs >= np.sort(probs)[::-1][k - 1] if k > 0 else np.zeros(n, bool)
    cm = confusion_matrix(labels, pred, labels=[0, 1])
    assert s["error_rate_at_base_rate"] == pytest.approx((cm[0, 1] + cm[1, 0]) / n, abs=1e-12)


def test_error_rate_at_base_rate_splits_tied_scores():
    labels = np.array([1.0, 0.0, 0.0, 0.0, 1.0])
    s = summarize(labels, np.full(5, 0.4))
    # Reference: the mean of the hypergeometric law (from memory): calling 2 of 5 tied rows positive
    # at random finds 2 * 2/5 positives on average, so the expected error is 2 * (2 - 0.8) / 5.
    assert s["error_rate_at_base_rate"] == pytest.approx(2 * (2 - 0.8) / 5)


def test_empty_accumulator_summary():
    s = BinaryMetrics().summary()
    assert s["rows"] == 0 and math.isnan(s["log_loss"]) and math.isnan(s["auc"])
    assert s["bins"] == [] and math.isnan(s["ece"])


@pytest.mark.parametrize("kwargs, bad", [
    ({"labels": [0, 2], "probs": [0.1, 0.2]}, "labels"),
    ({"labels": [0, 1], "probs": [0.1, 1.5]}, "probs"),
    ({"labels": [0, 1], "probs": [0.1, np.nan]}, "probs"),
    ({"labels": [0, 1], "probs": [0.1]}, "probs"),
    ({"labels": [0, 1], "probs": [0.1, 0.2], "weights": [1.0, -1.0]}, "weights"),
    ({"labels": [0, 1], "probs": [0.1, 0.2], "margins": [0.0, np.inf]}, "margins"),
])
def test_bad_input_raises_user_error(kwargs, bad):
    with pytest.raises(UserError, match=bad):
        BinaryMetrics().update(**kwargs)


def test_bad_settings_raise_user_error():
    with pytest.raises(UserError, match="n_bins"):
        BinaryMetrics(n_bins=0)
    with pytest.raises(UserError, match="auc_bits"):
        MarginMetrics(auc_bits=20)


MARGINS = st.one_of(
    st.floats(-1e12, 1e12, allow_nan=False),
    st.sampled_from([0.0, -0.0, 1e-20, -1e-20, 3.0, -3.0, 1e300, -1e300]),
)


@FAST
@given(st.lists(st.tuples(MARGINS, st.sampled_from([0.0, 1.0]), st.integers(1, 4)),
                min_size=1, max_size=120))
def test_margin_metrics_match_sklearn(rows):
    m, y, w = (np.array(c, float) for c in zip(*rows))
    acc = MarginMetrics()
    acc.update(y, m, w)
    s = acc.summary()
    # Reference: sklearn.metrics.confusion_matrix of the rule margin > 0.
    cm = confusion_matrix(y, m > 0, labels=[0, 1], sample_weight=w)
    assert s["error_rate"] == pytest.approx((cm[0, 1] + cm[1, 0]) / w.sum())
    if 0 < y.sum() < y.size:
        # Reference: sklearn.metrics.roc_auc_score on the margins.
        assert abs(s["auc"] - roc_auc_score(y, m, sample_weight=w)) <= s["auc_error_bound"] + 1e-12
    else:
        assert math.isnan(s["auc"])


def test_margin_merge_equals_whole():
    rng = np.random.default_rng(9)
    m = rng.normal(0, 3, 1000)
    y = (rng.random(1000) < 0.3).astype(float)
    whole = MarginMetrics()
    whole.update(y, m)
    a, b = MarginMetrics(), MarginMetrics()
    a.update(y[:400], m[:400])
    b.update(y[400:], m[400:])
    # Reference: the same accumulator fed all rows at once.
    assert same(a.merge(b).summary(), whole.summary())


def _platt_data(seed, n=3000):
    rng = np.random.default_rng(seed)
    m = rng.normal(0, 2, n)
    y = (rng.random(n) < 1 / (1 + np.exp(-(0.7 * m - 0.4)))).astype(float)
    w = rng.random(n) + 0.5
    return m, y, w


def test_platt_without_prior_correction_is_logistic_regression():
    m, y, w = _platt_data(10)
    a, b = fit_platt(m, y, w, prior_correction=False)
    # Reference: sklearn LogisticRegression on the 1-D margin with negligible regularisation.
    lr = LogisticRegression(C=1e12, tol=1e-12, max_iter=10000).fit(m[:, None], y, sample_weight=w)
    assert (a, b) == pytest.approx((lr.coef_[0, 0], lr.intercept_[0]), rel=1e-5)
    assert apply_platt(m, a, b) == pytest.approx(lr.predict_proba(m[:, None])[:, 1], rel=1e-5)


def test_platt_targets_match_weighted_logistic_regression():
    m, y, w = _platt_data(11)
    a, b = fit_platt(m, y, w)
    p_w, n_w = np.sum(w * y), np.sum(w * (1 - y))
    t = np.where(y == 1, (p_w + 1) / (p_w + 2), 1 / (n_w + 2))
    # Reference: sklearn LogisticRegression with each row split into a positive copy of weight w*t
    # and a negative copy of weight w*(1-t) (cross-entropy against soft targets).
    lr = LogisticRegression(C=1e12, tol=1e-12, max_iter=10000).fit(
        np.concatenate([m, m])[:, None], np.r_[np.ones_like(y), np.zeros_like(y)],
        sample_weight=np.r_[w * t, w * (1 - t)])
    assert (a, b) == pytest.approx((lr.coef_[0, 0], lr.intercept_[0]), rel=1e-5)


def test_platt_on_separated_slice():
    m = np.array([-2.0, -1.0, 1.0, 2.0])
    y = np.array([0.0, 0.0, 1.0, 1.0])
    with pytest.raises(UserError, match="prior_correction"):
        fit_platt(m, y, prior_correction=False)
    a, b = fit_platt(m, y)
    p = apply_platt(m, a, b)
    # Reference: Platt's targets (1999 paper) for 2 positives and 2 negatives are 3/4 and 1/4; the
    # fit is finite and ranks like the margin (common practice).
    assert math.isfinite(a) and a > 0 and np.all(np.diff(p) > 0)
