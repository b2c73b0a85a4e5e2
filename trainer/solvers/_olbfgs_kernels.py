"""The online L-BFGS solver's kernels: the chunked dense passes of the direction, the curvature pairs,
the diagonal scaling, and the line search along a step.

The limited-memory BFGS direction (:func:`lbfgs_direction`) has the coefficients of the two-loop
recursion of "Updating Quasi-Newton Matrices with Limited Storage" (Mathematics of Computation, 1980),
for curvature pairs whose gradient difference is stored as y = y_data + lambda * s, where y_data is
sparse (only the buckets of the batch that produced it) and the regularizer part is recovered from the
dense step s. Its inner products come from a small matrix of s_i.y_k kept up to date pair by pair
(:func:`record_pair`), so the dense work is two passes over memory shared by all cores, each reading
every stored s once. Weights are float64; the stored steps and the direction are in the pairs'
storage dtype (float32 by default). Parallel kernels are called from Python only.
"""

from __future__ import annotations

import time

import numpy as np
from numba import njit, prange

from trainer.kernels import VECTOR_MATH, dot
from trainer.losses import dloss, loss


#: Dense passes work on fixed chunks of this many coordinates (a chunk of every stored step fits in
#: the per-core cache, so a pass reads each step from memory once) and add the chunks' partial sums
#: in chunk order, whatever the number of threads: same inputs, same bits.
CHUNK = 4096


@njit(cache=True, nogil=True, fastmath=VECTOR_MATH)
def _axpy(out, a, v):
    """out += a * v over equally long 1-D arrays (``v`` float32 or float64). Loops run from 0 over
    slices, which lets the compiler use SIMD (an offset index would need a sign check per element)."""
    for j in range(v.shape[0]):
        out[j] += a * v[j]


@njit(cache=True, nogil=True, fastmath=VECTOR_MATH)
def _scale(v, a):
    """v *= a."""
    for j in range(v.shape[0]):
        v[j] *= a


@njit(cache=True, nogil=True, fastmath=VECTOR_MATH)
def _abs_sum(v):
    """sum_j |v[j]| (NaN or infinite when an entry is)."""
    acc = 0.0
    for j in range(v.shape[0]):
        acc += abs(v[j])
    return acc


@njit(cache=True, nogil=True, fastmath=VECTOR_MATH)
def _precondition(t, diag, diag_scale, shift):
    """t_j <- t_j / (diag_scale * diag_j + shift), 0 where that denominator is not positive."""
    for j in range(t.shape[0]):
        den = diag_scale * diag[j] + shift
        t[j] = t[j] / den if den > 0.0 else 0.0


@njit(cache=True, nogil=True)
def chunk_pointers(idx, size):
    """Where each chunk of ``CHUNK`` coordinates starts in an ascending index array.

    Parameters
    ----------
    idx : numpy.ndarray
        Ascending indices into a vector of ``size`` coordinates.
    size : int
        The vector's length.

    Returns
    -------
    numpy.ndarray
        int64: out[c] = number of indices below c * CHUNK, for c = 0 .. number of chunks (so chunk c
        holds idx[out[c]:out[c + 1]]).
    """
    chunks = (size + CHUNK - 1) // CHUNK
    out = np.empty(chunks + 1, dtype=np.int64)
    p = 0
    for c in range(chunks + 1):
        bound = c * CHUNK
        while p < idx.shape[0] and idx[p] < bound:
            p += 1
        out[c] = p
    return out


@njit(cache=True, nogil=True)
def _sparse_add(t, lo, idx, val, a, first, last):
    """t[idx[p] - lo] += a * val[p] for p in [first, last)."""
    for p in range(first, last):
        t[idx[p] - lo] += a * val[p]


@njit(cache=True, nogil=True)
def sparse_dot(t, lo, idx, val, first, last):
    """A sparse vector against the values of a run of coordinates.

    Parameters
    ----------
    t : numpy.ndarray
        The values of coordinates lo, lo + 1, ...
    lo : int
        The first coordinate of ``t``.
    idx, val : numpy.ndarray
        The sparse vector's indices and values.
    first, last : int
        The entries used, [first, last).

    Returns
    -------
    float
        sum_{p in [first, last)} val[p] * t[idx[p] - lo].
    """
    acc = 0.0
    for p in range(first, last):
        acc += val[p] * t[idx[p] - lo]
    return acc


@njit(cache=True, nogil=True)
def _pair_products(out, S, order, m, t, lo, top, c, yptr, yidx, yval, ychunk):
    """For chunk ``c`` of a vector whose values on [lo, lo + len(t)) are ``t``: out[i] = s_{order[i]} . t
    over the regularized part [lo, top) and out[m + i] = y_sparse_{order[i]} . t (the pair's entries
    in the chunk, from its chunk pointers)."""
    for i in range(m):
        k = order[i]
        out[i] = dot(S[k, lo:top], t[:top - lo])
        out[m + i] = sparse_dot(t, lo, yidx, yval, yptr[k] + ychunk[k, c], yptr[k] + ychunk[k, c + 1])


@njit(cache=True, nogil=True)
def _chunk_totals(part):
    """Column sums of per-chunk partial sums, added in chunk order (the same bits for any thread
    count)."""
    totals = np.zeros(part.shape[1])
    for c in range(part.shape[0]):
        for col in range(part.shape[1]):
            totals[col] += part[c, col]
    return totals


@njit(cache=True, parallel=True, nogil=True)
def precondition_pass(x, S, order, m, alpha, lam, n_reg, diag, diag_scale, damp, gcols, gvals, gptr, yptr,
                      yidx, yval, ychunk, q, e, b):
    """Dense middle of the recursion, one pass over memory on all cores, chunk by chunk.

    Forms q = g - sum_t alpha_t y_{order[t]} (g = lam * x on the first ``n_reg`` coordinates plus the
    sparse ``gvals`` on ``gcols``; y_k = y_sparse_k + lam * s_k there), writes H0 q into ``q`` with
    H0_jj = 1 / (diag_scale * diag_j + damp (+ lam for j < n_reg)), 0 where that denominator is not
    positive, and the inner products e_t = sum_{j < n_reg} s_{order[t], j} (H0 q)_j and
    b_t = y_sparse_{order[t]} . (H0 q). Sparse vectors are ascending. The dense work is done in ``q``'s
    dtype (the pairs' storage precision), sums over chunks in float64.

    Parameters
    ----------
    x : numpy.ndarray
        The weights.
    S : numpy.ndarray
        The stored steps, one row per slot (pairs' storage dtype).
    order : numpy.ndarray
        Slots of the pairs, oldest first.
    m : int
        Pairs in use.
    alpha : numpy.ndarray
        The first loop's coefficients.
    lam : float
        The L2 strength.
    n_reg : int
        Regularized coordinates (the buckets; the intercept is not).
    diag : numpy.ndarray
        The running curvature diagonal, to be multiplied by ``diag_scale``.
    diag_scale : float
        Its scale (:func:`fold_diagonal`).
    damp : float
        The damping added to every diagonal entry.
    gcols, gvals, gptr : numpy.ndarray
        The gradient's sparse part and its :func:`chunk_pointers`.
    yptr, yidx, yval, ychunk : numpy.ndarray
        The pairs' sparse y parts: slot k's ascending entries start at ``yptr[k]`` in ``yidx``/``yval``,
        and ``ychunk[k]`` are their :func:`chunk_pointers` (offsets from ``yptr[k]``).
    q : numpy.ndarray
        Output, H0 q.
    e, b : numpy.ndarray
        Outputs, the inner products above.
    """
    size = q.shape[0]
    chunks = (size + CHUNK - 1) // CHUNK
    part = np.zeros((chunks, 2 * max(m, 1)))
    minus_alpha = (-alpha).astype(q.dtype)
    lam_w = q.dtype.type(lam)
    for c in prange(chunks):
        lo = c * CHUNK
        hi = min(size, lo + CHUNK)
        top = max(lo, min(hi, n_reg))
        tmp = np.zeros(hi - lo, dtype=q.dtype)
        reg = tmp[:top - lo]
        reg[:] = x[lo:top]
        for i in range(m):
            _axpy(reg, minus_alpha[i], S[order[i], lo:top])
        _scale(reg, lam_w)
        _sparse_add(tmp, lo, gcols, gvals, 1.0, gptr[c], gptr[c + 1])
        for i in range(m):
            k = order[i]
            _sparse_add(tmp, lo, yidx, yval, -alpha[i], yptr[k] + ychunk[k, c], yptr[k] + ychunk[k, c + 1])
        _precondition(reg, diag[lo:top], diag_scale, damp + lam)
        _precondition(tmp[top - lo:], diag[top:hi], diag_scale, damp)
        q[lo:hi] = tmp
        _pair_products(part[c], S, order, m, tmp, lo, top, c, yptr, yidx, yval, ychunk)
    totals = _chunk_totals(part)
    e[:] = totals[:m]
    b[:] = totals[m:2 * m]


@njit(cache=True, parallel=True, nogil=True)
def combine_pass(q, S, order, m, coef, x, n_reg, yptr, yidx, yval, ychunk, p, yd):
    """Last dense pass: d = q + sum_t coef_t s_{order[t]} written into ``q``.

    Also computes the products the line search and the next curvature pair need: p_t = sum_{j < n_reg}
    s_{order[t], j} d_j and yd_t = y_sparse_{order[t]} . d (pairs as in :func:`precondition_pass`).

    Parameters
    ----------
    q : numpy.ndarray
        H0 q on entry, d on return.
    S : numpy.ndarray
        The stored steps, one row per slot (pairs' storage dtype).
    order : numpy.ndarray
        Slots of the pairs, oldest first.
    m : int
        Pairs in use.
    coef : numpy.ndarray
        The second loop's coefficients.
    x : numpy.ndarray
        The weights.
    n_reg : int
        Regularized coordinates.
    yptr, yidx, yval, ychunk : numpy.ndarray
        The pairs' sparse y parts: slot k's ascending entries start at ``yptr[k]`` in ``yidx``/``yval``,
        and ``ychunk[k]`` are their :func:`chunk_pointers` (offsets from ``yptr[k]``).
    p, yd : numpy.ndarray
        Outputs, the products above.

    Returns
    -------
    tuple of float
        x.d and d.d over the first ``n_reg`` coordinates, and sum_j |x_j| + sum_j |d_j| over all
        coordinates. The last value is NaN or infinite when any entry is, and bounds
        |x_j + e d_j| <= (1 + e) * it for 0 < e <= 1 and e * it for e > 1, so the new weights are known
        finite without writing them.
    """
    size = q.shape[0]
    chunks = (size + CHUNK - 1) // CHUNK
    width = 2 * max(m, 1)
    part = np.zeros((chunks, width + 3))
    coef_w = coef.astype(q.dtype)
    for c in prange(chunks):
        lo = c * CHUNK
        hi = min(size, lo + CHUNK)
        top = max(lo, min(hi, n_reg))
        tmp = q[lo:hi]
        for i in range(m):
            _axpy(tmp, coef_w[i], S[order[i], lo:hi])
        xs = x[lo:hi]
        reg = tmp[:top - lo]
        _pair_products(part[c], S, order, m, tmp, lo, top, c, yptr, yidx, yval, ychunk)
        part[c, width] = dot(xs[:top - lo], reg)
        part[c, width + 1] = dot(reg, reg)
        part[c, width + 2] = _abs_sum(xs) + _abs_sum(tmp)
    totals = _chunk_totals(part)
    p[:] = totals[:m]
    yd[:] = totals[m:2 * m]
    return totals[width], totals[width + 1], totals[width + 2]


@njit(cache=True, parallel=True, nogil=True)
def gather_steps(S, order, m, gcols, gvals):
    """The stored steps at the gradient's buckets, split over all cores.

    Random reads from memory: two cores keep twice as many in flight.

    Parameters
    ----------
    S : numpy.ndarray
        The stored steps, one row per slot (pairs' storage dtype).
    order : numpy.ndarray
        Slots of the pairs, oldest first.
    m : int
        Pairs in use.
    gcols, gvals : numpy.ndarray
        The gradient's sparse part.

    Returns
    -------
    tuple of numpy.ndarray
        ``(Sg, sg)``: Sg[t, :] = s_{order[t]} at ``gcols`` and sg[t] = Sg[t] . ``gvals``.
    """
    Sg = np.empty((m, gcols.shape[0]))
    sg = np.empty(m)
    for i in prange(m):
        row = S[order[i]]
        acc = 0.0
        for t in range(gcols.shape[0]):
            v = row[gcols[t]]
            Sg[i, t] = v
            acc += v * gvals[t]
        sg[i] = acc
    return Sg, sg


@njit(cache=True, nogil=True)
def _first_loop(sg, order, m, rho, G, z, lam):
    """First loop of the recursion from the small matrices: alpha_t = rho (s.g - sum_{t' > t} alpha_t'
    G), newest pair first, with s.g = ``sg`` + lam * z (``sg`` from :func:`gather_steps`)."""
    alpha = np.empty(m)
    for i in range(m - 1, -1, -1):
        k = order[i]
        a = lam * z[k] + sg[i]
        for i2 in range(i + 1, m):
            a -= alpha[i2] * G[k, order[i2]]
        alpha[i] = rho[k] * a
    return alpha


@njit(cache=True, nogil=True)
def _second_loop(order, m, rho, G, alpha, lam, e, b):
    """Second loop of the recursion, oldest pair first: coef_t = alpha_t - rho (y.H0q + sum_{t' < t}
    coef_t' G), with y.H0q = lam * e_t + b_t from :func:`precondition_pass`."""
    coef = np.empty(m)
    for i in range(m):
        k = order[i]
        acc = lam * e[i] + b[i]
        for i2 in range(i):
            acc += coef[i2] * G[order[i2], k]
        coef[i] = alpha[i] - rho[k] * acc
    return coef


def lbfgs_direction(x, gcols, gvals, gptr, S, order, m, rho, G, z, yptr, yidx, yval, ychunk, lam, n_reg, diag,
                    diag_scale, damp, q, seconds=None):
    """Write d = H g into ``q``, H the limited-memory BFGS inverse-Hessian approximation.

    The gradient is g = lam * x[:n_reg] (zero at the other coordinates) plus the sparse part ``gvals`` on
    the ascending ``gcols``. Pairs are the rows ``S[order[t]]`` (t = 0 oldest .. m-1 newest) with
    y_k = y_sparse_k + lam * s_k[:n_reg], y_sparse_k held by slot, so slots may be padded rows of one
    array. The initial matrix is the diagonal of :func:`precondition_pass`. Same coefficients as the
    two-loop recursion of the 1980 paper below, but its inner products come from the small matrix G, as
    in the vector-free L-BFGS of the NeurIPS 2014 paper: with y sparse plus lam * s, the dense work is
    two passes over the stored steps instead of 2m.

    A plain Python function on purpose: the parallel kernels are only ever called from Python, never
    from another compiled function, because a compiled caller that embeds a parallel callee taken from
    numba's on-disk cache can crash the process (seen with numba 0.68).

    Parameters
    ----------
    x : numpy.ndarray
        The weights.
    gcols, gvals, gptr : numpy.ndarray
        The gradient's sparse part and its :func:`chunk_pointers`.
    S : numpy.ndarray
        The stored steps, one row per slot (pairs' storage dtype).
    order : numpy.ndarray
        Slots of the pairs, oldest first.
    m : int
        Pairs in use.
    rho : numpy.ndarray
        rho[k] = 1 / (s_k.y_k).
    G : numpy.ndarray
        G[i, k] = s_i.y_k, kept up to date by :func:`record_pair`.
    z : numpy.ndarray
        z[k] = s_k.x[:n_reg], kept up to date by :func:`record_pair`.
    yptr, yidx, yval, ychunk : numpy.ndarray
        The pairs' sparse y parts: slot k's ascending entries start at ``yptr[k]`` in ``yidx``/``yval``,
        and ``ychunk[k]`` are their :func:`chunk_pointers` (offsets from ``yptr[k]``).
    lam : float
        The L2 strength.
    n_reg : int
        Regularized coordinates.
    diag, diag_scale, damp
        The initial matrix, as in :func:`precondition_pass`.
    q : numpy.ndarray
        Output, the direction d.
    seconds : dict, optional
        When given, the wall time of the two dense passes is added to its "dense" entry.

    Returns
    -------
    tuple
        ``(xd, dd, bound, p, yd, Sg)``: x.d, d.d and the bound as :func:`combine_pass` returns them, p and
        yd (its inner products with the stored pairs) and Sg[t, :] = s_{order[t]} at ``gcols`` (for
        :func:`record_pair`).

    References
    ----------
    "Updating Quasi-Newton Matrices with Limited Storage", Mathematics of Computation, 1980.
    "Large-scale L-BFGS using MapReduce", NeurIPS, 2014.
    """
    Sg, sg = gather_steps(S, order, m, gcols, gvals)
    alpha = _first_loop(sg, order, m, rho, G, z, lam)
    e = np.empty(m)
    b = np.empty(m)
    clock = time.perf_counter
    started = clock()
    precondition_pass(x, S, order, m, alpha, lam, n_reg, diag, diag_scale, damp, gcols, gvals, gptr, yptr, yidx,
                      yval, ychunk, q, e, b)
    first = clock() - started
    coef = _second_loop(order, m, rho, G, alpha, lam, e, b)
    p = np.empty(m)
    yd = np.empty(m)
    started = clock()
    xd, dd, bound = combine_pass(q, S, order, m, coef, x, n_reg, yptr, yidx, yval, ychunk, p, yd)
    if seconds is not None:
        seconds["dense"] += first + clock() - started
    return xd, dd, bound, p, yd, Sg


@njit(cache=True, nogil=True)
def record_pair(order, m, h, accept, Sg, ysp, p, yd, step, lam, sy, xd, dd, G, z):
    """Keep ``G`` (s_i.y_k) and ``z`` (s_k.w) of :func:`lbfgs_direction` current after a step.

    The weights moved by s = step * d. When ``accept``, the new pair goes to slot ``h`` (the oldest pair
    when the memory is full): s_k.y_new = Sg_k . ysp + lam * step * p_k and
    s_new.y_k = step * (yd_k + lam * p_k).

    Parameters
    ----------
    order, m, Sg, p, yd, xd, dd
        Those of the direction.
    h : int
        The new pair's slot.
    accept : bool
        Whether the new pair is kept.
    ysp : numpy.ndarray
        The sparse part of the new y on the direction's ``gcols``.
    step : float
        The accepted step length.
    lam : float
        The L2 strength.
    sy : float
        s.y of the new pair.
    G, z : numpy.ndarray
        Updated in place.
    """
    for i in range(m):
        k = order[i]
        if accept and k == h:
            continue
        ss = step * p[i]
        z[k] += ss
        if accept:
            acc = lam * ss
            for t in range(ysp.shape[0]):
                acc += Sg[i, t] * ysp[t]
            G[k, h] = acc
            G[h, k] = step * yd[i] + lam * ss
    if accept:
        z[h] = step * xd + step * step * dd
        G[h, h] = sy


@njit(cache=True, nogil=True)
def fold_diagonal(diag, scale, beta, cols, curv, curv_last):
    """Running Gauss-Newton diagonal D = scale * diag, updated to beta * D + (1 - beta) * c.

    The factor beta goes into the scale, so only the batch's buckets are written (``diag`` is rescaled
    in place only when the scale drops below 1e-150, or reset when beta is 0).

    Parameters
    ----------
    diag : numpy.ndarray
        The unscaled diagonal, updated in place.
    scale : float
        Its current scale.
    beta : float
        The decay.
    cols : numpy.ndarray
        The batch's buckets.
    curv : numpy.ndarray
        c on ``cols``.
    curv_last : float
        c at the last coordinate (the intercept).

    Returns
    -------
    float
        The new scale.
    """
    if beta == 0.0:
        diag[:] = 0.0
        scale = 1.0
    else:
        scale *= beta
        if scale < 1e-150:
            for j in range(diag.shape[0]):
                diag[j] *= scale
            scale = 1.0
    f = (1.0 - beta) / scale
    for t in range(cols.shape[0]):
        diag[cols[t]] += f * curv[t]
    diag[diag.shape[0] - 1] += f * curv_last
    return scale


@njit(cache=True, nogil=True)
def line_loss(code, labels, weights, z0, u, eps):
    """The batch's weighted data loss along the line x + eps d.

    u = X d + d_b is the margins' rate of change (one sparse product per step, none per trial).

    Parameters
    ----------
    code : int
        A loss code of :mod:`trainer.losses`.
    labels, weights : numpy.ndarray
        The batch's labels and row weights c_i.
    z0 : numpy.ndarray
        The margins at x.
    u : numpy.ndarray
        The margins' rate of change.
    eps : float
        The trial step.

    Returns
    -------
    float
        sum_i c_i l(y_i, z0_i + eps * u_i).
    """
    total = 0.0
    for i in range(z0.shape[0]):
        total += weights[i] * loss(code, labels[i], z0[i] + eps * u[i])
    return total


@njit(cache=True, nogil=True)
def line_residuals(code, labels, weights, z0, u, eps, r):
    """Write r_i = c_i l'(y_i, z0_i + eps * u_i) (residuals at an accepted point of the line).

    Parameters
    ----------
    code, labels, weights, z0, u, eps
        As :func:`line_loss`.
    r : numpy.ndarray
        Output.

    Returns
    -------
    float
        Their sum.
    """
    total = 0.0
    for i in range(z0.shape[0]):
        ri = weights[i] * dloss(code, labels[i], z0[i] + eps * u[i])
        r[i] = ri
        total += ri
    return total


@njit(cache=True, nogil=True)
def commit_step(x, d, eps, s_out, store):
    """x += eps * d in place; when ``store``, also s_out = eps * d.

    s_out is the step of a new curvature pair, rounded to its dtype: float32 storage halves the memory
    traffic of :func:`lbfgs_direction`.

    Parameters
    ----------
    x : numpy.ndarray
        The weights.
    d : numpy.ndarray
        The direction.
    eps : float
        The step length.
    s_out : numpy.ndarray
        The slot's row of stored steps.
    store : bool
        Write ``s_out``.
    """
    for j in range(x.shape[0]):
        sj = eps * d[j]
        x[j] = x[j] + sj
        if store:
            s_out[j] = sj


@njit(cache=True, nogil=True)
def pair_products(dc, eps, dd_reg, yidx, yval, lam, n_reg):
    """(s.y, y.y, s.s) for s = eps * d and y = y_sparse + lam * s[:n_reg].

    Parameters
    ----------
    dc : numpy.ndarray
        d at ``yidx``.
    eps : float
        The step length.
    dd_reg : float
        sum_{j < n_reg} d_j^2 (from :func:`combine_pass`).
    yidx, yval : numpy.ndarray
        y_sparse on its distinct indices; the unregularized coordinates j >= n_reg must be among them.
    lam : float
        The L2 strength.
    n_reg : int
        Regularized coordinates.

    Returns
    -------
    tuple of float
        ``(s.y, y.y, s.s)``.
    """
    ss_reg = eps * eps * dd_reg
    ss = ss_reg
    sy_sparse = 0.0
    yy_sparse = 0.0
    cross = 0.0
    for k in range(yidx.shape[0]):
        v = yval[k]
        sj = eps * dc[k]
        sy_sparse += sj * v
        yy_sparse += v * v
        if yidx[k] < n_reg:
            cross += sj * v
        else:
            ss += sj * sj
    sy = sy_sparse + lam * ss_reg
    yy = yy_sparse + 2.0 * lam * cross + lam * lam * ss_reg
    return sy, yy, ss
