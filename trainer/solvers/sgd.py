"""Plain stochastic gradient descent, the baseline of the curvature-aware solvers.

Update x_{t+1} = x_t - eps_t g_t with g_t the batch gradient of F (data part plus l2 * w, intercept
unregularized) and eps_t = step0 * t0 / (t0 + t) ("A Stochastic Approximation Method", Annals of
Mathematical Statistics, 1951). Work per step: the batch's nonzeros plus one pass over the weights for
the l2 shrink.
"""

from __future__ import annotations

import numpy as np

from trainer.kernels import sgd_candidate, sgd_commit
from trainer.solvers import LinearSolver, check_float, schedule


class SGD(LinearSolver):
    """Stochastic gradient descent with a decaying step.

    Options: ``step0`` ((0, inf), default 10) and ``t0`` ((0, 1e12], default 100 steps), chosen on
    the hashed one-hot benchmark of ``scripts/bench_solvers.py``; data with large numeric values need
    a smaller ``step0``. Raises ``UserError`` naming the option for a value out of range.
    """

    method = "sgd"
    OPTIONS = ("t0",)

    def __init__(self, n_features: int, loss: str, l2: float, *, step0: float | None = None,
                 t0: float = 100.0):
        super().__init__(n_features, loss, l2)
        self.step0 = check_float("--step0", 10.0 if step0 is None else step0, 0.0, lo_open=True)
        self.t0 = check_float("t0", t0, 0.0, 1e12, lo_open=True)

    def _options(self) -> dict:
        return {"step0": self.step0, "t0": self.t0}

    def step(self, batch) -> float:
        """One SGD update from ``batch``; returns the weighted mean data loss before the update.

        Raises ``Diverged`` (state unchanged) when the loss, gradient or new weights are non-finite,
        and ``ValueError`` for an empty batch or a bucket id out of range.
        """
        g = self._gradient(batch)
        eps = schedule(self.step0, self.t0, self.t)
        new_vals = np.empty(g.cols.shape[0] + 1, dtype=np.float64)
        if not sgd_candidate(self._x, self.n, eps, self.l2, g.cols, g.gsp, g.gb, new_vals):
            self._diverged("the new weights")
        sgd_commit(self._x, self.n, eps, self.l2, g.cols, new_vals)
        self.t += 1
        return g.loss
