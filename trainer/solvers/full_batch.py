"""The full-batch phase: deterministic L-BFGS on the whole hashed log held in memory.

When a log's hashed rows fit a memory budget, the default solver's later passes minimize the exact
objective of :mod:`trainer.solvers` over all rows at once instead of one batch at a time: each such
pass runs scipy's L-BFGS-B ("A Limited Memory Algorithm for Bound Constrained Optimization", SIAM
Journal on Scientific Computing 16, 1995; "Algorithm 778: L-BFGS-B", ACM Transactions on
Mathematical Software 23, 1997), without bounds, from the current weights, with the objective and
its gradient computed by the project's serial numba kernels (margins, residuals, gradient scatter in
one pass over the rows), so the same rows and starting weights give the same weights bit for bit.
Each pass starts a fresh L-BFGS-B memory, so a pass depends only on the weights it starts from: a run
resumed at a pass boundary repeats exactly what the uninterrupted run did.

Several values of a sweep (:mod:`trainer.sweep`) run their passes together (:func:`minimize`): each
value's L-BFGS-B is driven call by call through scipy's reverse-communication routine (:class:`LBFGSB`),
the values are split into groups (:func:`groups`), one per numba thread (``NUMBA_NUM_THREADS``), and
each round of a group one pass over the rows computes the objective and gradient of every value of
the group waiting for them (:func:`trainer.kernels.objectives_into`: a bucket's weights and gradient
sums of the group side by side, a row's margins in registers), each value's sums in the order of a
value alone, so its weights are those of its pass alone, bit for bit. While one group's thread is in
scipy's routine (which holds the GIL), the other's evaluates. On the 1M-row benchmark log
(``scripts/bench_train.py --sweep``: 218k distinct buckets, 21 entries a row, about 36 evaluations a
pass) an evaluation of 5 values took 0.38-0.40 s on one core in one group against 0.13-0.14 s for one
value, and 0.26-0.30 s as groups of 3 and 2 on two threads; the kernel before (a row's margins in a
small array, the weights and the gradient sums in two arrays) took 0.48-0.58 s in the same two runs.

Memory: the in-memory log takes ``log_bytes(rows, entries)`` (int32 bucket and float64 value per
entry, row pointer, label, row weight, margin and residual per row); while a pass runs, each value adds
at most ``workspace_bytes(buckets, history)`` (L-BFGS-B's workspace and bounds, the scaling, the last
point and gradient, its columns of the evaluation's weights and gradient sums, its start point).
"""

from __future__ import annotations

import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numba
import numpy as np

from trainer.kernels import (batch_support, dot, margins_into, objectives_into, residuals_curvatures_into,
                             scatter_gradient_curvature)

#: L-BFGS-B iterations in one full-batch pass.
ITERATIONS_PER_PASS = 30
#: L-BFGS-B's tolerances in a full-batch pass (``scipy.optimize.minimize``'s options of those names): tight
#: enough that a pass ends by its iterations, not by a test of the objective's decrease.
FTOL, GTOL = 1e-15, 1e-12


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

    The entries address the log's distinct buckets ``cols`` by ``slot``, so the kernels work on gathered,
    compact vectors. ``cols`` lists the most frequent buckets first (ties in bucket order): the weights most
    entries read share few cache lines, which took a 5-value evaluation (:func:`minimize`) of the
    1M-row benchmark log from 0.48 to 0.38 s (one value: 0.12 s either way).

    Attributes
    ----------
    indptr : numpy.ndarray
        int64 row offsets (n_rows + 1).
    cols : numpy.ndarray
        int32 distinct buckets of the log, by descending count of entries.
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
            parts.append((b.indptr[1:] - b.indptr[0], b.indices.astype(np.int32, copy=False), b.data,
                          b.labels, b.weights))
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
        order = np.argsort(-np.bincount(slot, minlength=cols.shape[0]), kind="stable")
        rank = np.empty(cols.shape[0], dtype=np.int32)
        rank[order] = np.arange(cols.shape[0], dtype=np.int32)
        np.take(rank, slot, out=slot, mode="clip")  # in place: "clip" writes each entry after reading it
        return cls(indptr, cols[order], slot, cat(2, np.float64), cat(3, np.float64), cat(4, np.float64))


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


class LBFGSB:
    """scipy's L-BFGS-B without bounds, one call of its reverse-communication routine at a time.

    ``scipy.optimize.minimize(method="L-BFGS-B")`` loops over ``scipy.optimize._lbfgsb.setulb``
    (signature of scipy >= 1.15), computing the objective and gradient whenever the routine asks for
    them (task ``EVALUATE``); here the caller does, so several problems can advance in lockstep and a
    checkpoint can hold the whole state (``arrays``).

    Parameters
    ----------
    size : int
        Variables.
    history : int
        Correction pairs (minimize's ``maxcor``).
    ftol, gtol : float
        minimize's options of those names.

    Attributes
    ----------
    arrays : dict of str to numpy.ndarray
        The iterate ``u``; the objective ``f`` and gradient ``g`` at the point the routine asked for last,
        which the caller writes; the routine's workspace (``wa``, ``iwa``, ``task``, ``ln_task``, ``lsave``,
        ``isave``, ``dsave``).

    References
    ----------
    "Algorithm 778: L-BFGS-B", ACM Transactions on Mathematical Software 23, 1997.
    """

    NEW_POINT, EVALUATE, CONVERGED, STOP = 1, 3, 4, 5
    #: minimize's task codes for a stop after ``maxiter`` iterations and after ``maxfun`` evaluations.
    MAX_ITERATIONS, MAX_EVALUATIONS = 504, 502
    MAX_LINE_STEPS = 20

    def __init__(self, size: int, history: int, ftol: float, gtol: float):
        self.history, self.factr, self.gtol = history, ftol / np.finfo(float).eps, gtol
        shapes = self.shapes(size, history)
        self.arrays = {k: np.zeros(() if k == "f" else length, dtype)
                       for k, (length, dtype) in shapes.items() if not k.startswith("bound")}
        self._bounds = tuple(np.zeros(*shapes[k]) for k in ("bound_lo", "bound_hi", "bound_kind"))

    @staticmethod
    def shapes(size: int, history: int) -> dict:
        """Length and dtype of each array the routine takes, for ``size`` variables: the state (``arrays``,
        ``f`` a 0-d array) and the bounds (``bound_*``, all zero: no bounds).

        Parameters
        ----------
        size : int
            Variables.
        history : int
            Correction pairs.

        Returns
        -------
        dict of str to (int, type)
        """
        m = history
        return {"u": (size, np.float64), "f": (1, np.float64), "g": (size, np.float64),
                "wa": (2 * m * size + 5 * size + 11 * m * m + 8 * m, np.float64), "iwa": (3 * size, np.int32),
                "task": (2, np.int32), "ln_task": (2, np.int32), "lsave": (4, np.int32),
                "isave": (44, np.int32), "dsave": (29, np.float64),
                "bound_lo": (size, np.float64), "bound_hi": (size, np.float64), "bound_kind": (size, np.int32)}

    @property
    def task(self) -> int:
        """The task code after the last call (``NEW_POINT``, ``EVALUATE``, ``CONVERGED``, ...; 0 before)."""
        return int(self.arrays["task"][0])

    def call(self) -> int:
        """Call the routine once: it moves ``u`` and returns when it needs f and g at ``u``, has accepted a
        new point, or has stopped.

        Returns
        -------
        int
            The task code.
        """
        from scipy.optimize import _lbfgsb  # here: a run without a full-batch pass never loads scipy.optimize

        a = self.arrays
        lo, hi, nbd = self._bounds
        _lbfgsb.setulb(self.history, a["u"], lo, hi, nbd, a["f"], a["g"], self.factr, self.gtol, a["wa"],
                       a["iwa"], a["task"], a["lsave"], a["isave"], a["dsave"], self.MAX_LINE_STEPS,
                       a["ln_task"])
        return self.task

    def halt(self, reason: int) -> None:
        """Make the next :meth:`call` end the run, as minimize does at its limits.

        Parameters
        ----------
        reason : int
            ``MAX_ITERATIONS`` or ``MAX_EVALUATIONS``.
        """
        self.arrays["task"][:] = (self.STOP, reason)


def workspace_bytes(n_features: int, history: int) -> int:
    """Bytes one value's full-batch pass allocates at most (a log that reaches every bucket).

    Over n_features + 1 variables: :class:`LBFGSB`'s arrays and bounds (:meth:`LBFGSB.shapes`), then six
    float64 vectors of :func:`minimize`'s own (the scaling, the last point and gradient, the value's
    columns of the evaluation's weights and gradient sums, the start point).

    Parameters
    ----------
    n_features : int
        Buckets.
    history : int
        L-BFGS-B's memory.

    Returns
    -------
    int
    """
    size = n_features + 1
    driver = sum(length * np.dtype(dtype).itemsize for length, dtype in LBFGSB.shapes(size, history).values())
    return driver + 6 * 8 * size


@dataclass
class _Problem:
    """One value's run in :func:`minimize`: its L2 strength, weights (the result goes there), fixed scaling
    and L-BFGS-B, its counts, and its last evaluation (point, objective, gradient)."""

    l2: float
    x: np.ndarray
    scale: np.ndarray
    solver: LBFGSB
    iterations: int = 0
    evaluations: int = 0
    seconds: float = 0.0
    last: tuple | None = None

    def asks_again(self) -> bool:
        """Whether L-BFGS-B asks for the point of the last evaluation (in line searches of tiny steps); then
        its objective and gradient are put back, as minimize's cache of the last point does."""
        a = self.solver.arrays
        if self.last is None or not np.array_equal(a["u"], self.last[0]):
            return False
        a["f"][...] = self.last[1]
        a["g"][:] = self.last[2]
        return True


def _evaluate(log: InMemoryLog, code: int, problems: list[_Problem], scratch: np.ndarray) -> None:
    """Write each problem's objective and scaled gradient at its point, all from one pass over the rows
    (:func:`trainer.kernels.objectives_into`); ``scratch`` holds at least m x 2 len(problems) float64
    values."""
    m, k = log.cols.shape[0], len(problems)
    WG = scratch[: 2 * m * k].reshape(m, 2 * k)
    vs = [p.solver.arrays["u"] * p.scale for p in problems]
    for j, v in enumerate(vs):
        WG[:, j] = v[:m]
    loss_sums, r_sums = np.empty(k), np.empty(k)
    weight_sum = objectives_into(code, log.indptr, log.slot, log.data, log.labels, log.weights, WG,
                                 tuple(float(v[m]) for v in vs), loss_sums, r_sums)
    for j, (p, v) in enumerate(zip(problems, vs)):
        w, a = v[:m], p.solver.arrays
        g = a["g"]
        g[:m] = WG[:, k + j] * (1.0 / weight_sum)
        g[:m] += p.l2 * w
        g[m] = r_sums[j] / weight_sum
        g *= p.scale
        a["f"][...] = loss_sums[j] / weight_sum + 0.5 * p.l2 * dot(w, w)
        p.evaluations += 1
        p.last = (a["u"].copy(), a["f"].copy(), g.copy())


def _lockstep(log: InMemoryLog, code: int, problems: list[_Problem], iterations: int, halted,
              started: float) -> None:
    """Advance ``problems`` together until each has converged or reached its limits, one evaluation of
    all those waiting for one a round (:func:`_evaluate`); return early once ``halted()``, polled after
    every iteration, says so."""
    scratch = np.empty(2 * log.cols.shape[0] * len(problems))
    active, max_evaluations = problems, 2 * iterations + 20
    while active:
        asking = []
        for p in active:
            task = p.solver.call()
            while task == LBFGSB.NEW_POINT or (task == LBFGSB.EVALUATE and p.asks_again()):
                if task == LBFGSB.NEW_POINT:
                    p.iterations += 1
                    if halted():
                        return
                    if p.iterations >= iterations:
                        p.solver.halt(LBFGSB.MAX_ITERATIONS)
                    elif p.evaluations > max_evaluations:
                        p.solver.halt(LBFGSB.MAX_EVALUATIONS)
                task = p.solver.call()
            if task == LBFGSB.EVALUATE:
                asking.append(p)
            else:
                p.seconds = time.perf_counter() - started
        if asking:
            _evaluate(log, code, asking, scratch)
        active = asking


def groups(count: int, threads: int) -> list[slice]:
    """How :func:`minimize` splits ``count`` values over ``threads`` threads, each group advancing in
    lockstep on its own: min(count, threads) consecutive groups, their sizes differing by at most one
    (larger first).

    Parameters
    ----------
    count : int
        Values (>= 1).
    threads : int
        Threads (>= 1).

    Returns
    -------
    list of slice
    """
    n = min(count, threads)
    sizes = [count // n + (j < count % n) for j in range(n)]
    bounds = np.cumsum([0, *sizes]).tolist()
    return [slice(a, b) for a, b in zip(bounds[:-1], bounds[1:])]


def minimize(log: InMemoryLog, code: int, l2s, xs, *, history: int = 10,
             iterations: int = ITERATIONS_PER_PASS, stop=None) -> list[dict]:
    """Run L-BFGS-B iterations on the whole log for several L2 strengths at once.

    For each value, minimizes F(w, b) = sum_i c_i l(y_i, x_i.w + b) / sum_i c_i + (l2 / 2) ||w||^2 from its
    ``x``. The iterations move the log's buckets and the intercept; every other bucket is set to 0, its
    exact minimizer (the objective is (l2 / 2) w_j^2 there). They work on scaled variables u = x / s with
    s = D^(-1/2), D the Gauss-Newton diagonal of F at the start (the diagonal preconditioner of
    "Efficient BackProp", Neural Networks: Tricks of the Trade, Springer, 1998): bucket curvatures
    follow bucket frequencies over orders of magnitude, which an unscaled L-BFGS-B start (a multiple
    of the identity) ignores. On the regime matrix this took the holdout log-loss after one full-batch
    pass from 1.0339 to 1.0022 x LL* on rows of 155 entries (tags200) and to 1.0000 on every other
    log of 200k rows or more (``scripts/bench_regimes.py``).

    Each value's L-BFGS-B is ``scipy.optimize.minimize(method="L-BFGS-B")``'s with the options ``maxiter``
    = ``iterations``, ``maxcor`` = ``history``, ``ftol`` = ``FTOL``, ``gtol`` = ``GTOL``, ``maxfun`` =
    2 ``iterations`` + 20, driven through :class:`LBFGSB`; the values, in :func:`groups` of one thread
    each, advance in lockstep, and each round of a group computes the objectives and gradients of its
    values waiting for one in a single pass over the rows (:func:`trainer.kernels.objectives_into`,
    each value's sums in the order of one value alone), so a value's result does not depend on the
    others. A value leaves the lockstep when it converges or reaches its limits.

    Parameters
    ----------
    log : InMemoryLog
        The rows.
    code : int
        A loss code of :mod:`trainer.losses`.
    l2s : sequence of float
        The L2 strengths.
    xs : sequence of numpy.ndarray
        For each value, bucket weights then the intercept, float64; overwritten with its result.
    history : int, default 10
        L-BFGS-B's memory (``maxcor``).
    iterations : int, default ITERATIONS_PER_PASS
        Most iterations.
    stop : callable, optional
        Polled after every iteration of every value; returning True ends the pass early for all of them
        (then every ``x`` is left unchanged).

    Returns
    -------
    list of dict
        For each value: ``iterations``, ``evaluations``, ``objective``, ``converged``, ``stopped``,
        ``seconds`` (until it left the lockstep).

    References
    ----------
    "A Limited Memory Algorithm for Bound Constrained Optimization", SIAM Journal on Scientific
    Computing 16, 1995. "Algorithm 778: L-BFGS-B", ACM Transactions on Mathematical Software 23, 1997.
    """
    started = time.perf_counter()
    m = log.cols.shape[0]
    z = np.empty(log.n_rows, dtype=np.float64)
    problems = []
    for l2, x in zip(l2s, xs):
        v0 = np.append(x[log.cols], x[-1])
        scale = 1.0 / np.sqrt(np.maximum(_diagonal(log, code, l2, v0, z), 1e-12))
        solver = LBFGSB(m + 1, history, FTOL, GTOL)
        solver.arrays["u"][:] = v0 / scale
        problems.append(_Problem(l2, x, scale, solver))
    lock, stopped = threading.Lock(), threading.Event()

    def halted() -> bool:
        with lock:  # polled from the groups' threads; once True, True for all
            if not stopped.is_set() and stop is not None and stop():
                stopped.set()
            return stopped.is_set()

    parts = groups(len(problems), numba.get_num_threads())
    if len(parts) == 1:
        _lockstep(log, code, problems, iterations, halted, started)
    else:
        with ThreadPoolExecutor(len(parts)) as pool:
            runs = [pool.submit(_lockstep, log, code, problems[part], iterations, halted, started)
                    for part in parts]
            for run in runs:
                run.result()
    if stopped.is_set():
        return [_summary(q, iterations, time.perf_counter() - started, stopped=True) for q in problems]
    for p in problems:
        u = p.solver.arrays["u"]
        p.x[:] = 0.0
        p.x[log.cols] = u[:m] * p.scale[:m]
        p.x[-1] = u[m] * p.scale[m]
    return [_summary(p, iterations, p.seconds, stopped=False) for p in problems]


def _summary(p: _Problem, iterations: int, seconds: float, stopped: bool) -> dict:
    """The summary :func:`minimize` returns for one value (``iterations``: the limit)."""
    converged = p.solver.task == LBFGSB.CONVERGED and p.iterations < iterations
    return {"iterations": p.iterations, "evaluations": p.evaluations,
            "objective": float(p.solver.arrays["f"]),
            "converged": converged, "stopped": stopped, "seconds": seconds}
