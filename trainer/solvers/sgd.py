"""Plain stochastic gradient descent, the baseline of the curvature-aware solvers.

Update x_{t+1} = x_t - eps_t g_t with g_t the batch gradient of F (data part plus l2 * w, intercept
unregularized) and eps_t = step0 * t0 / (t0 + t) ("A Stochastic Approximation Method", Annals of
Mathematical Statistics, 1951). Work per step: the batch's nonzeros plus one pass over the weights for
the l2 shrink.
"""

from __future__ import annotations

from trainer.options import check_float
from trainer.solvers import schedule
from trainer.solvers._first_order import RULE_SGD, FirstOrderSolver


class SGD(FirstOrderSolver):
    """Stochastic gradient descent with a decaying step.

    The defaults of ``step0`` and ``t0`` were chosen on the hashed one-hot benchmark of
    ``scripts/bench_solvers.py``.

    Parameters
    ----------
    n_features : int
        Number of buckets, 1..2^30.
    loss : {"logistic", "squared-hinge"}
        The data loss.
    l2 : float
        The per-row-average L2 strength, in [0, 1e6].
    step0 : float, optional
        eps_0 in (0, inf), default 10; data with large numeric values need a smaller one.
    t0 : float, default 100
        Decay horizon in steps, (0, 1e12].

    Raises
    ------
    UserError
        Naming the option for a value out of range.

    References
    ----------
    "A Stochastic Approximation Method", Annals of Mathematical Statistics, 1951.
    """

    method = "sgd"
    OPTIONS = ("t0",)
    rule = RULE_SGD

    def __init__(self, n_features: int, loss: str, l2: float, *, step0: float | None = None,
                 t0: float = 100.0):
        super().__init__(n_features, loss, l2)
        self.step0 = check_float("--step0", 10.0 if step0 is None else step0, 0.0, lo_open=True)
        self.t0 = check_float("t0", t0, 0.0, 1e12, lo_open=True)

    def _options(self) -> dict:
        return {"step0": self.step0, "t0": self.t0}

    def _step_size(self) -> float:
        return schedule(self.step0, self.t0, self.t)
