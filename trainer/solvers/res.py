"""RES: regularized stochastic BFGS with a dense Hessian approximation (small problems only).

Method: "RES: Regularized Stochastic BFGS Algorithm" (IEEE Transactions on Signal Processing, 2014).
With x = (w, b) (intercept last, unregularized), B_t the dense Hessian approximation and g the batch
gradient of F at x_t:

    x_{t+1} = x_t - eps_t (B_t^{-1} + Gamma I) g,            eps_t = step0 * t0 / (t0 + t)
    s = x_{t+1} - x_t,   y = grad f(x_{t+1}; batch) - grad f(x_t; batch)   (same batch)
    y~ = y - delta s
    B_{t+1} = B_t + y~ y~^T / (s.y~) - B_t s s^T B_t / (s^T B_t s) + delta I

The update is skipped (B kept) when s.y~ is not safely positive. B_0 = diag(h) + (h_b + delta) I + l2
on the bucket coordinates, with h the Gauss-Newton diagonal of the first batch and h_b its mean row
curvature (a scaled diagonal start, common practice). Each step factors B_t (Cholesky, O(n^3)), so the
method refuses more than :data:`MAX_FEATURES` buckets.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.linalg
import scipy.linalg.blas

from trainer.errors import UserError
from trainer.kernels import margins_into, regularized_gradient, residuals_into, scatter_compact
from trainer.options import check_float
from trainer.solvers import BatchGradient, LinearSolver, schedule

MAX_FEATURES = 4096


class RES(LinearSolver):
    """Regularized stochastic BFGS (see the module docstring).

    Parameters
    ----------
    n_features : int
        Number of buckets, 1..2^30.
    loss : {"logistic", "squared-hinge"}
        The data loss.
    l2 : float
        The per-row-average L2 strength, in [0, 1e6].
    step0 : float, optional
        eps_0 in (0, inf), default 0.5.
    t0 : float, default 10
        Decay horizon in steps, (0, 1e12].
    delta : float, default 1e-4
        In (0, inf): the curvature regularization of y~ and the added delta I.
    gamma : float, default 1e-4
        In [0, 1e6]: the Gamma I added to B^{-1} in the direction.

    Raises
    ------
    UserError
        When n_features exceeds :data:`MAX_FEATURES` (pointing to ``--solver olbfgs``) or an option is
        out of range.

    References
    ----------
    "RES: Regularized Stochastic BFGS Algorithm", IEEE Transactions on Signal Processing, 2014.
    """

    method = "res"
    OPTIONS = ("t0", "delta", "gamma")

    def __init__(self, n_features: int, loss: str, l2: float, *, step0: float | None = None,
                 t0: float = 10.0, delta: float = 1e-4, gamma: float = 1e-4):
        if isinstance(n_features, (int, np.integer)) and n_features > MAX_FEATURES:
            raise UserError(f"--solver res keeps a dense matrix and accepts at most {MAX_FEATURES} buckets "
                            f"(--bits <= 12); got {n_features}; use --solver olbfgs for larger models")
        super().__init__(n_features, loss, l2)
        self.step0 = check_float("--step0", 0.5 if step0 is None else step0, 0.0, lo_open=True)
        self.t0 = check_float("t0", t0, 0.0, 1e12, lo_open=True)
        self.delta = check_float("delta", delta, 0.0, 1e6, lo_open=True)
        self.gamma = check_float("gamma", gamma, 0.0, 1e6)
        # always Fortran order: one memory layout means one BLAS code path, hence bit-exact resumes
        self._B = np.zeros((self.n + 1, self.n + 1), dtype=np.float64, order="F")
        self._started = False

    @classmethod
    def dense_bytes(cls, n_features: int, history: int = 10) -> int:
        """Bytes of the weights, the bitmap of a batch's buckets and the dense float64 matrix B
        ((n_features + 1)^2 values); ``history`` is not read.

        Parameters
        ----------
        n_features : int
            Number of buckets.
        history : int, default 10
            Unused (B replaces a curvature memory).

        Returns
        -------
        int
        """
        return super().dense_bytes(n_features) + 8 * (n_features + 1) ** 2

    def _options(self) -> dict:
        return {"step0": self.step0, "t0": self.t0, "delta": self.delta, "gamma": self.gamma}

    def _initial_matrix(self, g0) -> np.ndarray:
        n = self.n
        diag = np.full(n + 1, g0.hb + self.delta)
        diag[:n] += self.l2
        diag[g0.cols] += g0.curv
        diag[n] += g0.hb
        return np.asfortranarray(np.diag(diag))

    def _first_curvature(self) -> bool:
        """Whether :meth:`first_gradient` takes the curvature: the first step does (the initial matrix is
        the batch's curvature)."""
        return not self._started

    def step(self, batch, first: BatchGradient | None = None) -> float:
        """One RES update from a batch.

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
            (state unchanged) When the loss, a gradient, the new weights or the factorization of B are not
            finite/positive definite.
        ValueError
            For an empty batch or a bucket id out of range.
        """
        n = self.n
        g0 = self._begin(batch, first)
        g = np.empty(n + 1, dtype=np.float64)
        regularized_gradient(self._x[:n], self.l2, g0.cols, g0.gsp, g0.gb, g)
        B = self._B if self._started else self._initial_matrix(g0)
        try:
            factor = scipy.linalg.cho_factor(B, lower=True, check_finite=False)
        except np.linalg.LinAlgError:
            self._diverged("the Hessian approximation (not positive definite)")
        d = scipy.linalg.cho_solve(factor, g, check_finite=False) + self.gamma * g
        eps = -schedule(self.step0, self.t0, self.t)
        with np.errstate(over="ignore", invalid="ignore"):
            s = eps * d
            ok = bool(np.isfinite(s).all() and np.isfinite(self._x + s).all())
        if not ok:
            self._diverged("the new weights")
        z1 = np.empty(batch.n_rows, dtype=np.float64)
        margins_into(batch.indptr, g0.slot, batch.data, self._x[g0.cols] + s[g0.cols], self._x[n] + s[n], z1)
        r1 = np.empty(batch.n_rows, dtype=np.float64)
        residuals_into(self.code, batch.labels, batch.weights, z1, r1)
        dr = r1 - g0.r
        ysp = np.empty(g0.cols.shape[0], dtype=np.float64)
        scatter_compact(batch.indptr, g0.slot, batch.data, dr, 1.0 / g0.weight_sum, ysp)
        y = np.zeros(n + 1, dtype=np.float64)
        y[:n] = self.l2 * s[:n]
        y[g0.cols] += ysp
        y[n] = float(dr.sum()) / g0.weight_sum
        if not np.isfinite(y).all():
            self._diverged("the gradient at the new weights")
        with np.errstate(over="ignore", invalid="ignore"):
            yt = y - self.delta * s
            sy = float(s @ yt)
            Bs = B @ s
            sBs = float(s @ Bs)
            scale = math.sqrt(float(s @ s) * float(yt @ yt))
        update = (math.isfinite(sy) and math.isfinite(sBs) and math.isfinite(scale) and sBs > 0.0
                  and sy > 1e-10 * scale)
        self._x += s
        if update:
            updated = np.array(B, order="F")  # rank-one BLAS updates in place, no (n+1)^2 temporaries
            updated = scipy.linalg.blas.dger(1.0 / sy, yt, yt, a=updated, overwrite_a=True)
            updated = scipy.linalg.blas.dger(-1.0 / sBs, Bs, Bs, a=updated, overwrite_a=True)
            updated[np.diag_indices_from(updated)] += self.delta
            if np.isfinite(updated).all():
                B = updated
        if update or not self._started:
            self._B = B
            self._started = True
        self.t += 1
        return g0.loss

    def _extra_state(self) -> dict:
        return {"B": self._B, "started": int(self._started)}

    def _load_extra(self, state: dict) -> None:
        B = np.asarray(state["B"], dtype=np.float64)
        if B.shape != self._B.shape:
            raise UserError(f"checkpoint matrix has shape {B.shape}; expected {self._B.shape}")
        self._B = np.array(B, order="F")
        self._started = bool(int(np.asarray(state["started"])))
