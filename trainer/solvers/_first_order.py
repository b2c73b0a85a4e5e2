"""The step loop that SGD and AdaGrad share, and its kernels.

Both methods update only the batch's buckets and the intercept from the batch gradient, plus a
dense shrink of every bucket weight for the L2 term; they differ in the per-coordinate rule
(``RULE_SGD``, ``RULE_ADAGRAD``). A step first computes the candidate values and checks that they
are finite, and only then commits them, so a diverging step leaves the state unchanged.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from trainer.solvers import BatchGradient, LinearSolver

RULE_SGD = 0
RULE_ADAGRAD = 1
_NO_ACCUMULATORS = np.zeros(0, dtype=np.float64)


@njit(cache=True, nogil=True)
def step_candidate(rule, x, acc, n, step, lam, delta, cols, gsp, gb, new_x, new_acc):
    """Candidate values of one first-order step, before committing.

    ``RULE_SGD``: x_j - step (g_j + lam x_j) = (1 - step lam) x_j - step g_j; ``acc`` is not read.
    ``RULE_ADAGRAD``: with G_j the running sum of squared data gradients and H_j = delta + sqrt(G_j),
    w_j <- (H_j w_j - step g_j) / (H_j + step lam), the closed form of the composite mirror-descent
    step with the L2 term. The intercept (index n) is not regularized.

    Parameters
    ----------
    rule : int
        ``RULE_SGD`` or ``RULE_ADAGRAD``.
    x : numpy.ndarray
        float64 weights, n buckets then the intercept.
    acc : numpy.ndarray
        AdaGrad's running sums of squared gradients (length n + 1), or empty for SGD.
    n : int
        Number of buckets.
    step : float
        The step size (SGD's eps_t, AdaGrad's eta).
    lam : float
        The L2 strength.
    delta : float
        AdaGrad's offset of sqrt(G_j).
    cols, gsp : numpy.ndarray
        The batch's distinct buckets and their data gradients.
    gb : float
        The intercept's data gradient.
    new_x, new_acc : numpy.ndarray
        Outputs (length len(cols) + 1): the new values of ``cols`` then of the intercept.

    Returns
    -------
    bool
        True when every new value is finite.

    References
    ----------
    "A Stochastic Approximation Method", Annals of Mathematical Statistics, 1951.
    "Adaptive Subgradient Methods for Online Learning and Stochastic Optimization", Journal of
    Machine Learning Research, 2011.
    """
    m = cols.shape[0]
    ok = True
    if rule == RULE_SGD:
        ok = np.isfinite(1.0 - step * lam)
    for p in range(m + 1):
        if p < m:
            j = cols[p]
            g = gsp[p]
            reg = lam
        else:
            j = n
            g = gb
            reg = 0.0
        if rule == RULE_SGD:
            v = (1.0 - step * reg) * x[j] - step * g
        else:
            a = acc[j] + g * g
            hj = delta + np.sqrt(a)
            v = (hj * x[j] - step * g) / (hj + step * reg)
            new_acc[p] = a
            if not np.isfinite(a):
                ok = False
        new_x[p] = v
        if not np.isfinite(v):
            ok = False
    return ok


@njit(cache=True, nogil=True)
def step_commit(rule, x, acc, n, step, lam, delta, cols, new_x, new_acc):
    """Apply a checked :func:`step_candidate`.

    Shrinks every bucket weight for the L2 term (SGD by 1 - step lam; AdaGrad by H_j / (H_j + step lam)),
    then sets the batch's values and the intercept (and AdaGrad's sums), in place.

    Parameters
    ----------
    rule, x, acc, n, step, lam, delta, cols : see :func:`step_candidate`
        The same values the candidate was computed with.
    new_x, new_acc : numpy.ndarray
        The candidate's outputs.
    """
    if rule == RULE_SGD:
        shrink = 1.0 - step * lam
        if shrink != 1.0:
            for j in range(n):
                x[j] *= shrink
    elif lam > 0.0:
        for j in range(n):
            hj = delta + np.sqrt(acc[j])
            x[j] *= hj / (hj + step * lam)
    m = cols.shape[0]
    for p in range(m):
        x[cols[p]] = new_x[p]
    x[n] = new_x[m]
    if rule == RULE_ADAGRAD:
        for p in range(m):
            acc[cols[p]] = new_acc[p]
        acc[n] = new_acc[m]


class FirstOrderSolver(LinearSolver):
    """A solver whose step is :func:`step_candidate` then :func:`step_commit` with its ``rule``.

    Subclasses give ``rule``, ``_step_size()`` (the step of the coming update) and, with accumulators,
    ``_accumulators()`` and ``delta``. Constructed as :class:`trainer.solvers.LinearSolver`.
    """

    rule = RULE_SGD
    delta = 0.0

    def _accumulators(self) -> np.ndarray:
        return _NO_ACCUMULATORS

    def step(self, batch, first: BatchGradient | None = None) -> float:
        """One update from a batch.

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
            (state unchanged) When the loss, gradient or new weights are non-finite.
        ValueError
            For an empty batch or a bucket id out of range.
        """
        g = self._begin(batch, first)
        step = self._step_size()
        acc = self._accumulators()
        m = g.cols.shape[0] + 1
        new_x = np.empty(m, dtype=np.float64)
        new_acc = np.empty(m if acc.size else 0, dtype=np.float64)
        if not step_candidate(self.rule, self._x, acc, self.n, step, self.l2, self.delta, g.cols, g.gsp, g.gb,
                              new_x, new_acc):
            self._diverged("the new weights")
        step_commit(self.rule, self._x, acc, self.n, step, self.l2, self.delta, g.cols, new_x, new_acc)
        self.t += 1
        return g.loss
