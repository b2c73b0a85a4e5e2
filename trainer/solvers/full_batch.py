"""The full-batch phase: deterministic L-BFGS on the whole hashed log held in memory.

When a log's hashed rows fit a memory budget, the default solver's later passes minimize the exact
objective of :mod:`trainer.solvers` over all rows at once instead of one batch at a time: each such
pass runs scipy's L-BFGS-B ("A Limited Memory Algorithm for Bound Constrained Optimization", SIAM
Journal on Scientific Computing 16, 1995; "Algorithm 778: L-BFGS-B", ACM Transactions on
Mathematical Software 23, 1997), without bounds, from the current weights, with the objective and
its gradient computed by the project's serial numba kernels (margins, residuals, gradient scatter),
so the same rows and starting weights give the same weights bit for bit. Each pass starts a fresh
L-BFGS-B memory, so a pass depends only on the weights it starts from: a run resumed at a pass
boundary repeats exactly what the uninterrupted run did.

Memory: the in-memory log takes ``log_bytes(rows, entries)`` (int32 bucket and float64 value per
entry, row pointer, label, row weight, margin and residual per row); L-BFGS-B adds 2 x ``history`` x
(buckets + 1) float64 values while a pass runs.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from trainer.kernels import (batch_support, dot, margins_into, residuals_curvatures_into, residuals_into,
                             scatter_compact, scatter_gradient_curvature)

#: L-BFGS-B iterations in one full-batch pass.
ITERATIONS_PER_PASS = 30


def log_bytes(rows: int, entries: int) -> int:
    """Bytes the in-memory log takes (see the module docstring).

    Parameters
    ----------
    rows : int
        Rows of the log.
    entries : int
        Its nonzeros.

    Returns
    -------
    int
        12 per entry, 48 per row, plus 8.
    """
    return 12 * entries + 48 * rows + 8


@dataclass
class InMemoryLog:
    """The hashed rows of one pass as one CSR matrix with labels and row weights.

    The entries address the log's distinct buckets ``cols`` (ascending) by ``slot``
    (:func:`trainer.kernels.batch_support`), so the kernels work on gathered, compact vectors.

    Attributes
    ----------
    indptr : numpy.ndarray
        int64 row offsets (n_rows + 1).
    cols : numpy.ndarray
        int32 distinct buckets of the log, ascending.
    slot : numpy.ndarray
        int32 position in ``cols`` of each entry's bucket.
    data : numpy.ndarray
        float64 entry values.
    labels : numpy.ndarray
        float64 labels in {0, 1}.
    weights : numpy.ndarray
        float64 row weights.
    """

    indptr: np.ndarray
    cols: np.ndarray
    slot: np.ndarray
    data: np.ndarray
    labels: np.ndarray
    weights: np.ndarray

    @property
    def n_rows(self) -> int:
        """Rows in the log."""
        return self.labels.shape[0]

    @classmethod
    def collect(cls, batches, budget_bytes: int, n_features: int) -> "InMemoryLog | None":
        """Concatenate a pass's batches, unless they exceed a memory budget.

        Parameters
        ----------
        batches : iterable of trainer.reader.stream.Batch
            The batches, in order, with buckets below ``n_features``.
        budget_bytes : int
            The budget (see :func:`log_bytes`).
        n_features : int
            The model's buckets.

        Returns
        -------
        InMemoryLog or None
            None as soon as the rows would take more than ``budget_bytes``.
        """
        parts, rows, entries = [], 0, 0
        for b in batches:
            rows += b.n_rows
            entries += b.indices.shape[0]
            if log_bytes(rows, entries) > budget_bytes:
                return None
            parts.append((b.indptr[1:] - b.indptr[0], b.indices.astype(np.int32, copy=False), b.data, b.labels,
                          b.weights))
        indptr = np.zeros(rows + 1, dtype=np.int64)
        at, offset = 1, 0
        for ptr, idx, _, _, _ in parts:
            indptr[at:at + ptr.shape[0]] = ptr + offset
            at += ptr.shape[0]
            offset += idx.shape[0]
        cat = (lambda k, dtype: np.concatenate([p[k] for p in parts]).astype(dtype, copy=False)
               if parts else np.zeros(0, dtype=dtype))
        indices = cat(1, np.int32)
        slot = np.empty(indices.shape[0], dtype=np.int32)
        cols = batch_support(indices, np.zeros((n_features + 63) // 64, dtype=np.uint64), slot)
        return cls(indptr, cols, slot, cat(2, np.float64), cat(3, np.float64), cat(4, np.float64))


def _diagonal(log: InMemoryLog, code: int, l2: float, v: np.ndarray, z: np.ndarray) -> np.ndarray:
    """The objective's Gauss-Newton diagonal at ``v`` (the log's buckets, then the intercept), l2 included;
    ``z`` is scratch for the margins."""
    m = log.cols.shape[0]
    margins_into(log.indptr, log.slot, log.data, v[:m], float(v[m]), z)
    r = np.empty(log.n_rows, dtype=np.float64)
    h = np.empty(log.n_rows, dtype=np.float64)
    _, weight_sum, _, h_sum = residuals_curvatures_into(code, log.labels, log.weights, z, r, h)
    d = np.empty(m + 1, dtype=np.float64)
    d[m] = h_sum / weight_sum
    scatter_gradient_curvature(log.indptr, log.slot, log.data, r, h, 1.0 / weight_sum, np.empty(m), d[:m])
    d[:m] += l2
    return d


def minimize(log: InMemoryLog, code: int, l2: float, x: np.ndarray, *, history: int = 10,
             iterations: int = ITERATIONS_PER_PASS, stop=None) -> dict:
    """Run L-BFGS-B iterations on the whole log.

    Minimizes F(w, b) = sum_i c_i l(y_i, x_i.w + b) / sum_i c_i + (l2 / 2) ||w||^2 from ``x``. The
    iterations move the log's buckets and the intercept; every other bucket is set to 0, its exact
    minimizer (the objective is (l2 / 2) w_j^2 there). They work on scaled variables u = x / s with
    s = D^(-1/2), D the Gauss-Newton diagonal of F at the start (the diagonal preconditioner of
    "Efficient BackProp", Neural Networks: Tricks of the Trade, Springer, 1998): bucket curvatures
    follow bucket frequencies over orders of magnitude, which an unscaled L-BFGS-B start (a multiple
    of the identity) ignores. On the regime matrix this took the holdout log-loss after one full-batch
    pass from 1.0339 to 1.0022 x LL* on rows of 155 entries (tags200) and to 1.0000 on every other
    log of 200k rows or more (``scripts/bench_regimes.py``).

    Parameters
    ----------
    log : InMemoryLog
        The rows.
    code : int
        A loss code of :mod:`trainer.losses`.
    l2 : float
        The L2 strength.
    x : numpy.ndarray
        Bucket weights then the intercept, float64; overwritten with the result.
    history : int, default 10
        L-BFGS-B's memory (``maxcor``).
    iterations : int, default ITERATIONS_PER_PASS
        Most iterations.
    stop : callable, optional
        Polled after every iteration; returning True ends the pass early (then ``x`` is left unchanged).

    Returns
    -------
    dict
        ``iterations``, ``evaluations``, ``objective``, ``converged``, ``stopped``, ``seconds``.

    References
    ----------
    "A Limited Memory Algorithm for Bound Constrained Optimization", SIAM Journal on Scientific
    Computing 16, 1995. "Algorithm 778: L-BFGS-B", ACM Transactions on Mathematical Software 23, 1997.
    """
    import scipy.optimize  # here, not at the top: a run without a full-batch pass never loads it (0.2-0.3 s)

    n = x.shape[0] - 1
    m = log.cols.shape[0]
    z = np.empty(log.n_rows, dtype=np.float64)
    r = np.empty(log.n_rows, dtype=np.float64)
    v0 = np.append(x[log.cols], x[n])
    scale = 1.0 / np.sqrt(np.maximum(_diagonal(log, code, l2, v0, z), 1e-12))

    def fg(u):
        v = u * scale
        w = v[:m]
        margins_into(log.indptr, log.slot, log.data, w, float(v[m]), z)
        loss_sum, weight_sum, r_sum = residuals_into(code, log.labels, log.weights, z, r)
        g = np.empty(m + 1, dtype=np.float64)
        scatter_compact(log.indptr, log.slot, log.data, r, 1.0 / weight_sum, g[:m])
        g[:m] += l2 * w
        g[m] = r_sum / weight_sum
        return loss_sum / weight_sum + 0.5 * l2 * dot(w, w), g * scale

    stopped = False

    def poll(_result):
        nonlocal stopped
        if stop is not None and stop():
            stopped = True
            raise StopIteration

    started = time.perf_counter()
    res = scipy.optimize.minimize(fg, v0 / scale, jac=True, method="L-BFGS-B", callback=poll,
                                  options={"maxiter": iterations, "maxcor": history, "ftol": 1e-15,
                                           "gtol": 1e-12, "maxfun": 2 * iterations + 20})
    if not stopped:
        x[:] = 0.0
        x[log.cols] = res.x[:m] * scale[:m]
        x[n] = res.x[m] * scale[m]
    return {"iterations": int(res.nit), "evaluations": int(res.nfev), "objective": float(res.fun),
            "converged": bool(res.success) and res.nit < iterations, "stopped": stopped,
            "seconds": time.perf_counter() - started}
