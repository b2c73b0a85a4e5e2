"""Numba kernels: every loop that sees a row, a nonzero or a full weight vector.

Sparse kernels take the CSR arrays of a :class:`trainer.reader.Batch` (``indptr`` int64, ``indices``
int32, ``data`` float64) and never allocate per row. Dense kernels take float64 vectors of the
quasi-Newton layout used by the solvers: n bucket weights followed by the intercept at position n
(``n_reg`` = n coordinates are L2-regularized, the intercept is not).

The two-loop recursion is the one of "Updating Quasi-Newton Matrices with Limited Storage"
(Mathematics of Computation, 1980), written for curvature pairs whose gradient difference is stored as
y = y_data + lambda * s, where y_data is sparse (only the buckets of the batch that produced it) and
the regularizer part is recovered from the dense step s. Each recursion pass reads every stored s once,
fusing the update of one pair with the inner product of the next.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from trainer.losses import d2loss, dloss, loss


@njit(cache=True)
def margins_into(indptr, indices, data, w, b, out):
    """Write z_i = b + sum_k data[k] * w[indices[k]] over row i's entries into ``out`` (length n_rows)."""
    n_rows = indptr.shape[0] - 1
    for i in range(n_rows):
        acc = b
        for k in range(indptr[i], indptr[i + 1]):
            acc += data[k] * w[indices[k]]
        out[i] = acc


def predict_margin(batch, w: np.ndarray, b: float) -> np.ndarray:
    """Margins X w + b of every row of ``batch`` (a :class:`trainer.reader.Batch`).

    Takes the bucket weights ``w`` (float64, length >= 1 + the largest bucket id in the batch) and the
    intercept ``b``; returns a new float64 array of length ``batch.n_rows``. The margin is the linear
    score of the hashing contract (README.md, section 'Hashing contract'); apply the logistic function
    for probabilities.
    Raises ``ValueError`` when ``w`` is not a 1-D float64 array.
    """
    w = np.asarray(w)
    if w.ndim != 1 or w.dtype != np.float64:
        raise ValueError(f"weights must be a 1-D float64 array; got {w.dtype} with shape {w.shape}")
    out = np.empty(batch.n_rows, dtype=np.float64)
    margins_into(batch.indptr, batch.indices, batch.data, w, float(b), out)
    return out


@njit(cache=True)
def residuals_into(code, labels, weights, z, r):
    """Write r_i = c_i * l'(y_i, z_i) and return (sum_i c_i l(y_i, z_i), sum_i c_i, sum_i r_i).

    ``code`` is a loss code of :mod:`trainer.losses`; ``weights`` are the row weights c_i.
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


@njit(cache=True)
def curvatures_into(code, labels, weights, z, h):
    """Write h_i = c_i * l''(y_i, z_i) (Gauss-Newton row curvature) and return sum_i h_i."""
    total = 0.0
    for i in range(z.shape[0]):
        hi = weights[i] * d2loss(code, labels[i], z[i])
        h[i] = hi
        total += hi
    return total


@njit(cache=True)
def batch_support(indices, mark, slot):
    """Distinct buckets of a batch, in order of first appearance.

    ``mark`` is an int32 scratch array of length n filled with -1; it is restored to -1 on return.
    Writes ``slot[k]`` = position of ``indices[k]`` in the returned int32 array of distinct buckets.
    """
    cols = np.empty(indices.shape[0], dtype=np.int32)
    m = 0
    for k in range(indices.shape[0]):
        j = indices[k]
        p = mark[j]
        if p < 0:
            p = m
            mark[j] = m
            cols[m] = j
            m += 1
        slot[k] = p
    for p in range(m):
        mark[cols[p]] = -1
    return cols[:m].copy()


@njit(cache=True)
def scatter_compact(indptr, slot, data, r, scale, out):
    """Compact gradient scatter: out[p] = scale * sum over entries k with slot[k] = p of r_row(k) * data[k].

    ``out`` has one entry per distinct bucket of the batch (see :func:`batch_support`) and is overwritten.
    """
    out[:] = 0.0
    n_rows = indptr.shape[0] - 1
    for i in range(n_rows):
        ri = r[i]
        for k in range(indptr[i], indptr[i + 1]):
            out[slot[k]] += ri * data[k]
    for p in range(out.shape[0]):
        out[p] *= scale


@njit(cache=True)
def scatter_compact_squares(indptr, slot, data, h, scale, out):
    """Gauss-Newton diagonal of a batch: out[p] = scale * sum_i h_i x_ij^2 for the p-th distinct bucket j.

    Entries of one bucket inside a row are added first, so a row holding bucket j twice with value 1
    contributes h_i * 2^2, the exact diagonal of X^T diag(h) X. ``out`` is overwritten.
    """
    out[:] = 0.0
    n_rows = indptr.shape[0] - 1
    for i in range(n_rows):
        hi = h[i]
        start = indptr[i]
        stop = indptr[i + 1]
        for k in range(start, stop):
            seen = False
            for k2 in range(start, k):
                if slot[k2] == slot[k]:
                    seen = True
                    break
            if seen:
                continue
            v = data[k]
            for k2 in range(k + 1, stop):
                if slot[k2] == slot[k]:
                    v += data[k2]
            out[slot[k]] += hi * v * v
    for p in range(out.shape[0]):
        out[p] *= scale


@njit(cache=True)
def dot(a, b):
    """Inner product of two equally long float64 vectors (sequential sum, bit-reproducible)."""
    acc = 0.0
    for j in range(a.shape[0]):
        acc += a[j] * b[j]
    return acc


@njit(cache=True)
def regularized_gradient(w, lam, cols, gsp, gb, out):
    """Full gradient in the quasi-Newton layout: out[:n] = lam * w, then out[cols] += gsp, out[n] = gb."""
    n = w.shape[0]
    for j in range(n):
        out[j] = lam * w[j]
    for p in range(cols.shape[0]):
        out[cols[p]] += gsp[p]
    out[n] = gb


#: Dense reductions are summed over this many fixed chunks, whatever the number of threads, so a
#: result never depends on how the chunks were shared out: same inputs, same bits.
REDUCTION_CHUNKS = 64


@njit(cache=True, parallel=True)
def axpy_dot(q, c, s, nxt, n_axpy, n_dot):
    """q[:n_axpy] += c * s[:n_axpy], then return nxt[:n_dot] . q[:n_dot] (after the update).

    One pass over memory, shared between the cores by ``prange`` over ``REDUCTION_CHUNKS`` fixed
    chunks whose partial sums are added in chunk order (bit-reproducible).
    """
    size = q.shape[0]
    step = (size + REDUCTION_CHUNKS - 1) // REDUCTION_CHUNKS
    common = min(n_axpy, n_dot)
    partial = np.zeros(REDUCTION_CHUNKS)
    for k in prange(REDUCTION_CHUNKS):
        lo = k * step
        hi = min(size, lo + step)
        acc = 0.0
        for j in range(lo, min(hi, common)):
            qj = q[j] + c * s[j]
            q[j] = qj
            acc += nxt[j] * qj
        for j in range(max(lo, common), hi):
            if j < n_axpy:
                q[j] += c * s[j]
            if j < n_dot:
                acc += nxt[j] * q[j]
        partial[k] = acc
    total = 0.0
    for k in range(REDUCTION_CHUNKS):
        total += partial[k]
    return total


@njit(cache=True, parallel=True)
def scale_by_diagonal(q, diag, damp, lam, n_reg):
    """q_j /= diag_j + damp (+ lam for j < n_reg); 0 where that denominator is not positive."""
    for j in prange(q.shape[0]):
        den = diag[j] + damp
        if j < n_reg:
            den += lam
        q[j] = q[j] / den if den > 0.0 else 0.0


@njit(cache=True)
def two_loop(q, S, order, m, rho, alpha, yptr, yidx, yval, lam, n_reg, diag, damp):
    """Overwrite ``q`` with H q, H the limited-memory BFGS inverse-Hessian approximation.

    Pairs are the rows ``S[order[t]]`` (t = 0 oldest .. m-1 newest) with y_k = y_sparse_k + lam *
    s_k[:n_reg], y_sparse_k held in CSR form by slot (``yptr``, ``yidx``, ``yval``); ``rho[k]`` =
    1/(s_k.y_k); ``alpha`` is scratch indexed by slot. The initial matrix is diagonal with entries
    1 / (diag_j + lam + damp) for the n_reg regularized coordinates and 1 / (diag_j + damp) for the rest
    (0 where that denominator is not positive). Two-loop recursion of "Updating Quasi-Newton Matrices
    with Limited Storage" (Mathematics of Computation, 1980); the dense passes run on all cores
    (:func:`axpy_dot`), each fusing one pair's update with the next pair's inner product.
    """
    size = q.shape[0]
    if m > 0:
        newest = S[order[m - 1]]
        acc = axpy_dot(q, 0.0, newest, newest, 0, size)
        for t in range(m - 1, -1, -1):
            k = order[t]
            a = rho[k] * acc
            alpha[k] = a
            sk = S[k]
            nxt = S[order[t - 1]] if t > 0 else sk
            acc = axpy_dot(q, -a * lam, sk, nxt, n_reg, size if t > 0 else 0)
            for p in range(yptr[k], yptr[k + 1]):
                i = yidx[p]
                v = a * yval[p]
                if t > 0:
                    acc -= nxt[i] * v
                q[i] -= v
    scale_by_diagonal(q, diag, damp, lam, n_reg)
    if m > 0:
        k = order[0]
        acc = lam * axpy_dot(q, 0.0, S[k], S[k], 0, n_reg)
        for p in range(yptr[k], yptr[k + 1]):
            acc += yval[p] * q[yidx[p]]
        for t in range(m):
            k = order[t]
            c = alpha[k] - rho[k] * acc
            sk = S[k]
            if t < m - 1:
                kn = order[t + 1]
                acc = lam * axpy_dot(q, c, sk, S[kn], size, n_reg)
                for p in range(yptr[kn], yptr[kn + 1]):
                    acc += yval[p] * q[yidx[p]]
            else:
                axpy_dot(q, c, sk, sk, size, 0)


@njit(cache=True)
def ema_diagonal(old, beta, cols, curv, curv_last, out):
    """out = beta * old, then out[cols] += (1 - beta) * curv and out[-1] += (1 - beta) * curv_last.

    The running (exponentially averaged) Gauss-Newton diagonal; ``old`` is not modified.
    """
    for j in range(old.shape[0]):
        out[j] = beta * old[j]
    for p in range(cols.shape[0]):
        out[cols[p]] += (1.0 - beta) * curv[p]
    out[old.shape[0] - 1] += (1.0 - beta) * curv_last


@njit(cache=True)
def direction_products(x, d, n_reg):
    """One read-only pass over the weights ``x`` and a direction ``d`` (equal length).

    Returns (x.d and d.d over the first ``n_reg`` coordinates, max |x_j| + max |d_j| over all
    coordinates, NaN when any entry is NaN). The last value bounds |x_j + e d_j| <= (1 + e) * it for
    0 < e <= 1, and e * it for e > 1, so the new weights are known finite without writing them.
    """
    xd = 0.0
    dd = 0.0
    mx = 0.0
    md = 0.0
    for j in range(n_reg):
        xj = x[j]
        dj = d[j]
        xd += xj * dj
        dd += dj * dj
        ax = abs(xj)
        ad = abs(dj)
        if not ax <= mx:
            mx = ax
        if not ad <= md:
            md = ad
    check = xd * 0.0 + dd * 0.0
    for j in range(n_reg, x.shape[0]):
        ax = abs(x[j])
        ad = abs(d[j])
        check += ax * 0.0 + ad * 0.0
        if not ax <= mx:
            mx = ax
        if not ad <= md:
            md = ad
    return xd, dd, mx + md + check


@njit(cache=True)
def sparse_dot(cols, vals, d, last, d_last):
    """sum_p vals[p] * d[cols[p]] + last * d_last: a gradient held on the batch's buckets (plus the
    intercept entry ``last``) against a dense direction."""
    acc = last * d_last
    for p in range(cols.shape[0]):
        acc += vals[p] * d[cols[p]]
    return acc


@njit(cache=True)
def line_loss(code, labels, weights, z0, u, eps):
    """sum_i c_i l(y_i, z0_i + eps * u_i): the batch's weighted data loss along the line x + eps d,
    with u = X d + d_b the margins' rate of change (one sparse product per step, none per trial)."""
    total = 0.0
    for i in range(z0.shape[0]):
        total += weights[i] * loss(code, labels[i], z0[i] + eps * u[i])
    return total


@njit(cache=True)
def line_residuals(code, labels, weights, z0, u, eps, r):
    """Write r_i = c_i l'(y_i, z0_i + eps * u_i) (residuals at an accepted point of the line) and
    return their sum."""
    total = 0.0
    for i in range(z0.shape[0]):
        ri = weights[i] * dloss(code, labels[i], z0[i] + eps * u[i])
        r[i] = ri
        total += ri
    return total


@njit(cache=True)
def commit_step(x, d, eps, s_out, store):
    """x += eps * d in place; when ``store``, also s_out = eps * d (the step of a new curvature pair,
    rounded to s_out's dtype: float32 storage halves the memory traffic of :func:`two_loop`)."""
    for j in range(x.shape[0]):
        sj = eps * d[j]
        x[j] = x[j] + sj
        if store:
            s_out[j] = sj


@njit(cache=True)
def shifted_margins_into(indptr, indices, data, x, d, eps, n, out):
    """Margins at the trial point x + eps * d (bucket weights x[:n], intercept x[n]) without forming it.

    Each weight is evaluated as x[j] + eps * d[j], the same expression :func:`commit_step` stores, so the
    margins equal those at the committed weights bit for bit.
    """
    n_rows = indptr.shape[0] - 1
    b = x[n] + eps * d[n]
    for i in range(n_rows):
        acc = b
        for k in range(indptr[i], indptr[i + 1]):
            j = indices[k]
            acc += data[k] * (x[j] + eps * d[j])
        out[i] = acc


@njit(cache=True)
def pair_products(d, eps, dd_reg, yidx, yval, lam, n_reg):
    """For s = eps * d and y = y_sparse + lam * s[:n_reg] (y_sparse on the distinct indices ``yidx``),
    return (s.y, y.y, s.s); ``dd_reg`` is sum_{j < n_reg} d_j^2 from :func:`check_step`."""
    ss_reg = eps * eps * dd_reg
    ss = ss_reg
    for j in range(n_reg, d.shape[0]):
        ss += eps * eps * d[j] * d[j]
    sy_sparse = 0.0
    yy_sparse = 0.0
    cross = 0.0
    for k in range(yidx.shape[0]):
        j = yidx[k]
        v = yval[k]
        sj = eps * d[j]
        sy_sparse += sj * v
        yy_sparse += v * v
        if j < n_reg:
            cross += sj * v
    sy = sy_sparse + lam * ss_reg
    yy = yy_sparse + 2.0 * lam * cross + lam * lam * ss_reg
    return sy, yy, ss


@njit(cache=True)
def sgd_candidate(x, n, eps, lam, cols, gsp, gb, new_vals):
    """Stochastic gradient step values on the batch's buckets, before committing.

    For x_{t+1} = x_t - eps (g_data + lam * w), coordinates outside ``cols`` only shrink by the factor
    (1 - eps lam); this writes new_vals[p] for bucket cols[p] and new_vals[len(cols)] for the intercept
    (unregularized), and returns True when they and the shrink factor are finite.
    """
    shrink = 1.0 - eps * lam
    ok = np.isfinite(shrink)
    for p in range(cols.shape[0]):
        v = shrink * x[cols[p]] - eps * gsp[p]
        new_vals[p] = v
        if not np.isfinite(v):
            ok = False
    v = x[n] - eps * gb
    new_vals[cols.shape[0]] = v
    if not np.isfinite(v):
        ok = False
    return ok


@njit(cache=True)
def sgd_commit(x, n, eps, lam, cols, new_vals):
    """Apply a checked :func:`sgd_candidate`: shrink every bucket weight, then set the batch's ones."""
    shrink = 1.0 - eps * lam
    if shrink != 1.0:
        for j in range(n):
            x[j] *= shrink
    for p in range(cols.shape[0]):
        x[cols[p]] = new_vals[p]
    x[n] = new_vals[cols.shape[0]]


@njit(cache=True)
def adagrad_candidate(x, acc, n, eta, lam, delta, cols, gsp, gb, new_x, new_acc):
    """AdaGrad composite mirror-descent values on the batch's buckets and the intercept.

    With G_j the running sum of squared data gradients and H_j = delta + sqrt(G_j), the update is
    w_j <- (H_j w_j - eta g_j) / (H_j + eta lam) (closed form of the composite step with the L2 term,
    "Adaptive Subgradient Methods for Online Learning and Stochastic Optimization", JMLR 2011). Writes the
    new weights/accumulators of ``cols`` then the intercept (index len(cols)); returns True when finite.
    """
    ok = True
    m = cols.shape[0]
    for p in range(m + 1):
        if p < m:
            j = cols[p]
            g = gsp[p]
            reg = lam
        else:
            j = n
            g = gb
            reg = 0.0
        a = acc[j] + g * g
        hj = delta + np.sqrt(a)
        v = (hj * x[j] - eta * g) / (hj + eta * reg)
        new_acc[p] = a
        new_x[p] = v
        if not (np.isfinite(v) and np.isfinite(a)):
            ok = False
    return ok


@njit(cache=True)
def adagrad_commit(x, acc, n, eta, lam, delta, cols, new_x, new_acc):
    """Apply a checked :func:`adagrad_candidate`: shrink bucket weights outside the batch by
    H_j / (H_j + eta lam), then set the batch's weights, accumulators and the intercept."""
    if lam > 0.0:
        for j in range(n):
            hj = delta + np.sqrt(acc[j])
            x[j] *= hj / (hj + eta * lam)
    m = cols.shape[0]
    for p in range(m):
        x[cols[p]] = new_x[p]
        acc[cols[p]] = new_acc[p]
    x[n] = new_x[m]
    acc[n] = new_acc[m]
