"""The metrics' numba kernels: the monotone score bins of the rank histogram, the per-row accumulation
of :class:`trainer.metrics.BinaryMetrics` and :class:`trainer.metrics.MarginMetrics`, and the terms of
the Platt fit.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit


#: Predictions are clipped to ``[EPS, 1 - EPS]`` before taking logarithms. scikit-learn 1.9's
#: ``log_loss`` clips at the machine epsilon of the input dtype (stated in its docstring; older
#: releases used a fixed 1e-15); we use the float64 machine epsilon, 2.220446049250313e-16.
EPS = float(np.finfo(np.float64).eps)

# Probability scores: q = min(p, 1 - p) (exact in float64 for p >= 1/2) is binned over the octaves
# [2^-64, 2^-1); q < 2^-64 falls in one end bin per side, p = 1/2 has a bin of its own.
PROB_LOW_EXP = 64
PROB_OCTAVES = 63
# Margins: |m| is binned over the octaves [2^-32, 2^32), with one bin below and one above per sign.
MARGIN_LOW_EXP = 32
MARGIN_OCTAVES = 64

# Slots of the weighted running sums.
W, PW, LOSS, BRIER, PRED, TP, FP, TN, FN = range(9)
N_SUMS = 9

# Columns of the reliability sums kept per rank bin: rows, sum of w^2, sum of w * p.
REL_ROWS, REL_W2, REL_WP = range(3)


@njit(cache=True)
def octave_index(bits, low_exp, octaves, res_bits):
    """Monotone bin of a non-negative float64 given by its bit pattern.

    Parameters
    ----------
    bits : numpy.uint64
        The float64's bit pattern.
    low_exp : int
        Values below 2^-low_exp share bin 0.
    octaves : int
        Octaves binned above 2^-low_exp.
    res_bits : int
        Leading mantissa bits kept: 2^res_bits bins per octave.

    Returns
    -------
    int
        0 below 2^-low_exp, 1 .. octaves << res_bits inside [2^-low_exp, 2^(octaves - low_exp)),
        (octaves << res_bits) + 1 at or above the top.
    """
    k = np.int64(bits >> np.uint64(52 - res_bits)) - (np.int64(1023 - low_exp) << res_bits)
    if k < 0:
        return np.int64(0)
    top = np.int64(octaves) << res_bits
    if k >= top:
        return top + 1
    return k + 1


@njit(cache=True)
def prob_bin(p, res_bits, buf, ubuf):
    """Bin of a probability in [0, 1]; ascending in p; 2 * n_side + 1 bins in all.

    Parameters
    ----------
    p : float
        The probability.
    res_bits : int
        Leading mantissa bits kept.
    buf : numpy.ndarray
        float64 scratch of length 1.
    ubuf : numpy.ndarray
        ``buf`` viewed as uint64 (the bit pattern is read there).

    Returns
    -------
    int
    """
    n_side = (np.int64(PROB_OCTAVES) << res_bits) + 1
    if p == 0.5:
        return n_side
    if p < 0.5:
        buf[0] = p
        return octave_index(ubuf[0], PROB_LOW_EXP, PROB_OCTAVES, res_bits)
    buf[0] = 1.0 - p
    return 2 * n_side - octave_index(ubuf[0], PROB_LOW_EXP, PROB_OCTAVES, res_bits)


@njit(cache=True)
def margin_bin(m, res_bits, buf, ubuf):
    """Bin of a finite margin; ascending in m; 2 * centre + 1 bins in all.

    Parameters
    ----------
    m : float
        The margin.
    res_bits : int
        Leading mantissa bits kept.
    buf : numpy.ndarray
        float64 scratch of length 1.
    ubuf : numpy.ndarray
        ``buf`` viewed as uint64 (the bit pattern is read there).

    Returns
    -------
    int
    """
    centre = (np.int64(MARGIN_OCTAVES) << res_bits) + 1
    buf[0] = abs(m)
    j = octave_index(ubuf[0], MARGIN_LOW_EXP, MARGIN_OCTAVES, res_bits)
    if j == 0:
        return centre
    if m < 0.0:
        return centre - j
    return centre + j


@njit(cache=True)
def softplus(x):
    """log(1 + exp(x)) without overflow.

    Parameters
    ----------
    x : float

    Returns
    -------
    float
    """
    if x > 0.0:
        return x + math.log1p(math.exp(-x))
    return math.log1p(math.exp(x))


@njit(cache=True, inline="always")
def count_row(counts, sums, y, w):
    """Add one row to the row, positive and weight counts.

    Parameters
    ----------
    counts : numpy.ndarray
        int64 rows and positives, updated in place.
    sums : numpy.ndarray
        float64 weighted running sums (slots ``W`` .. ``FN``), updated in place.
    y : float
        The 0/1 label.
    w : float
        The row weight.

    Returns
    -------
    int
        1 for a positive, else 0.
    """
    pos = 1 if y == 1.0 else 0
    counts[0] += 1
    counts[1] += pos
    sums[W] += w
    sums[PW] += w * y
    return pos


@njit(cache=True, inline="always")
def add_ranked(sums, auc_w, auc_lo, auc_hi, k, pos, w, called_positive, score):
    """Add one row to the confusion sums and to rank bin ``k`` (weight, smallest and largest score).

    Parameters
    ----------
    sums : numpy.ndarray
        float64 weighted running sums, updated in place.
    auc_w, auc_lo, auc_hi : numpy.ndarray
        Per rank bin: weight by class, smallest and largest score, updated in place.
    k : int
        The rank bin.
    pos : int
        1 for a positive row, else 0.
    w : float
        The row weight.
    called_positive : bool
        The row is predicted positive (p > 0.5, or margin > 0).
    score : float
        The row's score.
    """
    if called_positive:
        sums[TP if pos else FP] += w
    else:
        sums[FN if pos else TN] += w
    auc_w[k, pos] += w
    if score < auc_lo[k]:
        auc_lo[k] = score
    if score > auc_hi[k]:
        auc_hi[k] = score


@njit(cache=True)
def accumulate_binary(labels, probs, weights, margins, hist_edges, res_bits,
                       counts, sums, hist, auc_w, auc_lo, auc_hi, rank_rel):
    """Add one chunk of rows to the state arrays of a BinaryMetrics (in place).

    Parameters
    ----------
    labels, probs, weights : numpy.ndarray
        float64 0/1 labels, probabilities and row weights.
    margins : numpy.ndarray
        float64 log-odds, or empty (log-loss from the clipped probabilities then).
    hist_edges : numpy.ndarray
        The score histogram's edges.
    res_bits : int
        Leading mantissa bits of the rank histogram.
    counts : numpy.ndarray
        int64 rows and positives, updated in place.
    sums : numpy.ndarray
        float64 weighted running sums (slots ``W`` .. ``FN``), updated in place.
    hist : numpy.ndarray
        Score histogram weights by class, updated in place.
    auc_w, auc_lo, auc_hi : numpy.ndarray
        Per rank bin: weight by class, smallest and largest score, updated in place.
    rank_rel : numpy.ndarray
        Per rank bin: rows, sum of w^2, sum of w * p, updated in place.
    """
    buf = np.empty(1, np.float64)
    ubuf = buf.view(np.uint64)
    use_w = weights.size > 0
    use_m = margins.size > 0
    n_hist = hist.shape[0]
    lo_clip = EPS
    hi_clip = 1.0 - EPS
    for i in range(labels.size):
        y = labels[i]
        p = probs[i]
        w = weights[i] if use_w else 1.0
        pos = count_row(counts, sums, y, w)
        if use_m:
            loss = softplus(-margins[i]) if pos else softplus(margins[i])
        else:
            pc = min(max(p, lo_clip), hi_clip)
            loss = -math.log(pc) if pos else -math.log1p(-pc)
        sums[LOSS] += w * loss
        d = p - y
        sums[BRIER] += w * d * d
        sums[PRED] += w * p
        h = np.searchsorted(hist_edges, p, side="right") - 1
        if h >= n_hist:
            h = n_hist - 1
        hist[h, pos] += w
        k = prob_bin(p, res_bits, buf, ubuf)
        add_ranked(sums, auc_w, auc_lo, auc_hi, k, pos, w, p > 0.5, p)
        rank_rel[k, REL_ROWS] += 1.0
        rank_rel[k, REL_W2] += w * w
        rank_rel[k, REL_WP] += w * p


@njit(cache=True)
def accumulate_margin(labels, margins, weights, res_bits, counts, sums, auc_w, auc_lo, auc_hi):
    """Add one chunk of rows to the state arrays of a MarginMetrics (in place).

    Parameters
    ----------
    labels, margins, weights : numpy.ndarray
        float64 0/1 labels, margins and row weights.
    res_bits : int
        Leading mantissa bits of the rank histogram.
    counts : numpy.ndarray
        int64 rows and positives, updated in place.
    sums : numpy.ndarray
        float64 weighted running sums (slots ``W`` .. ``FN``), updated in place.
    auc_w, auc_lo, auc_hi : numpy.ndarray
        Per rank bin: weight by class, smallest and largest score, updated in place.
    """
    buf = np.empty(1, np.float64)
    ubuf = buf.view(np.uint64)
    use_w = weights.size > 0
    for i in range(labels.size):
        y = labels[i]
        m = margins[i]
        w = weights[i] if use_w else 1.0
        pos = count_row(counts, sums, y, w)
        add_ranked(sums, auc_w, auc_lo, auc_hi, margin_bin(m, res_bits, buf, ubuf), pos, w, m > 0.0, m)


@njit(cache=True)
def platt_terms(margins, targets, weights, a, b):
    """Cross-entropy of sigmoid(a*m + b) against soft targets, with gradient and Hessian in a, b.

    Parameters
    ----------
    margins, targets, weights : numpy.ndarray
        float64 margins, targets in [0, 1] and frequency weights.
    a, b : float
        The current fit.

    Returns
    -------
    tuple of float
        ``(f, g_a, g_b, h_aa, h_ab, h_bb)``.

    References
    ----------
    "Probabilistic Outputs for Support Vector Machines and Comparisons to Regularized Likelihood
    Methods", Advances in Large Margin Classifiers, MIT Press, 1999.
    """
    f = 0.0
    g1 = 0.0
    g2 = 0.0
    h11 = 0.0
    h12 = 0.0
    h22 = 0.0
    for i in range(margins.size):
        m = margins[i]
        t = targets[i]
        w = weights[i]
        z = a * m + b
        f += w * (softplus(z) - t * z)
        if z >= 0.0:
            e = math.exp(-z)
            s = 1.0 / (1.0 + e)
        else:
            e = math.exp(z)
            s = e / (1.0 + e)
        r = w * (s - t)
        c = w * s * (1.0 - s)
        g1 += r * m
        g2 += r
        h11 += c * m * m
        h12 += c * m
        h22 += c
    return f, g1, g2, h11, h12, h22
