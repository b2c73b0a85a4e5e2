"""Diagonal AdaGrad with the L2 term handled in closed form.

Method: "Adaptive Subgradient Methods for Online Learning and Stochastic Optimization" (Journal of
Machine Learning Research 12, 2011), diagonal composite mirror descent: with G_j the running sum of
squared data gradients of coordinate j and H_j = delta + sqrt(G_j),

    w_j <- argmin_w  eta g_j w + eta (l2 / 2) w^2 + (H_j / 2) (w - w_j)^2
         = (H_j w_j - eta g_j) / (H_j + eta l2),

the intercept being the same update without the l2 term.
"""

from __future__ import annotations

import numpy as np

from trainer.options import check_float
from trainer.solvers._first_order import RULE_ADAGRAD, FirstOrderSolver


class AdaGrad(FirstOrderSolver):
    """Diagonal AdaGrad (composite mirror descent form).

    Parameters
    ----------
    n_features : int
        Number of buckets, 1..2^30.
    loss : {"logistic", "squared-hinge"}
        The data loss.
    l2 : float
        The per-row-average L2 strength, in [0, 1e6].
    step0 : float, optional
        eta in (0, inf), default 0.2, constant; chosen on the benchmark of ``scripts/bench_solvers.py``.
    delta : float, default 1e-6
        In (0, 1e6], added to sqrt(G_j) so unseen coordinates stay finite.

    Raises
    ------
    UserError
        Naming the option for a value out of range.

    References
    ----------
    "Adaptive Subgradient Methods for Online Learning and Stochastic Optimization", Journal of Machine
    Learning Research 12, 2011.
    """

    method = "adagrad"
    OPTIONS = ("delta",)
    rule = RULE_ADAGRAD

    def __init__(self, n_features: int, loss: str, l2: float, *, step0: float | None = None,
                 delta: float = 1e-6):
        super().__init__(n_features, loss, l2)
        self.step0 = check_float("--step0", 0.2 if step0 is None else step0, 0.0, lo_open=True)
        self.delta = check_float("delta", delta, 0.0, 1e6, lo_open=True)
        self._acc = np.zeros(self.n + 1, dtype=np.float64)

    @classmethod
    def dense_bytes(cls, n_features: int, history: int = 10) -> int:
        """Bytes of the weights, the bitmap of a batch's buckets and the float64 sums of squared
        gradients (n_features + 1 values); ``history`` is not read.

        Parameters
        ----------
        n_features : int
            Number of buckets.
        history : int, default 10
            Unused (no curvature memory).

        Returns
        -------
        int
        """
        return super().dense_bytes(n_features) + 8 * (n_features + 1)

    def _options(self) -> dict:
        return {"step0": self.step0, "delta": self.delta}

    def _step_size(self) -> float:
        return self.step0

    def _accumulators(self) -> np.ndarray:
        return self._acc

    def _extra_state(self) -> dict:
        return {"accumulators": self._acc}

    def _load_extra(self, state: dict) -> None:
        self._acc[:] = state["accumulators"]
