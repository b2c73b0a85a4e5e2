"""Online limited-memory BFGS (oLBFGS), the default solver.

Methods: "A Stochastic Quasi-Newton Method for Online Convex Optimization" (AISTATS 2007) and
"Global Convergence of Online Limited Memory BFGS" (Journal of Machine Learning Research 16, 2015).

Each step, on one batch:

1. the stochastic gradient g of F at x_t = (w_t, b_t) (the intercept is coordinate n of x, not
   regularized);
2. the direction d = H_t g over the last ``history`` curvature pairs, with the coefficients of the
   two-loop recursion ("Updating Quasi-Newton Matrices with Limited Storage", Mathematics of
   Computation, 1980) taken from a small matrix of s_i.y_k products kept pair by pair (the
   vector-free form of "Large-scale L-BFGS using MapReduce", NeurIPS 2014): two dense passes over
   the stored steps per step, split in chunks over all cores
   (``trainer.solvers._olbfgs_kernels.lbfgs_direction``);
3. x_{t+1} = x_t - eps d, where eps starts at the schedule eps_t = step0 * t0 / (t0 + t) and is
   halved until the Armijo condition F_B(x - eps d) <= F_B(x) - armijo * eps * g.d holds on the
   batch objective F_B (backtracking line search of "Painless Stochastic Gradient: Interpolation,
   Line-Search, and Convergence Rates", NeurIPS 2019). The trials need only the margins
   z0 - eps * (X_B d + d_b) and, for the L2 term, w.d and d.d: no dense work per trial. A direction
   with no decrease within 30 halvings gives a null step; no finite trial point raises ``Diverged``;
4. the pair s = x_{t+1} - x_t, y = grad f(x_{t+1}; batch) - grad f(x_t; batch), measured on the SAME
   batch. Since y = X^T (r_1 - r_0) / C + l2 * s, only the data part (the batch's buckets and the
   intercept) is stored; the l2 * s part is rebuilt from s inside the dense passes. Pairs whose s.y is
   not safely positive are skipped.

Initial matrix: diagonal, H0_jj = 1 / (D_j + l2 + P * D_b / R), where D is a running, then
exponentially averaged (over about ``curvature_window`` steps) estimate of the batch Gauss-Newton
diagonal sum_i c_i l''_i x_ij^2 / C (the diagonal Gauss-Newton preconditioner of "Efficient
BackProp", Neural Networks: Tricks of the Trade, Springer, 1998), D_b its intercept entry (the mean row
curvature) and R the number of rows seen before this batch. D and R are taken before the current
batch is folded in, so H_t does not depend on the batch it is applied to (the independence the JMLR 2015
analysis assumes); the first step uses its own batch. The last term is a damping worth P =
``damping_rows(k)`` extra rows of average curvature for every bucket (``prior_rows``, more for rows of
k > ``prior_entries`` entries on average over the rows seen): it keeps the first sightings of a rare
bucket from taking a huge step, and fades as 1/R, so the fixed point is unchanged.

Choices, measured with ``scripts/bench_solvers.py`` (synthetic hashed logs: 1M training rows, 200k
holdout rows, 20 Zipf fields with 3..1e5 values, 2^18 buckets, base rate 5%, batch 4096; the figure is
the holdout log-loss gap to the full-batch optimum after one pass):

* diagonal rather than the scalar gamma I of the AISTATS 2007 method (gamma = mean of s.y / y.y over
  the stored pairs), because a bucket's curvature is proportional to its frequency: at l2 = 1e-5 the
  scalar version (removed) reached +3.1% .. +4.6% over a grid of step0 in [0.5, 2] and t0 in [1, 30],
  the diagonal one +0.3% .. +0.5%;
* the damping: without it, l2 = 1e-6 gave +0.8% .. +29% depending on step0 and t0 (rare buckets
  overshoot); with it, -1.7% (one pass regularizes more than that weak l2 does);
* the line search (added for time-ordered logs: without shuffling, the shipped demo gave holdout
  log-loss 11.8 / 5.1 / 12.9 over three passes; with it 0.1860 / 0.1605 / 0.1588 at l2 = 1e-4,
  LL* = 0.1575), and step0 = 0.3, t0 = 20 chosen on that demo among step0 in {0.2, 0.3, 0.5, 1},
  t0 in {10, 20, 100, 1000};
* float32 storage of the steps s (``pair_dtype``): halves the memory traffic of the dense
  passes, which read every stored s twice per step; the passes also compute in that precision
  (direction d held in float32, weights kept in float64): the two passes took 5.8 -> 4.3 ms per step
  on the benchmark of ``scripts/bench_train.py``, with the same holdout log-loss to 5 digits after
  each of three passes;
* earlier notes without the line search: step0 = 0.2, t0 = 10: with F one-hot fields per row the diagonal preconditioner overestimates the
  safe step about F-fold along the direction shared by all fields, so step0 >= 0.5 overshoots in the
  first steps (+5% or worse), and a slower decay (step0 * t0 >= 3) keeps too much noise at the end of
  the first pass (> +1%).

For small dense problems run for many passes, a longer horizon (for example step0 = 1, t0 = 100)
converges faster.

Defaults chosen on the regime matrix of ``scripts/bench_regimes.py`` (logs of many shapes, each
against its own full-batch optimum; the table is in the README, section Performance). The solver is
one part of the default; the training loop adds three (``trainer.training``): the model of an online
pass is the polynomial-decay average of the pass's iterates (eta = 3), the batches grow with the
rows seen (1/32 of them, from ``--batch-rows`` to 16 times it), and a log whose hashed rows fit
``--full-batch-memory`` is finished with full-batch L-BFGS-B passes (``trainer.solvers.full_batch``).
Measured for one online pass, holdout log-loss over LL*:

* the damping's worth in rows, 5.5 / sqrt(l2) x max(1, k / 20) for rows of k entries on average
  (:meth:`OnlineLBFGS.damping_rows`; 550 rows at l2 1e-4, 1,739 at 1e-5, 5,500 at 1e-6; it was a
  fixed 100 rows, then 0.05 / l2). Measured with the growing batches and the polynomial-decay average
  (one pass, holdout log-loss over LL*), c / sqrt(l2) rows for c = 3.5 / 4.5 / 5 / 5.5 / 6 / 6.5,
  against 0.05 / l2: drift12 shuffled (l2 1e-5) 0.9990 / 0.9995 / 0.9997 / 0.9999 / 1.0001 / 1.0003
  against 1.0024 (the tool's AdaGrad: 1.0001); the same rows in time order 1.0031 / 1.0011 / 1.0033 /
  1.0005 / 1.0011 / 1.0005 against 1.0023; rare positives (1e-5) 0.9985 / 0.9993 / 0.9998 / 1.0002 /
  1.0006 / 1.0008 against 0.9987; tags200 (1e-4, 155 entries) - / 1.0074 / 1.0005 / 0.9992 / 1.0019
  / 0.9995 against 1.0005; the demo (1e-4, time order) - / 1.0335 / 1.0284 / 1.0256 / 1.0235 /
  1.0219 against 1.0284; at c = 5.5 the 20-field benchmark 1.0042 (1e-4, unchanged), 0.9855 (1e-5,
  against 0.9901), 0.8191 (1e-6, against 0.8269), ordinal80 1.0037 against 1.0039. Weaker l2 wants
  less damping than 1 / l2 rows gives (the drift logs, the benchmark at 1e-5 and 1e-6), rows of many
  entries want more (tags200: c >= 5); c = 5.5 is the middle of the range where both hold and the
  shuffled drift log beats AdaGrad. The earlier grid, at fixed 4,096-row batches (the pass averaged
  over its last 3/4), for 0.25 / 0.5 / 1 / 2 / 5 x 0.05 / l2 rows: on rows of 155 entries (tags200,
  l2 1e-4) 1.1958 / 1.1683 / 1.0682 / 1.0213 / 1.0011 at 0.5 .. 10 x, i.e. 250 .. 5000 rows; on 80
  dense ordinal columns (ordinal80) 1.0029 / 1.0030 / 1.0026 / 1.0017 / 1.0055 over the same rows; on
  the 20-field benchmark at l2 1e-4 (21 entries) 1.0035 / 1.0041 / 1.0069 / 1.0110 / 1.0152; on the
  time-ordered drift12 log at l2 1e-5 (13 entries) 2500 .. 50000 rows gave 1.0096 / 1.0050 / 1.0058 /
  1.0159 / 1.0532, shuffled 1.0011 / 1.0031 / 1.0051 / 1.0070 / 1.0090; on rare positives (l2 1e-5)
  1.0097 / 1.0097 / 1.0113 / 1.0122 / 1.0171. The more entries a row has, the more of them move
  together (the Gauss-Newton diagonal misses their shared curvature by up to k-fold). Damping in
  proportion to k alone (0.0025 k / l2 rows) took the time-ordered drift log to 1.0101 there, hence
  the floor at k = 20;
* the average, at fixed 4,096-row batches with the damping of then (0.05 / l2 x max(1, k / 20)): last
  iterate / uniform average over the pass's last 3/4 / polynomial-decay average (eta = 3) gave 1.0148 /
  1.0042 / 1.0040 (benchmark, l2 1e-4), 0.9882 / 0.9924 / 0.9889 (l2 1e-5, where the optimum itself
  over-fits, so one damped pass can beat it), 0.9997 / 1.0050 / 1.0025 (drift, time order), 1.0011 /
  1.0031 / 1.0014 (drift, shuffled), 1.0437 / 1.0016 / 1.0030 (ordinal80), 1.0503 / 1.0241 / 1.0298
  (the shipped demo, time order), 0.9932 / 1.0097 / 0.9968 (rare positives), 1.0541 / 0.9980 / 1.0009
  (tags200): the polynomial average has the smallest worst case (1.0040 against 1.0097 for the uniform
  one). eta = 8 was better on rare positives and shuffled logs and worse on ordinal80 and the demo
  (1.0054, 1.0427). Going on from the last iterate rather than the average (measured with the uniform
  average, old damping) gave 1.0014 / 1.0011 after passes 2 / 3 of online steps, restarting from the
  average 1.0023 / 1.0021;
* not taken: t0 50 (with the rule and the polynomial average: tags200 1.0174, the demo 1.0665);
  choosing between the last iterate and the average by their progressive loss over the pass's last
  quarter (right on 7 of 8 logs, but on the time-ordered demo it picked the last iterate, 1.0503);
  step0 0.6 (last iterate 1.0884, average 1.0041), t0 100 (1.1572, 1.0036), step0 0.1 on the drift
  log (0.2137 raw against 0.1546): all with the earlier damping. With the growing batches and the
  damping of then (0.05 / l2), on drift12 shuffled / time-ordered (eta 3: 1.0024 / 1.0023): eta 1 / 2
  / 5 / 8 gave 1.0038 / 1.0031, 1.0028 / 1.0025, 1.0020 / 1.0023, 1.0017 / 1.0023; step0 0.2 1.0045 /
  1.0164, 0.5 1.0018 / 1.0083; t0 10 1.0037 / 1.0049, 40 1.0018 / 1.0010: each smaller than the
  damping's change above.
"""

from __future__ import annotations

import math
import time

import numpy as np

from trainer.errors import UserError
from trainer.kernels import dot, margins_into, scatter_compact
from trainer.options import check_choice, check_float, check_int
from trainer.solvers import BatchGradient, LinearSolver, schedule
from trainer.solvers._olbfgs_kernels import (CHUNK, chunk_pointers, commit_step, fold_diagonal, lbfgs_direction,
                                             line_loss, line_residuals, pair_products, record_pair)


def default_prior_rows(l2: float) -> float:
    """The damping's default worth in rows for rows of up to ``prior_entries`` entries, 5.5 / sqrt(l2).

    550 rows at l2 = 1e-4, 1,739 at 1e-5, 5,500 at 1e-6; at most 1e6; chosen on the regime matrix of
    ``scripts/bench_regimes.py`` (module docstring). :meth:`OnlineLBFGS.damping_rows` scales it with
    the entries a row.

    Parameters
    ----------
    l2 : float
        The L2 strength.

    Returns
    -------
    float
        min(5.5 / sqrt(l2), 1e6), or 1e6 without L2.
    """
    return min(5.5 / math.sqrt(l2), 1e6) if l2 > 0 else 1e6


class OnlineLBFGS(LinearSolver):
    """Online L-BFGS with a damped Gauss-Newton diagonal initial matrix (see the module docstring).

    ``seconds`` accumulates the wall time of each phase (gradient, direction, line_search, update) and,
    across the direction and the update, of the dense passes alone (dense: the direction's two passes
    and the weight update); it is not part of state(). Memory: (history + 1) * (n_features + 1) float32
    values (the stored steps and the direction), 2 * (n_features + 1) float64 values (weights and
    curvature diagonal; one more during the first step) and the sparse gradient differences of the
    stored pairs.

    Parameters
    ----------
    n_features : int
        Number of buckets, 1..2^30.
    loss : {"logistic", "squared-hinge"}
        The data loss.
    l2 : float
        The per-row-average L2 strength, in [0, 1e6].
    history : int, default 10
        Pairs kept, 1..100.
    step0 : float, optional
        eps_0 in (0, inf), default 0.3.
    t0 : float, default 20
        Decay horizon in steps, (0, 1e12].
    curvature_window : float, default 100
        Steps, [1, 1e12].
    prior_rows : float, optional
        Damping in rows of average curvature, [0, 1e12]; default :func:`default_prior_rows` of l2.
    prior_entries : float, default 20
        Rows with more entries than this on average get proportionally more damping (see
        :meth:`damping_rows`), [0, 1e12]; 0 keeps the damping at ``prior_rows``.
    armijo : float, default 0.1
        Sufficient-decrease constant, (0, 0.5].
    pair_dtype : {"float32", "float64"}
        Storage of the curvature steps, default "float32".

    Raises
    ------
    UserError
        Naming the option for a value out of range.

    References
    ----------
    "A Stochastic Quasi-Newton Method for Online Convex Optimization", AISTATS, 2007.
    "Global Convergence of Online Limited Memory BFGS", Journal of Machine Learning Research 16, 2015.
    """

    method = "olbfgs"
    OPTIONS = ("t0", "curvature_window", "prior_rows", "prior_entries", "armijo", "pair_dtype")
    MAX_BACKTRACKS = 30

    def __init__(self, n_features: int, loss: str, l2: float, *, history: int = 10,
                 step0: float | None = None, t0: float = 20.0, curvature_window: float = 100.0,
                 prior_rows: float | None = None, prior_entries: float = 20.0, armijo: float = 0.1,
                 pair_dtype: str = "float32"):
        super().__init__(n_features, loss, l2)
        self.history = check_int("--history", history, 1, 100)
        self.step0 = check_float("--step0", 0.3 if step0 is None else step0, 0.0, lo_open=True)
        self.t0 = check_float("t0", t0, 0.0, 1e12, lo_open=True)
        self.curvature_window = check_float("curvature_window", curvature_window, 1.0, 1e12)
        self.prior_rows = check_float("prior_rows", default_prior_rows(self.l2) if prior_rows is None else prior_rows,
                                      0.0, 1e12)
        self.prior_entries = check_float("prior_entries", prior_entries, 0.0, 1e12)
        self.armijo = check_float("armijo", armijo, 0.0, 0.5, lo_open=True)
        self.pair_dtype = check_choice("pair_dtype", pair_dtype, ("float32", "float64"))
        self.seconds = {"gradient": 0.0, "direction": 0.0, "line_search": 0.0, "update": 0.0, "dense": 0.0}
        size = self.n + 1
        self._S = np.zeros((self.history, size), dtype=np.dtype(self.pair_dtype))
        self._rho = np.zeros(self.history, dtype=np.float64)
        self._y_idx = np.zeros((self.history, 0), dtype=np.int32)  # sparse y parts, one padded row per slot
        self._y_val = np.zeros((self.history, 0), dtype=np.float64)
        self._y_len = np.zeros(self.history, dtype=np.int64)
        self._y_chunk = np.zeros((self.history, (size + CHUNK - 1) // CHUNK + 1), dtype=np.int64)
        self._G = np.zeros((self.history, self.history), dtype=np.float64)
        self._z = np.zeros(self.history, dtype=np.float64)
        self._count = 0
        self._head = 0
        self._rows = 0
        self._entries = 0
        self._diag = np.zeros(size, dtype=np.float64)
        self._diag_scale = 1.0
        self._q = np.empty(size, dtype=np.dtype(self.pair_dtype))

    @classmethod
    def dense_bytes(cls, n_features: int, history: int = 10) -> int:
        """Bytes of the arrays that grow with the buckets, at the default float32 ``pair_dtype``.

        The stored steps and the direction ((history + 1) x (n_features + 1) float32 values), the
        weights and the curvature diagonal (2 x (n_features + 1) float64) and the bitmap of a batch's
        buckets. Not counted: the sparse parts of the pairs (at most ``history`` x a batch's distinct
        buckets) and the diagonal's copy during the first step.

        Parameters
        ----------
        n_features : int
            Number of buckets.
        history : int, default 10
            Pairs kept.

        Returns
        -------
        int
        """
        return super().dense_bytes(n_features) + (4 * (history + 1) + 8) * (n_features + 1)

    def _first_curvature(self) -> bool:
        """Whether :meth:`first_gradient` takes the curvature: every step takes the batch's curvature."""
        return True

    def step(self, batch, first: BatchGradient | None = None) -> float:
        """One oLBFGS update from a batch.

        Parameters
        ----------
        batch : trainer.reader.stream.Batch
            The minibatch.
        first : BatchGradient, optional
            :meth:`first_gradient` of this batch at the current weights, computed beforehand.

        Returns
        -------
        float
            The weighted mean data loss before the update (progressive validation).

        Raises
        ------
        Diverged
            (state unchanged) When the loss, a gradient, the direction or every trial point of the line
            search is non-finite.
        ValueError
            For an empty batch or a bucket id out of range.

        References
        ----------
        "A Stochastic Quasi-Newton Method for Online Convex Optimization", AISTATS, 2007.
        "Global Convergence of Online Limited Memory BFGS", Journal of Machine Learning Research 16, 2015.
        """
        clock = time.perf_counter
        started = clock()
        n = self.n
        g0 = self._begin(batch, first)
        gcols = np.append(g0.cols, np.int32(n))
        gvals = np.append(g0.gsp, g0.gb)
        gptr = chunk_pointers(gcols, n + 1)
        curv, hb = g0.curv, g0.hb
        beta = 1.0 - 1.0 / min(self.t + 1.0, self.curvature_window)
        rows = self._rows + batch.n_rows
        entries = self._entries + batch.indices.shape[0]
        if self.t == 0:
            diag = np.zeros_like(self._diag)
            scale = fold_diagonal(diag, 1.0, beta, g0.cols, curv, hb)
            seen, seen_entries = rows, entries
        else:
            diag, scale, seen, seen_entries = self._diag, self._diag_scale, self._rows, self._entries
        damp = self.damping_rows(seen_entries / seen) * scale * diag[n] / seen
        gradient_done = clock()

        q = self._q
        order = self._order()
        m = order.shape[0]
        yptr, yidx, yval = self._pairs()
        xq, qq_reg, bound, p, yd, Sg = lbfgs_direction(self._x, gcols, gvals, gptr, self._S, order, m, self._rho,
                                                       self._G, self._z, yptr, yidx, yval, self._y_chunk, self.l2,
                                                       n, diag, scale, damp, q, self.seconds)
        if not math.isfinite(bound):
            self._diverged("the search direction")
        direction_done = clock()

        qc = q[gcols]
        u = np.empty(batch.n_rows, dtype=np.float64)
        margins_into(batch.indptr, g0.slot, batch.data, qc, float(qc[-1]), u)
        gq = dot(gvals, qc) + self.l2 * xq
        eps = self._line_search(batch, g0, u, xq, qq_reg, bound, gq)
        searched = clock()
        if eps == 0.0:
            self._fold(beta, g0.cols, curv, hb)
            self._finish(rows, entries, started, gradient_done, direction_done, searched, searched)
            return g0.loss
        r1 = np.empty(batch.n_rows, dtype=np.float64)
        line_residuals(self.code, batch.labels, batch.weights, g0.z, u, -eps, r1)
        dr = r1 - g0.r
        ysp = np.empty(gcols.shape[0], dtype=np.float64)
        scatter_compact(batch.indptr, g0.slot, batch.data, dr, 1.0 / g0.weight_sum, ysp[:-1])
        ysp[-1] = float(dr.sum()) / g0.weight_sum
        if not np.isfinite(ysp).all():
            self._diverged("the gradient at the new weights")
        sy, yy, ss = pair_products(qc, -eps, qq_reg, gcols, ysp, self.l2, n)
        paired = clock()

        k = self._head
        accept = yy > 0.0 and sy > 1e-10 * math.sqrt(ss * yy)
        committing = clock()
        commit_step(self._x, q, -eps, self._S[k], accept)
        self.seconds["dense"] += clock() - committing
        record_pair(order, m, k, accept, Sg, ysp, p, yd, -eps, self.l2, sy, xq, qq_reg, self._G, self._z)
        self._fold(beta, g0.cols, curv, hb)
        if accept:
            self._rho[k] = 1.0 / sy
            self._store_y(k, gcols, ysp, gptr)
            self._head = (k + 1) % self.history
            self._count = min(self._count + 1, self.history)
        self._finish(rows, entries, started, gradient_done, direction_done, paired, clock())
        return g0.loss

    def damping_rows(self, entries_per_row: float) -> float:
        """The damping's worth in rows for rows of this many entries on average.

        ``prior_rows`` x max(1, entries_per_row / ``prior_entries``): with k entries a row, the Gauss-Newton
        diagonal underestimates the curvature along directions that the k entries share by up to a
        factor k (Gershgorin's bound on the diagonally scaled matrix), so the first sightings of a row's
        rare buckets need holding back k-fold longer. Measured on the regime matrix (module docstring).

        Parameters
        ----------
        entries_per_row : float
            Mean entries a row in the rows seen so far.

        Returns
        -------
        float
            Rows of average curvature.

        References
        ----------
        "Über die Abgrenzung der Eigenwerte einer Matrix", Bulletin de l'Académie des Sciences de
        l'URSS, 1931.
        """
        if self.prior_entries <= 0.0:
            return self.prior_rows
        return self.prior_rows * max(1.0, entries_per_row / self.prior_entries)

    def _fold(self, beta: float, cols, curv, curv_last: float) -> None:
        """Fold this batch's Gauss-Newton diagonal into the running one (after the step used the old one)."""
        self._diag_scale = fold_diagonal(self._diag, self._diag_scale, beta, cols, curv, curv_last)

    def _line_search(self, batch, g0, u, xq: float, qq_reg: float, bound: float, gq: float) -> float:
        """Backtracking Armijo search on the batch objective along -q; returns the accepted step (0.0
        for a null step). The margins along the line are z0 - eps * u with u = X_B q + q_b, the L2 term
        changes by l2/2 (eps^2 q.q - 2 eps w.q): no dense work per trial.
        Raises ``Diverged`` when no trial point has a finite objective."""
        eps = schedule(self.step0, self.t0, self.t)
        if not (gq > 0.0 and math.isfinite(gq)):
            return 0.0
        finite = False
        for _ in range(self.MAX_BACKTRACKS + 1):
            if bound * max(eps, 1.0) < 1e300:
                total = line_loss(self.code, batch.labels, batch.weights, g0.z, u, -eps)
                f = total / g0.weight_sum + 0.5 * self.l2 * eps * (eps * qq_reg - 2.0 * xq)
                if math.isfinite(f):
                    finite = True
                    if f <= g0.loss - self.armijo * eps * gq:
                        return eps
            eps *= 0.5
        if not finite:
            self._diverged("the objective at every trial step")
        return 0.0

    def _finish(self, rows, entries, started, gradient_done, direction_done, searched, done) -> None:
        """Count the step and add its phase times to ``seconds`` (sparse gradient and curvature
        work, the dense passes of the direction, the line search with the new curvature pair, the
        dense weight update)."""
        self.t += 1
        self._rows = rows
        self._entries = entries
        sec = self.seconds
        sec["gradient"] += gradient_done - started
        sec["direction"] += direction_done - gradient_done
        sec["line_search"] += searched - direction_done
        sec["update"] += done - searched

    def _order(self) -> np.ndarray:
        """Ring-buffer slots of the stored pairs, oldest first."""
        m = self._count
        start = (self._head - m) % self.history
        return (start + np.arange(m, dtype=np.int64)) % self.history

    def _pairs(self):
        """Sparse data parts of y for every slot without copying: (start of each slot's entries,
        indices, values); slot k's entries are counted by its chunk pointers ``_y_chunk[k]``."""
        width = self._y_idx.shape[1]
        return np.arange(self.history, dtype=np.int64) * width, self._y_idx.ravel(), self._y_val.ravel()

    def _store_y(self, k: int, idx, val, chunks) -> None:
        """Keep the sparse part of slot k's y (ascending ``idx``, ``val``, chunk pointers ``chunks``);
        the padded rows widen, in steps of 4096 entries, when a pair has more entries than they hold."""
        length = idx.shape[0]
        if length > self._y_idx.shape[1]:
            extra = ((0, 0), (0, -(-length // 4096) * 4096 - self._y_idx.shape[1]))
            self._y_idx = np.pad(self._y_idx, extra)
            self._y_val = np.pad(self._y_val, extra)
        self._y_idx[k, :length] = idx
        self._y_val[k, :length] = val
        self._y_len[k] = length
        self._y_chunk[k] = chunks

    def _options(self) -> dict:
        return {"history": self.history, "step0": self.step0, "t0": self.t0,
                "curvature_window": self.curvature_window, "prior_rows": self.prior_rows,
                "prior_entries": self.prior_entries,
                "armijo": self.armijo, "pair_dtype": self.pair_dtype}

    def _extra_state(self) -> dict:
        yptr = np.zeros(self.history + 1, dtype=np.int64)
        np.cumsum(self._y_len, out=yptr[1:])
        yidx = np.concatenate([self._y_idx[k, :self._y_len[k]] for k in range(self.history)])
        yval = np.concatenate([self._y_val[k, :self._y_len[k]] for k in range(self.history)])
        return {"S": self._S, "rho": self._rho, "y_indptr": yptr, "y_index": yidx,
                "y_value": yval, "gram": self._G, "s_dot_w": self._z, "count": self._count,
                "head": self._head, "rows": self._rows, "entries": self._entries, "diag": self._diag,
                "diag_scale": self._diag_scale}

    def _load_extra(self, state: dict) -> None:
        S = np.asarray(state["S"])
        if S.shape != self._S.shape:
            raise UserError(f"checkpoint curvature memory has shape {S.shape}; expected {self._S.shape}")
        self._S[:] = S
        self._rho[:] = state["rho"]
        yptr = np.asarray(state["y_indptr"], dtype=np.int64)
        yidx = np.asarray(state["y_index"], dtype=np.int32)
        yval = np.asarray(state["y_value"], dtype=np.float64)
        for k in range(self.history):
            idx = yidx[yptr[k]:yptr[k + 1]]
            self._store_y(k, idx, yval[yptr[k]:yptr[k + 1]], chunk_pointers(idx, self.n + 1))
        self._count = int(state["count"])
        self._head = int(state["head"])
        self._G[:] = state["gram"]
        self._z[:] = state["s_dot_w"]
        self._rows = int(state["rows"])
        self._entries = int(state["entries"])
        self._diag[:] = state["diag"]
        self._diag_scale = float(state["diag_scale"])
