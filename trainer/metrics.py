"""Streaming evaluation metrics for binary response models.

Two accumulators see rows in chunks of any size, keep fixed-size state, and merge exactly, so a
held-out slice can be scored in pieces (or in several processes) and combined afterwards:

* :class:`BinaryMetrics` for calibrated probabilities (log-loss, normalized entropy, AUC, Brier
  score, calibration ratio, expected calibration error, error rates, reliability table, score
  histograms by class);
* :class:`MarginMetrics` for raw margins of a squared-hinge model (AUC and error rate at margin 0).

:func:`fit_platt` and :func:`apply_platt` turn margins into probabilities so that a squared-hinge
model can be judged by :class:`BinaryMetrics` as well.

Every per-row loop runs in numba over plain arrays; the summaries work on the fixed-size state only.

Ranking metrics (AUC, error rate at the base rate) come from a fine histogram over a monotone
quantisation of the score: the IEEE-754 bit pattern of a non-negative float64 orders like its value,
so its top bits (exponent and the leading ``auc_bits`` mantissa bits) give a bin index that never
reorders two scores. Each bin also keeps the smallest and largest score it has seen. Pairs in
different bins are ranked exactly; pairs inside one bin are counted as ties (1/2). Where a bin
holds a single distinct score this is exactly how scikit-learn scores ties; where it holds
several, the reported ``auc_error_bound`` covers the difference (see :class:`BinaryMetrics`).
"""

from __future__ import annotations

import math

import numpy as np

from trainer._metrics_kernels import (BRIER, FN, FP, LOSS, MARGIN_OCTAVES, N_SUMS, PRED, PROB_OCTAVES, PW, REL_ROWS,
                                      REL_W2, REL_WP, TN, TP, W, accumulate_binary, accumulate_margin, platt_terms)
from trainer.errors import UserError
from trainer.losses import expit

#: Standard normal 0.975 quantile, for 95% Wilson intervals.
WILSON_Z = 1.959963984540054

#: The reliability table's automatic bin count: one bin per RELIABILITY_ROWS_PER_BIN effective
#: rows, at least RELIABILITY_MIN_BINS and at most RELIABILITY_MAX_BINS.
RELIABILITY_MIN_BINS = 10
RELIABILITY_MAX_BINS = 20
RELIABILITY_ROWS_PER_BIN = 1000


def _float_array(values, name, n=None):
    """A contiguous float64 copy/view of ``values``; UserError when it is not 1-D of length n."""
    arr = np.ascontiguousarray(values, dtype=np.float64)
    if arr.ndim != 1:
        raise UserError(f"{name}: expected a 1-D array, got shape {arr.shape}")
    if n is not None and arr.size != n:
        raise UserError(f"{name}: expected {n} values (one per label), got {arr.size}")
    return arr


def _check_labels(labels):
    y = _float_array(labels, "labels")
    if not np.all((y == 0.0) | (y == 1.0)):
        raise UserError("labels: every label must be 0 or 1")
    return y


def _check_weights(weights, n):
    if weights is None:
        return np.empty(0, np.float64)
    w = _float_array(weights, "weights", n)
    if not np.all(np.isfinite(w) & (w >= 0.0)):
        raise UserError("weights: every row weight must be finite and >= 0")
    return w


def _check_int(value, name, lo, hi):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not lo <= value <= hi:
        raise UserError(f"{name}: expected an integer in {lo}..{hi}, got {value!r}")
    return int(value)


def _safe_div(num, den):
    return float(num / den) if den > 0 else math.nan


def _rank_summary(auc_w, auc_lo, auc_hi):
    """AUC, its error bound and the error rate at the base rate from a rank histogram.

    Returns (auc, auc_error_bound, error_rate_at_base_rate); the first two are NaN with one class.
    """
    used = (auc_w[:, 0] + auc_w[:, 1]) > 0.0
    neg = auc_w[used, 0]
    pos = auc_w[used, 1]
    n_w = float(neg.sum())
    p_w = float(pos.sum())
    total = n_w + p_w
    if total <= 0.0:
        return math.nan, math.nan, math.nan
    # Error rate when the top-scored weight equal to the positive weight is called positive; a bin
    # that straddles the cut is split in proportion, as for tied scores.
    pos_d = pos[::-1]
    tot_d = pos_d + neg[::-1]
    cum = np.cumsum(tot_d)
    k = min(int(np.searchsorted(cum, p_w, side="left")), tot_d.size - 1)
    above = float(cum[k - 1]) if k > 0 else 0.0
    frac = min(max((p_w - above) / tot_d[k], 0.0), 1.0)
    tp = float(pos_d[:k].sum()) + frac * float(pos_d[k])
    err_base = float(max(2.0 * (p_w - tp), 0.0) / total)
    if p_w <= 0.0 or n_w <= 0.0:
        return math.nan, math.nan, err_base
    neg_below = np.concatenate(([0.0], np.cumsum(neg)[:-1]))
    pairs = p_w * n_w
    auc = float(np.sum(pos * (neg_below + 0.5 * neg))) / pairs
    mixed = auc_lo[used] < auc_hi[used]
    bound = 0.5 * float(np.sum(pos[mixed] * neg[mixed])) / pairs
    return auc, bound, err_base


def _confusion(sums):
    return {"tp": float(sums[TP]), "fp": float(sums[FP]), "tn": float(sums[TN]),
            "fn": float(sums[FN])}


def wilson_interval(successes, n, z=WILSON_Z):
    """Wilson score interval for a binomial proportion (vectorised).

    Parameters
    ----------
    successes : array_like or float
        Weighted count of positives.
    n : array_like or float
        Sample size; for weighted rows the effective size (sum w)^2 / sum w^2 of the Wiley 1965 book
        below.
    z : float, default WILSON_Z
        Normal quantile; the default gives 95%.

    Returns
    -------
    tuple of numpy.ndarray
        ``(low, high)``; NaN where n <= 0.

    References
    ----------
    "Probable Inference, the Law of Succession, and Statistical Inference", Journal of the American
    Statistical Association, 1927. "Survey Sampling", Wiley, 1965.
    """
    s = np.asarray(successes, dtype=np.float64)
    nn = np.asarray(n, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        phat = s / nn
        z2 = z * z
        denom = 1.0 + z2 / nn
        centre = (phat + z2 / (2.0 * nn)) / denom
        half = z / denom * np.sqrt(phat * (1.0 - phat) / nn + z2 / (4.0 * nn * nn))
        low = np.where(nn > 0, np.clip(centre - half, 0.0, 1.0), np.nan)
        high = np.where(nn > 0, np.clip(centre + half, 0.0, 1.0), np.nan)
    return low, high


def _sigmoid_edges(n_bins):
    """Histogram edges 0, expit(linspace(-ln 9999, ln 9999, n_bins - 1)), 1 (logit-uniform)."""
    lim = math.log(9999.0)
    return np.concatenate(([0.0], expit(np.linspace(-lim, lim, n_bins - 1)), [1.0]))


def reliability_bin_count(effective_rows: float) -> int:
    """The automatic number of reliability bins for a holdout.

    One bin per :data:`RELIABILITY_ROWS_PER_BIN` effective rows, clamped to
    [:data:`RELIABILITY_MIN_BINS`, :data:`RELIABILITY_MAX_BINS`]: with 1,000 rows a bin predicting 1%
    expects 10 positives, and 20 bins keep the table readable.

    Parameters
    ----------
    effective_rows : float
        (sum w)^2 / sum w^2, the row count when rows are unweighted.

    Returns
    -------
    int
    """
    n = int(effective_rows // RELIABILITY_ROWS_PER_BIN) if math.isfinite(effective_rows) else 0
    return min(max(n, RELIABILITY_MIN_BINS), RELIABILITY_MAX_BINS)


def _reliability_bins(auc_w, auc_lo, auc_hi, rank_rel, n_bins):
    """Equal-weight reliability bins built from the rank histogram; returns (bins, ece).

    The rank bins that hold rows are taken in ascending score order and cut after the first rank
    bin whose cumulative weight reaches j/n of the total (j = 1 .. n - 1), the inverted-CDF
    quantile rule; cuts that land in the same rank bin merge, so ties heavier than 1/n give fewer
    bins. ``n_bins`` None chooses the count with :func:`reliability_bin_count`.
    """
    used = np.flatnonzero(rank_rel[:, REL_ROWS] > 0)
    if used.size == 0:
        return [], math.nan
    weight = auc_w[used, 0] + auc_w[used, 1]
    cum = np.cumsum(weight)
    total = float(cum[-1])
    w2_total = float(rank_rel[used, REL_W2].sum())
    if n_bins is None:
        n_bins = reliability_bin_count(total * total / w2_total if w2_total > 0 else 0.0)
    cuts = np.searchsorted(cum, total * np.arange(1, n_bins) / n_bins, side="left")
    ends = np.unique(np.append(np.minimum(cuts, used.size - 1), used.size - 1))
    starts = np.concatenate(([0], ends[:-1] + 1))
    rows = np.add.reduceat(rank_rel[used, REL_ROWS], starts)
    w = np.add.reduceat(weight, starts)
    wy = np.add.reduceat(auc_w[used, 1], starts)
    w2 = np.add.reduceat(rank_rel[used, REL_W2], starts)
    wp = np.add.reduceat(rank_rel[used, REL_WP], starts)
    lo = auc_lo[used][starts]
    hi = auc_hi[used][ends]
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_pred = wp / w
        observed = wy / w
        n_eff = w * w / w2
        wl, wh = wilson_interval(observed * n_eff, n_eff)
    bins = []
    for b in range(starts.size):
        has_w = w[b] > 0
        bins.append({
            "lo": float(lo[b]),
            "hi": float(hi[b]),
            "count": int(rows[b]),
            "weight": float(w[b]),
            "mean_prediction": float(mean_pred[b]) if has_w else math.nan,
            "observed_rate": float(observed[b]) if has_w else math.nan,
            "wilson_low": float(wl[b]) if has_w else math.nan,
            "wilson_high": float(wh[b]) if has_w else math.nan,
        })
    ece = float(np.abs(wp - wy).sum() / total) if total > 0 else math.nan
    return bins, ece


def _merge_ranked(out, a, b):
    """Set ``out``'s counts, sums and rank histogram to those of ``a`` and ``b`` together; return it."""
    out._counts = a._counts + b._counts
    out._sums = a._sums + b._sums
    out._auc_w = a._auc_w + b._auc_w
    out._auc_lo = np.minimum(a._auc_lo, b._auc_lo)
    out._auc_hi = np.maximum(a._auc_hi, b._auc_hi)
    return out


class BinaryMetrics:
    """Streaming, mergeable quality metrics of predicted probabilities against 0/1 labels.

    State is fixed in size: 2 * (63 * 2**auc_bits + 1) + 1 rank bins with seven float64 each (28.9 MB
    at the default 12 bits; pages no score reaches stay untouched zeros) plus the small tables. Memory
    does not grow with rows.

    AUC guarantee: two scores in different rank bins are ordered exactly; each rank bin is counted as a
    block of tied scores (1/2 per positive-negative pair, the tie rule of scikit-learn's
    ``roc_auc_score``). A bin spans scores within a relative 2**-auc_bits of each other in p for
    p < 1/2 and in 1 - p for p > 1/2 (2.4e-4 at the default), plus one bin for p < 2**-64 and one for
    1 - p < 2**-64. Bins whose smallest and largest score are equal are exact, so ties of any size are
    exact; the summary's ``auc_error_bound`` = sum over bins holding more than one distinct score of
    (positive weight * negative weight / 2), divided by (total positive weight * total negative
    weight), bounds |reported AUC - exact AUC| (up to float rounding). The same block rule decides the
    error rate at the base rate. Merging adds the histograms, so it is exact.

    Reliability bins come from the same rank histogram, which also keeps per rank bin the rows, the sum
    of w^2 and the sum of w * p, so no second pass over the data is needed: bin j ends after the rank
    bin that holds the weighted j/n quantile of the predictions (the inverted-CDF rule of
    ``numpy.quantile(..., method="inverted_cdf")``). A rank bin is never split, so each bin's weight
    differs from 1/n of the total by at most the weight of the two rank bins at its ends, and the
    quantile lies between the bin's largest prediction ``hi`` and ``hi`` less a relative 2**-auc_bits
    (in p below 1/2, in 1 - p above); every sum of a bin is exact.

    Parameters
    ----------
    n_bins : int or None
        The number of reliability bins of equal weight (1..10000, or None: 10 to 20 chosen by the
        holdout's size, see :func:`reliability_bin_count`).
    histogram_bins : int, default 40
        Score-histogram bins (3..10000) whose inner edges are uniform in log-odds between 1e-4 and
        1 - 1e-4, with two end bins reaching 0 and 1 (half-open [lo, hi) as in ``numpy.histogram``, the
        last bin closed).
    auc_bits : int, default 12
        Leading mantissa bits of the rank histogram (4..14).

    Raises
    ------
    UserError
        For values out of range.

    References
    ----------
    The AUC is the probability that a random positive outranks a random negative: "The meaning and use
    of the area under a receiver operating characteristic (ROC) curve", Radiology, 1982.
    """

    def __init__(self, n_bins: int | None = None, histogram_bins: int = 40, auc_bits: int = 12):
        self.n_bins = None if n_bins is None else _check_int(n_bins, "n_bins", 1, 10000)
        self.histogram_bins = _check_int(histogram_bins, "histogram_bins", 3, 10000)
        self.auc_bits = _check_int(auc_bits, "auc_bits", 4, 14)
        self._hist_edges = _sigmoid_edges(self.histogram_bins)
        n_rank = 2 * ((PROB_OCTAVES << self.auc_bits) + 1) + 1
        self._counts = np.zeros(2, np.int64)
        self._sums = np.zeros(N_SUMS, np.float64)
        self._rank_rel = np.zeros((n_rank, 3), np.float64)
        self._hist = np.zeros((self.histogram_bins, 2), np.float64)
        self._auc_w = np.zeros((n_rank, 2), np.float64)
        self._auc_lo = np.full(n_rank, np.inf)
        self._auc_hi = np.full(n_rank, -np.inf)

    def update(self, labels, probs, weights=None, margins=None) -> None:
        """Add a chunk of rows.

        With margins, log-loss is computed from them as log(1 + exp(-z)) / log(1 + exp(z)) (no clipping
        needed); without, from the probabilities clipped to [EPS, 1 - EPS] (see
        :data:`trainer._metrics_kernels.EPS`). All other metrics use ``probs``.

        Parameters
        ----------
        labels : array_like
            0/1, bool or numbers.
        probs : array_like
            Predicted probabilities in [0, 1].
        weights : array_like, optional
            Row weights, finite and >= 0; default 1.
        margins : array_like, optional
            The model's log-odds z with p = 1/(1+exp(-z)).

        Raises
        ------
        UserError
            For labels other than 0/1, probabilities outside [0, 1] or NaN, bad weights, non-finite
            margins, or arrays of unequal length.
        """
        y = _check_labels(labels)
        p = _float_array(probs, "probs", y.size)
        if not np.all((p >= 0.0) & (p <= 1.0)):
            raise UserError("probs: every predicted probability must be in [0, 1] (NaN refused)")
        w = _check_weights(weights, y.size)
        if margins is None:
            m = np.empty(0, np.float64)
        else:
            m = _float_array(margins, "margins", y.size)
            if not np.all(np.isfinite(m)):
                raise UserError("margins: every margin must be finite")
        if y.size == 0:
            return
        accumulate_binary(y, p, w, m, self._hist_edges, self.auc_bits, self._counts, self._sums,
                           self._hist, self._auc_w, self._auc_lo, self._auc_hi, self._rank_rel)

    def merge(self, other: BinaryMetrics) -> BinaryMetrics:
        """Combine two accumulators into a new one, as if all rows had gone through one.

        Parameters
        ----------
        other : BinaryMetrics
            Built with the same ``n_bins``, ``histogram_bins`` and ``auc_bits``.

        Returns
        -------
        BinaryMetrics
            A new accumulator; both inputs are left unchanged.

        Raises
        ------
        ValueError
            When the settings differ (a programming error, not a user mistake).
        """
        if not isinstance(other, BinaryMetrics) or (
                (self.n_bins, self.histogram_bins, self.auc_bits)
                != (other.n_bins, other.histogram_bins, other.auc_bits)):
            raise ValueError("BinaryMetrics.merge: both accumulators need the same bin settings")
        out = _merge_ranked(BinaryMetrics(self.n_bins, self.histogram_bins, self.auc_bits), self, other)
        out._rank_rel = self._rank_rel + other._rank_rel
        out._hist = self._hist + other._hist
        return out

    def summary(self) -> dict:
        """All metrics as a plain dict with stable keys (floats, ints, lists; NaN when undefined).

        All values are NaN for an empty accumulator.

        Returns
        -------
        dict
            ``rows``, ``positives`` (row counts); ``weight_sum``, ``positive_weight``, ``base_rate``
            (weighted); ``log_loss`` (weighted mean cross-entropy); ``normalized_entropy`` (log-loss divided
            by the entropy of the base rate; NaN with one class); ``auc`` (NaN with one class) and
            ``auc_error_bound`` (see the class docstring); ``brier`` (weighted mean squared error of the
            probability, Monthly Weather Review 1950); ``calibration_ratio`` (sum of w*p over sum of w*y;
            NaN without positives); ``ece`` (expected calibration error over the equal-weight reliability
            bins of ``bins``, sum of |sum w*p - sum w*y| per bin over the total weight, AAAI 2015);
            ``error_rate`` (weighted share misclassified when p > 0.5 means positive);
            ``error_rate_at_base_rate`` (the same when the top-scored share of weight equal to the base rate
            is called positive, i.e. at the precision-recall break-even point); ``confusion``
            ({tp, fp, tn, fn} weighted, at p > 0.5); ``bins`` (reliability table of bins of equal weight,
            ascending, see the class docstring: per bin {lo, hi, count, weight, mean_prediction,
            observed_rate, wilson_low, wilson_high}, lo and hi the smallest and largest prediction in the
            bin, a 95% Wilson interval on the observed rate with the effective sample size
            (sum w)^2 / sum w^2; empty without rows); ``histogram`` ({edges, positives, negatives}: weight
            per score bin by class).

        References
        ----------
        "Verification of forecasts expressed in terms of probability", Monthly Weather Review, 1950.
        "Obtaining Well Calibrated Probabilities Using Bayesian Binning", AAAI, 2015.
        """
        s = self._sums
        w_sum = float(s[W])
        p_w = float(s[PW])
        base = _safe_div(p_w, w_sum)
        log_loss = _safe_div(s[LOSS], w_sum)
        if 0.0 < base < 1.0:
            entropy = -(base * math.log(base) + (1.0 - base) * math.log1p(-base))
            ne = log_loss / entropy
        else:
            ne = math.nan
        auc, bound, err_base = _rank_summary(self._auc_w, self._auc_lo, self._auc_hi)
        bins, ece = _reliability_bins(self._auc_w, self._auc_lo, self._auc_hi, self._rank_rel,
                                      self.n_bins)
        return {
            "rows": int(self._counts[0]),
            "positives": int(self._counts[1]),
            "weight_sum": w_sum,
            "positive_weight": p_w,
            "base_rate": base,
            "log_loss": log_loss,
            "normalized_entropy": ne,
            "auc": auc,
            "auc_error_bound": bound,
            "brier": _safe_div(s[BRIER], w_sum),
            "calibration_ratio": _safe_div(s[PRED], p_w),
            "ece": ece,
            "error_rate": _safe_div(s[FP] + s[FN], w_sum),
            "error_rate_at_base_rate": err_base,
            "confusion": _confusion(s),
            "bins": bins,
            "histogram": {
                "edges": [float(e) for e in self._hist_edges],
                "positives": [float(v) for v in self._hist[:, 1]],
                "negatives": [float(v) for v in self._hist[:, 0]],
            },
        }


class MarginMetrics:
    """Streaming, mergeable ranking metrics of raw margins (for squared-hinge models).

    The rank histogram bins |m| over [2**-32, 2**32) with relative width 2**-auc_bits, one bin for
    |m| < 2**-32 (both signs) and one per sign beyond 2**32; the AUC guarantee and ``auc_error_bound``
    are as in :class:`BinaryMetrics`. The error rate calls a row positive when its margin is > 0.

    Parameters
    ----------
    auc_bits : int, default 12
        Leading mantissa bits of the rank histogram (4..14).

    Raises
    ------
    UserError
        For ``auc_bits`` out of range.
    """

    def __init__(self, auc_bits: int = 12):
        self.auc_bits = _check_int(auc_bits, "auc_bits", 4, 14)
        n_rank = 2 * ((MARGIN_OCTAVES << self.auc_bits) + 1) + 1
        self._counts = np.zeros(2, np.int64)
        self._sums = np.zeros(N_SUMS, np.float64)
        self._auc_w = np.zeros((n_rank, 2), np.float64)
        self._auc_lo = np.full(n_rank, np.inf)
        self._auc_hi = np.full(n_rank, -np.inf)

    def update(self, labels, margins, weights=None) -> None:
        """Add a chunk of rows.

        Parameters
        ----------
        labels : array_like
            0/1.
        margins : array_like
            Finite model outputs.
        weights : array_like, optional
            Finite, >= 0; default 1.

        Raises
        ------
        UserError
            For labels other than 0/1, non-finite margins, bad weights or arrays of unequal length.
        """
        y = _check_labels(labels)
        m = _float_array(margins, "margins", y.size)
        if not np.all(np.isfinite(m)):
            raise UserError("margins: every margin must be finite")
        w = _check_weights(weights, y.size)
        if y.size == 0:
            return
        accumulate_margin(y, m, w, self.auc_bits, self._counts, self._sums, self._auc_w,
                           self._auc_lo, self._auc_hi)

    def merge(self, other: MarginMetrics) -> MarginMetrics:
        """Combine two accumulators into a new one (inputs unchanged).

        Parameters
        ----------
        other : MarginMetrics
            With the same ``auc_bits``.

        Returns
        -------
        MarginMetrics

        Raises
        ------
        ValueError
            When the settings differ.
        """
        if not isinstance(other, MarginMetrics) or self.auc_bits != other.auc_bits:
            raise ValueError("MarginMetrics.merge: both accumulators need the same auc_bits")
        return _merge_ranked(MarginMetrics(self.auc_bits), self, other)

    def summary(self) -> dict:
        """Metrics as a dict with stable keys.

        Returns
        -------
        dict
            ``rows``, ``positives``, ``weight_sum``, ``positive_weight``, ``base_rate``, ``auc``,
            ``auc_error_bound``, ``error_rate`` (margin > 0 means positive), ``error_rate_at_base_rate``
            and ``confusion`` ({tp, fp, tn, fn} weighted), defined as in :meth:`BinaryMetrics.summary`.
        """
        s = self._sums
        w_sum = float(s[W])
        auc, bound, err_base = _rank_summary(self._auc_w, self._auc_lo, self._auc_hi)
        return {
            "rows": int(self._counts[0]),
            "positives": int(self._counts[1]),
            "weight_sum": w_sum,
            "positive_weight": float(s[PW]),
            "base_rate": _safe_div(s[PW], w_sum),
            "auc": auc,
            "auc_error_bound": bound,
            "error_rate": _safe_div(s[FP] + s[FN], w_sum),
            "error_rate_at_base_rate": err_base,
            "confusion": _confusion(s),
        }


def fit_platt(margins, labels, weights=None, *, prior_correction: bool = True,
              max_iter: int = 100) -> tuple[float, float]:
    """Fit Platt scaling p = 1 / (1 + exp(-(a*m + b))) on a calibration slice.

    Minimises the weighted cross-entropy against Platt's targets (N+ + 1)/(N+ + 2) for positives and
    1/(N- + 2) for negatives (N+/N- the weighted class totals) when ``prior_correction`` is true, or
    against the 0/1 labels when false (plain logistic regression on the one-dimensional margin). Solved
    by Newton's method with backtracking line search and a 1e-12 ridge on the Hessian as in the 2007
    note below. Stops when the gradient is below 1e-11 of its scale, when no step decreases the
    objective, or after ``max_iter`` Newton steps.

    Parameters
    ----------
    margins : array_like
        Finite margins.
    labels : array_like
        0/1 labels.
    weights : array_like, optional
        Frequency weights, finite and >= 0.
    prior_correction : bool, default True
        Fit against Platt's targets instead of the labels.
    max_iter : int, default 100
        Most Newton steps (1..1000).

    Returns
    -------
    tuple of float
        ``(a, b)``.

    Raises
    ------
    UserError
        For an empty slice, bad labels/weights/margins, or, without prior correction, a slice with one
        class or one separated by the margin (no finite maximum-likelihood fit exists then).

    References
    ----------
    "Probabilistic Outputs for Support Vector Machines and Comparisons to Regularized Likelihood
    Methods", Advances in Large Margin Classifiers, MIT Press, 1999. "A Note on Platt's Probabilistic
    Outputs for Support Vector Machines", Machine Learning, 2007.
    """
    y = _check_labels(labels)
    m = _float_array(margins, "margins", y.size)
    if not np.all(np.isfinite(m)):
        raise UserError("margins: every margin must be finite")
    w = _check_weights(weights, y.size)
    max_iter = _check_int(max_iter, "max_iter", 1, 1000)
    if w.size == 0:
        w = np.ones(y.size)
    keep = w > 0
    if not np.any(keep):
        raise UserError("fit_platt: the calibration slice needs at least one row with weight > 0")
    p_w = float(np.sum(w * y))
    n_w = float(np.sum(w * (1.0 - y)))
    if prior_correction:
        hi, lo = (p_w + 1.0) / (p_w + 2.0), 1.0 / (n_w + 2.0)
    else:
        is_pos = keep & (y == 1.0)
        is_neg = keep & (y == 0.0)
        if not np.any(is_pos) or not np.any(is_neg):
            raise UserError("fit_platt: the calibration slice holds one class only; "
                            "use prior_correction=True")
        if m[is_neg].max() <= m[is_pos].min() or m[is_pos].max() <= m[is_neg].min():
            raise UserError("fit_platt: the margins separate the classes of the calibration slice; "
                            "use prior_correction=True")
        hi, lo = 1.0, 0.0
    t = np.where(y == 1.0, hi, lo)
    a, b = 0.0, math.log((p_w + 1.0) / (n_w + 1.0))
    ridge = 1e-12
    tol_a = 1e-11 * max(float(np.sum(w * np.abs(m))), 1e-300)
    tol_b = 1e-11 * (p_w + n_w)
    f, g1, g2, h11, h12, h22 = platt_terms(m, t, w, a, b)
    for _ in range(max_iter):
        if abs(g1) <= tol_a and abs(g2) <= tol_b:
            break
        h11 += ridge
        h22 += ridge
        det = h11 * h22 - h12 * h12
        da = -(h22 * g1 - h12 * g2) / det
        db = -(h11 * g2 - h12 * g1) / det
        slope = g1 * da + g2 * db
        step = 1.0
        while step >= 1e-10:
            na, nb = a + step * da, b + step * db
            terms = platt_terms(m, t, w, na, nb)
            if terms[0] < f + 1e-4 * step * slope:
                a, b = na, nb
                f, g1, g2, h11, h12, h22 = terms
                break
            step *= 0.5
        else:
            break
    return float(a), float(b)


def apply_platt(margins, a: float, b: float) -> np.ndarray:
    """Probabilities 1 / (1 + exp(-(a*m + b))) for an array of margins (overflow-safe).

    Parameters
    ----------
    margins : array_like
        The margins.
    a, b : float
        The pair returned by :func:`fit_platt`.

    Returns
    -------
    numpy.ndarray
        float64 probabilities.

    References
    ----------
    As :func:`fit_platt`.
    """
    return expit(a * np.asarray(margins, dtype=np.float64) + b)
