"""Shared numba kernels: margins, residuals and curvatures of a batch, its distinct buckets, the
compact gradient scatter, and the vectorized inner product ``dot``; the solvers' own kernels live
beside them (``trainer.solvers._olbfgs_kernels``, ``trainer.solvers._first_order``).

Sparse kernels take the CSR arrays of a :class:`trainer.reader.Batch` (``indptr`` int64, ``indices``
int32, ``data`` float64) and never allocate per row. Dense kernels take vectors of the quasi-Newton
layout used by the solvers: n bucket weights followed by the intercept at position n (``n_reg`` = n
coordinates are L2-regularized, the intercept is not).
"""

from __future__ import annotations

import numpy as np
from numba import njit, types
from numba.cpython.unsafe.tuple import tuple_setitem
from numba.extending import intrinsic

from trainer.losses import d2loss, dloss, loss, loss_dloss


@njit(cache=True, nogil=True)
def margins_into(indptr, indices, data, w, b, out):
    """Write z_i = b + sum_k data[k] * w[indices[k]] over row i's entries.

    Parameters
    ----------
    indptr : numpy.ndarray
        int64 row offsets (n_rows + 1).
    indices : numpy.ndarray
        Per entry, the index into ``w`` (bucket ids, or slots of a compact copy).
    data : numpy.ndarray
        float64 entry values.
    w : numpy.ndarray
        float64 weights.
    b : float
        The intercept.
    out : numpy.ndarray
        float64 (n_rows,), overwritten.
    """
    n_rows = indptr.shape[0] - 1
    for i in range(n_rows):
        acc = b
        for k in range(indptr[i], indptr[i + 1]):
            acc += data[k] * w[indices[k]]
        out[i] = acc


def predict_margin(batch, w: np.ndarray, b: float) -> np.ndarray:
    """Margins X w + b of every row of a batch.

    The margin is the linear score of the hashing contract (README.md, section 'Hashing contract');
    apply the logistic function for probabilities.

    Parameters
    ----------
    batch : trainer.reader.stream.Batch
        The rows.
    w : numpy.ndarray
        The bucket weights (float64, length >= 1 + the largest bucket id in the batch).
    b : float
        The intercept.

    Returns
    -------
    numpy.ndarray
        A new float64 array of length ``batch.n_rows``.

    Raises
    ------
    ValueError
        When ``w`` is not a 1-D float64 array.
    """
    w = np.asarray(w)
    if w.ndim != 1 or w.dtype != np.float64:
        raise ValueError(f"weights must be a 1-D float64 array; got {w.dtype} with shape {w.shape}")
    out = np.empty(batch.n_rows, dtype=np.float64)
    margins_into(batch.indptr, batch.indices, batch.data, w, float(b), out)
    return out


@njit(cache=True, nogil=True)
def residuals_into(code, labels, weights, z, r):
    """Write r_i = c_i * l'(y_i, z_i) and sum the loss, weights and residuals.

    Parameters
    ----------
    code : int
        A loss code of :mod:`trainer.losses`.
    labels : numpy.ndarray
        0/1 labels y_i.
    weights : numpy.ndarray
        Row weights c_i.
    z : numpy.ndarray
        Margins.
    r : numpy.ndarray
        float64 output, overwritten.

    Returns
    -------
    tuple of float
        ``(sum_i c_i l(y_i, z_i), sum_i c_i, sum_i r_i)``.
    """
    loss_sum = 0.0
    weight_sum = 0.0
    r_sum = 0.0
    for i in range(z.shape[0]):
        c = weights[i]
        loss_sum += c * loss(code, labels[i], z[i])
        ri = c * dloss(code, labels[i], z[i])
        r[i] = ri
        r_sum += ri
        weight_sum += c
    return loss_sum, weight_sum, r_sum


@njit(cache=True, nogil=True)
def residuals_curvatures_into(code, labels, weights, z, r, h):
    """:func:`residuals_into` and the Gauss-Newton row curvatures h_i = c_i * l''(y_i, z_i) in one loop
    over the rows.

    Parameters
    ----------
    code, labels, weights, z, r : see :func:`residuals_into`
    h : numpy.ndarray
        float64 output, overwritten with h_i.

    Returns
    -------
    tuple of float
        ``(sum_i c_i l(y_i, z_i), sum_i c_i, sum_i r_i, sum_i h_i)``, summed in row order.
    """
    loss_sum = 0.0
    weight_sum = 0.0
    r_sum = 0.0
    h_sum = 0.0
    for i in range(z.shape[0]):
        c = weights[i]
        y, zi = labels[i], z[i]
        loss_sum += c * loss(code, y, zi)
        ri = c * dloss(code, y, zi)
        r[i] = ri
        r_sum += ri
        weight_sum += c
        hi = c * d2loss(code, y, zi)
        h[i] = hi
        h_sum += hi
    return loss_sum, weight_sum, r_sum, h_sum


#: Rows of :func:`objectives_into`'s blocks: margins, then residuals, then the scatter of a block, so the
#: exponentials of a block's rows overlap (one row's chain from its margins to its scatter is long).
OBJECTIVE_BLOCK = 256


@njit(cache=True, nogil=True)
def objectives_into(code, indptr, slot, data, labels, weights, WG, b, loss_sums, r_sums):
    """Loss sums and compact gradient sums of K models in one pass over the rows, block by block.

    Model k has the compact weights ``WG[:, k]`` (one row per distinct bucket, :func:`batch_support`) and
    the intercept ``b[k]``; its gradient sums go to ``WG[:, K + k]``, so each entry's K weights and K
    gradient sums lie side by side, the sums in the lines its weights brought into the cache. A row's K
    margins and residuals are kept in a tuple (registers, where a small array would be stored and loaded
    again at each entry). Row by row, each model's margin z_ik, residual r_ik = c_i l'(y_i, z_ik) and
    sums are those of :func:`margins_into`, :func:`residuals_into` and :func:`scatter_compact` (scale 1),
    added in the same order: model k's results equal theirs bit for bit, for any K.

    Parameters
    ----------
    code : int
        A loss code of :mod:`trainer.losses`.
    indptr, slot, data : numpy.ndarray
        The rows: int64 offsets, per entry its slot among the distinct buckets, float64 values.
    labels, weights : numpy.ndarray
        0/1 labels y_i and row weights c_i.
    WG : numpy.ndarray
        float64 (m, 2K), C order: the K models' weights, then their gradient sums, overwritten:
        WG[p, K + k] = sum over entries of slot p of r_ik * data.
    b : tuple of float
        The K intercepts. A tuple's length is part of its type, so each K is compiled with its loops
        over the models of known length, unrolled.
    loss_sums, r_sums : numpy.ndarray
        float64 (K,), overwritten: sum_i c_i l(y_i, z_ik) and sum_i r_ik.

    Returns
    -------
    float
        sum_i c_i.
    """
    n_models = len(b)
    n_rows = indptr.shape[0] - 1
    z = np.empty((OBJECTIVE_BLOCK, n_models))
    WG[:, n_models:] = 0.0
    loss_sums[:] = 0.0
    r_sums[:] = 0.0
    weight_sum = 0.0
    for start in range(0, n_rows, OBJECTIVE_BLOCK):
        stop = min(start + OBJECTIVE_BLOCK, n_rows)
        for i in range(start, stop):
            zi = b  # the row's K margins start at the intercepts
            for e in range(indptr[i], indptr[i + 1]):
                p = slot[e]
                v = data[e]
                for k in range(n_models):
                    zi = tuple_setitem(zi, k, zi[k] + v * WG[p, k])
            for k in range(n_models):
                z[i - start, k] = zi[k]
        for i in range(start, stop):
            c = weights[i]
            y = labels[i]
            for k in range(n_models):
                value, slope = loss_dloss(code, y, z[i - start, k])
                loss_sums[k] += c * value
                rk = c * slope
                z[i - start, k] = rk
                r_sums[k] += rk
            weight_sum += c
        for i in range(start, stop):
            ri = b  # a tuple of K floats (b's type), filled with the row's residuals
            for k in range(n_models):
                ri = tuple_setitem(ri, k, z[i - start, k])
            for e in range(indptr[i], indptr[i + 1]):
                p = slot[e]
                v = data[e]
                for k in range(n_models):
                    WG[p, n_models + k] += ri[k] * v
    return weight_sum


@intrinsic
def _popcount(typingctx, word):
    """Number of set bits of a uint64 (one instruction where the CPU has it)."""
    def codegen(context, builder, signature, args):
        return builder.ctpop(args[0])
    return types.uint64(types.uint64), codegen


@intrinsic
def _lowest_bit(typingctx, word):
    """Position of the lowest set bit of a nonzero uint64."""
    def codegen(context, builder, signature, args):
        return builder.cttz(args[0], context.get_constant(types.boolean, True))
    return types.uint64(types.uint64), codegen


@njit(cache=True, nogil=True)
def batch_support(indices, bits, slot):
    """Distinct buckets of a batch, in ascending order.

    Ascending, so the sparse vectors built on them can be walked chunk by chunk next to the dense
    passes. The bitmap (128 KiB for 2^20 buckets) stays in the core's cache, where a per-bucket position
    table would not.

    Parameters
    ----------
    indices : numpy.ndarray
        int32 bucket id of each nonzero.
    bits : numpy.ndarray
        uint64 scratch bitmap with one bit per bucket (at least ceil(n / 64) words), all zero; it is zero
        again on return.
    slot : numpy.ndarray
        int32 output: ``slot[k]`` = position of ``indices[k]`` in the returned array (the number of set
        bits below it).

    Returns
    -------
    numpy.ndarray
        int32 distinct buckets.
    """
    one = np.uint64(1)
    for k in range(indices.shape[0]):
        j = indices[k]
        bits[j >> 6] |= one << np.uint64(j & 63)
    rank = np.empty(bits.shape[0], dtype=np.int32)
    cols = np.empty(indices.shape[0], dtype=np.int32)
    m = 0
    for w in range(bits.shape[0]):
        rank[w] = m
        word = bits[w]
        while word != 0:
            cols[m] = (w << 6) + np.int64(_lowest_bit(word))
            m += 1
            word &= word - one
    for k in range(indices.shape[0]):
        j = indices[k]
        below = (one << np.uint64(j & 63)) - one
        slot[k] = rank[j >> 6] + np.int32(_popcount(bits[j >> 6] & below))
    for p in range(m):
        bits[cols[p] >> 6] = 0
    return cols[:m]


@njit(cache=True, nogil=True)
def scatter_compact(indptr, slot, data, r, scale, out):
    """Compact gradient scatter: out[p] = scale * sum over entries k with slot[k] = p of r_row(k) * data[k].

    Parameters
    ----------
    indptr : numpy.ndarray
        int64 row offsets (n_rows + 1).
    slot : numpy.ndarray
        Per entry, its slot among the batch's distinct buckets (:func:`batch_support`).
    data : numpy.ndarray
        float64 entry values.
    r : numpy.ndarray
        Per-row residuals.
    scale : float
        Factor applied to every sum.
    out : numpy.ndarray
        One entry per distinct bucket, overwritten.
    """
    out[:] = 0.0
    n_rows = indptr.shape[0] - 1
    for i in range(n_rows):
        ri = r[i]
        for k in range(indptr[i], indptr[i + 1]):
            out[slot[k]] += ri * data[k]
    for p in range(out.shape[0]):
        out[p] *= scale


@njit(cache=True, nogil=True)
def scatter_gradient_curvature(indptr, slot, data, r, h, scale, g, d):
    """:func:`scatter_compact` of ``r`` into ``g``, and the Gauss-Newton diagonal of a batch into ``d``:
    d[p] = scale * sum_i h_i x_ij^2 for the p-th distinct bucket j, in one pass over the rows.

    Entries of one bucket inside a row are added first, so a row holding bucket j twice with value 1
    contributes h_i * 2^2, the exact diagonal of X^T diag(h) X.

    Parameters
    ----------
    indptr, slot, data : see :func:`scatter_compact`
    r, h : numpy.ndarray
        Per-row residuals and curvatures.
    scale : float
        Factor applied to every sum.
    g, d : numpy.ndarray
        One entry per distinct bucket each, overwritten.
    """
    g[:] = 0.0
    d[:] = 0.0
    row_of = np.full(d.shape[0], -1, dtype=np.int64)
    within = np.empty(d.shape[0])
    n_rows = indptr.shape[0] - 1
    for i in range(n_rows):
        ri = r[i]
        for k in range(indptr[i], indptr[i + 1]):
            p = slot[k]
            v = data[k]
            g[p] += ri * v
            if row_of[p] != i:
                row_of[p] = i
                within[p] = v
            else:
                within[p] += v
        hi = h[i]
        for k in range(indptr[i], indptr[i + 1]):
            p = slot[k]
            if row_of[p] == i:
                row_of[p] = -1 - i
                v = within[p]
                d[p] += hi * v * v
    for p in range(d.shape[0]):
        g[p] *= scale
        d[p] *= scale


@njit(cache=True, nogil=True)
def regularized_gradient(w, lam, cols, gsp, gb, out):
    """Full gradient in the quasi-Newton layout: out[:n] = lam * w, then out[cols] += gsp, out[n] = gb.

    Parameters
    ----------
    w : numpy.ndarray
        The n bucket weights.
    lam : float
        The L2 strength.
    cols, gsp : numpy.ndarray
        The batch's distinct buckets and their data gradients.
    gb : float
        The intercept's data gradient.
    out : numpy.ndarray
        Length n + 1, overwritten.
    """
    n = w.shape[0]
    for j in range(n):
        out[j] = lam * w[j]
    for p in range(cols.shape[0]):
        out[cols[p]] += gsp[p]
    out[n] = gb


#: Inner products over a chunk may be summed in any fixed order (SIMD lanes); nothing may assume
#: finite values, so NaN and infinity still propagate to the divergence checks.
VECTOR_MATH = {"reassoc", "contract"}


@njit(cache=True, nogil=True, fastmath=VECTOR_MATH)
def dot(u, v):
    """sum_j u[j] * v[j] over equally long 1-D arrays.

    Accumulated in ``u``'s dtype (float32 lanes are twice as many per instruction as float64 ones).

    Parameters
    ----------
    u, v : numpy.ndarray
        The vectors.

    Returns
    -------
    float
        The inner product, in ``u``'s dtype.
    """
    acc = u.dtype.type(0)
    for j in range(u.shape[0]):
        acc += u[j] * v[j]
    return acc


@njit(cache=True, nogil=True, fastmath=VECTOR_MATH)
def blend_into(avg, w, b, c):
    """avg <- avg + c (x - avg) in place, for x the weights ``w`` then the intercept ``b``.

    One step of a running weighted average of iterates, e.g. the polynomial-decay average of the
    reference below (c = (eta + 1) / (t + eta) at the t-th iterate; ``trainer.training`` measures t in
    rows). c = 1 copies x, whatever ``avg`` held.

    Parameters
    ----------
    avg : numpy.ndarray
        float64, length n + 1; updated in place.
    w : numpy.ndarray
        float64 weights, length n.
    b : float
        The intercept.
    c : float
        The new iterate's weight, in (0, 1].

    References
    ----------
    "Stochastic Gradient Descent for Non-smooth Optimization: Convergence Results and Optimal Averaging
    Schemes", ICML, 2013.
    """
    n = w.shape[0]
    if c == 1.0:
        avg[:n] = w
        avg[n] = b
        return
    for j in range(n):
        avg[j] += c * (w[j] - avg[j])
    avg[n] += c * (b - avg[n])
