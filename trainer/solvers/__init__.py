"""Online solvers for the L2-regularized linear objective, one small protocol for all.

Objective (per-row average form, intercept b unregularized, row weights c_i, labels y_i in {0, 1})::

    F(w, b) = sum_i c_i l(y_i, x_i.w + b) / sum_i c_i + (l2 / 2) ||w||^2

with l the logistic or squared-hinge loss of :mod:`trainer.losses`. Every solver offers:

* ``step(batch) -> float``: one update from a :class:`trainer.reader.Batch`; returns the batch's
  weighted mean data loss at the weights *before* the update (progressive validation). Raises
  :class:`trainer.errors.Diverged` without changing any state when the loss, the gradient or the new
  weights would be non-finite.
* ``weights`` (read-only float64 view, length n_features) and ``intercept`` (float).
* ``state(copy=True) -> dict`` of plain numpy arrays and scalars holding the complete state, and
  ``load_state(state)``, after which later steps are bit-for-bit those of an uninterrupted run.

Methods (``make_solver`` names): ``"olbfgs"`` online limited-memory BFGS (default), ``"res"``
regularized stochastic BFGS (dense, small problems only), ``"sgd"`` stochastic gradient descent,
``"adagrad"`` diagonal AdaGrad.
"""

from __future__ import annotations

import math
from typing import Protocol

import numpy as np

from trainer.errors import Diverged, UserError
from trainer.kernels import (margins_into, residuals_curvatures_into, residuals_into,
                             scatter_compact, scatter_gradient_curvature)
from trainer.losses import LOSS_NAMES, loss_code
from trainer.options import SOLVER_NAMES, check_choice, check_float, check_int

MAX_FEATURES = 1 << 30


class Solver(Protocol):
    """What the trainer relies on; see the module docstring for the contract of each member."""

    @property
    def weights(self) -> np.ndarray:
        """Bucket weights, a read-only float64 view of length n_features."""
        ...

    @property
    def intercept(self) -> float:
        """The intercept b (unregularized)."""
        ...

    def step(self, batch, first: BatchGradient | None = None) -> float:
        """One update from a batch.

        Parameters
        ----------
        batch : trainer.reader.stream.Batch
            The minibatch.
        first : BatchGradient, optional
            :meth:`first_gradient` of this batch at the current weights, when computed beforehand (a
            sweep computes its values' side by side on threads); else the step computes it.

        Returns
        -------
        float
            The batch's weighted mean data loss at the weights before the update.

        Raises
        ------
        Diverged
            Without changing any state, when the loss, the gradient or the new weights would be
            non-finite.
        """
        ...

    def state(self, copy: bool = True) -> dict:
        """The complete state as plain numpy arrays and scalars.

        Parameters
        ----------
        copy : bool, default True
            False lets the arrays be views of the live state, valid until the next ``step``.

        Returns
        -------
        dict
        """
        ...

    def load_state(self, state: dict) -> None:
        """Restore a :meth:`state`; later steps are bit for bit those of an uninterrupted run.

        Parameters
        ----------
        state : dict
            A :meth:`state` of a solver with the same method, loss, size, l2 and options.
        """
        ...


def schedule(step0: float, t0: float, t: int) -> float:
    """Step size eps_t = step0 * t0 / (t0 + t).

    sum eps_t diverges and sum eps_t^2 converges, the conditions of the paper below.

    Parameters
    ----------
    step0 : float
        eps_0.
    t0 : float
        The decay horizon, in steps.
    t : int
        The step.

    Returns
    -------
    float
        eps_t.

    References
    ----------
    "A Stochastic Approximation Method", Annals of Mathematical Statistics, 1951.
    """
    return step0 * t0 / (t0 + t)


class BatchGradient:
    """Margins, residuals and the sparse data gradient of one batch at given weights.

    Parameters
    ----------
    batch : trainer.reader.stream.Batch
        The batch.
    cols : numpy.ndarray
        int32 distinct buckets of the batch (:func:`trainer.kernels.batch_support`).
    slot : numpy.ndarray
        Position in ``cols`` of each nonzero.

    Attributes
    ----------
    z : numpy.ndarray
        Margins.
    r : numpy.ndarray
        c_i l'_i.
    weight_sum : float
        C, the batch's total row weight.
    loss : float
        Weighted mean data loss.
    gsp : numpy.ndarray
        X^T r / C on ``cols``.
    gb : float
        sum r / C, the intercept's gradient.
    curv : numpy.ndarray or None
        With ``curvature``: the Gauss-Newton diagonal sum_i c_i l''_i x_ij^2 / C on ``cols``.
    hb : float
        With ``curvature``: its intercept entry, sum_i c_i l''_i / C.
    """

    __slots__ = ("batch", "cols", "slot", "z", "r", "weight_sum", "loss", "gsp", "gb", "curv", "hb")

    def __init__(self, batch, cols, slot):
        self.batch = batch
        self.cols = cols
        self.slot = slot
        self.z = np.empty(batch.n_rows, dtype=np.float64)
        self.r = np.empty(batch.n_rows, dtype=np.float64)
        self.gsp = np.empty(cols.shape[0], dtype=np.float64)
        self.weight_sum = 0.0
        self.loss = 0.0
        self.gb = 0.0
        self.curv = None
        self.hb = 0.0

    def evaluate(self, code: int, w: np.ndarray, b: float, curvature: bool = False) -> bool:
        """Fill every attribute at weights (w, b).

        Parameters
        ----------
        code : int
            A loss code of :mod:`trainer.losses`.
        w : numpy.ndarray
            The n bucket weights.
        b : float
            The intercept.
        curvature : bool, default False
            Also fill ``curv`` and ``hb`` (in the same passes over the rows and entries).

        Returns
        -------
        bool
            True when loss and gradient are finite.
        """
        bt = self.batch
        margins_into(bt.indptr, self.slot, bt.data, w[self.cols], b, self.z)
        if curvature:
            h = np.empty(bt.n_rows, dtype=np.float64)
            loss_sum, weight_sum, r_sum, h_sum = residuals_curvatures_into(code, bt.labels, bt.weights,
                                                                            self.z, self.r, h)
            self.curv = np.empty(self.cols.shape[0], dtype=np.float64)
            self.hb = h_sum / weight_sum
            scatter_gradient_curvature(bt.indptr, self.slot, bt.data, self.r, h, 1.0 / weight_sum, self.gsp,
                                       self.curv)
        else:
            loss_sum, weight_sum, r_sum = residuals_into(code, bt.labels, bt.weights, self.z, self.r)
            scatter_compact(bt.indptr, self.slot, bt.data, self.r, 1.0 / weight_sum, self.gsp)
        self.weight_sum = weight_sum
        self.loss = loss_sum / weight_sum
        self.gb = r_sum / weight_sum
        return math.isfinite(self.loss) and math.isfinite(self.gb) and bool(np.isfinite(self.gsp).all())


class LinearSolver:
    """Shared part of every solver: options, the weight vector, the batch gradient, checks, state.

    Weights live in one float64 vector ``_x`` of length n_features + 1: the bucket weights, then the
    intercept. Subclasses implement ``step`` and extend ``_options``, ``_extra_state`` and
    ``_load_extra``.

    Parameters
    ----------
    n_features : int
        Number of buckets, 1..2^30.
    loss : {"logistic", "squared-hinge"}
        The data loss.
    l2 : float
        The per-row-average L2 strength, in [0, 1e6].

    Raises
    ------
    UserError
        Naming the option for a bad size, loss or l2.
    """

    method = ""
    OPTIONS: tuple[str, ...] = ()

    def __init__(self, n_features: int, loss: str, l2: float):
        self.n = check_int("n_features", n_features, 1, MAX_FEATURES)
        self.loss_name = check_choice("--loss", loss, tuple(LOSS_NAMES))
        self.code = loss_code(loss)
        self.l2 = check_float("--l2-strength", l2, 0.0, 1e6)
        self._x = np.zeros(self.n + 1, dtype=np.float64)
        self._bits = np.zeros((self.n + 63) // 64, dtype=np.uint64)
        self.t = 0

    @classmethod
    def dense_bytes(cls, n_features: int, history: int = 10) -> int:
        """Bytes of the arrays the method keeps whose size grows with the buckets.

        Here the float64 weights (n_features + 1 values) and the bitmap of a batch's buckets; methods
        with more state add theirs.

        Parameters
        ----------
        n_features : int
            Number of buckets.
        history : int, default 10
            The curvature memory (read by the methods that keep one).

        Returns
        -------
        int
        """
        return 8 * (n_features + 1) + 8 * ((n_features + 63) // 64)

    @property
    def weights(self) -> np.ndarray:
        """Bucket weights, a read-only float64 view of length n_features."""
        v = self._x[: self.n].view()
        v.flags.writeable = False
        return v

    @property
    def intercept(self) -> float:
        """The intercept b (unregularized)."""
        return float(self._x[self.n])

    def _check_batch(self, batch) -> None:
        if batch.n_rows < 1:
            raise ValueError("a batch must hold at least one row")
        if batch.indices.shape[0] and (int(batch.indices.max()) >= self.n or int(batch.indices.min()) < 0):
            raise ValueError(f"batch holds a bucket id outside [0, {self.n}), the model's bucket range")

    def assign(self, x: np.ndarray) -> None:
        """Replace the weights, as the full-batch phase does.

        The method's own memory (curvature pairs, accumulators) is left as it is.

        Parameters
        ----------
        x : numpy.ndarray
            Bucket weights then the intercept, length n_features + 1.

        Raises
        ------
        ValueError
            For another length or a non-finite value.
        """
        x = np.asarray(x, dtype=np.float64)
        if x.shape != self._x.shape or not np.isfinite(x).all():
            raise ValueError(f"weights must be {self._x.shape[0]} finite values; got shape {x.shape}")
        self._x[:] = x

    def first_gradient(self, batch) -> BatchGradient:
        """The batch's loss and gradient at the current weights, as :meth:`step` begins with them (with the
        curvature where the method takes it). Serial kernels that release the GIL: the values of a sweep
        compute theirs on threads side by side.

        Parameters
        ----------
        batch : trainer.reader.stream.Batch
            The minibatch.

        Returns
        -------
        BatchGradient

        Raises
        ------
        Diverged
            When the loss or the gradient is non-finite.
        """
        return self._gradient(batch, curvature=self._first_curvature())

    def _first_curvature(self) -> bool:
        """Whether :meth:`first_gradient` takes the curvature (the methods that use it say so)."""
        return False

    def _begin(self, batch, first: BatchGradient | None) -> BatchGradient:
        """The gradient a step begins with: ``first`` when it was computed beforehand, else
        :meth:`first_gradient` of ``batch``."""
        return first if first is not None else self.first_gradient(batch)

    def _gradient(self, batch, curvature: bool = False) -> BatchGradient:
        """Evaluate the batch at the current weights; raise ``Diverged`` when the result is non-finite."""
        self._check_batch(batch)
        g = BatchGradient(batch, *batch.support(self._bits))
        if not g.evaluate(self.code, self._x[: self.n], self._x[self.n], curvature):
            self._diverged("the loss or its gradient")
        return g

    def _diverged(self, what: str):
        raise Diverged(f"--solver {self.method}: {what} became non-finite at step {self.t}; a smaller "
                       f"initial step may help, e.g. --step0 {self._suggested_step0():.3g}")

    def _suggested_step0(self) -> float:
        """A smaller initial step to suggest in the ``Diverged`` message (a tenth of the current one)."""
        return self.step0 / 10.0

    def _options(self) -> dict:
        """Method options that shape the trajectory; a checkpoint must have been written with the same."""
        return {}

    def state(self, copy: bool = True) -> dict:
        """Complete solver state as plain numpy arrays and scalars (see the package docstring).

        Parameters
        ----------
        copy : bool, default True
            False lets the arrays be views of the live state, valid until the next ``step``: enough to
            write a checkpoint without doubling the memory of the curvature pairs.

        Returns
        -------
        dict
            Method, loss, size, l2, step counter, weights, method options and the method's own memory.
        """
        st = {"method": self.method, "loss": self.loss_name, "n_features": self.n, "l2": self.l2,
              "t": self.t, "x": self._x}
        st.update(self._options())
        st.update(self._extra_state())
        if copy:
            st = {k: v.copy() if isinstance(v, np.ndarray) else v for k, v in st.items()}
        return st

    def load_state(self, state: dict) -> None:
        """Restore a :meth:`state` dict exactly; later steps are bit for bit those of an uninterrupted run.

        Parameters
        ----------
        state : dict
            A :meth:`state` of a solver of the same method, loss, size, l2 and method options.

        Raises
        ------
        UserError
            When it was written by another method or with another loss, size, l2 or method option than this
            solver has, or its weights have another shape.
        """
        expected = {"method": self.method, "loss": self.loss_name, "n_features": self.n, "l2": self.l2}
        expected.update(self._options())
        for key, mine in expected.items():
            theirs = _scalar(state.get(key))
            if theirs != mine:
                raise UserError(f"checkpoint was written with {key} = {theirs!r} but this run uses {mine!r}")
        x = np.asarray(state["x"], dtype=np.float64)
        if x.shape != self._x.shape:
            raise UserError(f"checkpoint weights have shape {x.shape}; expected {self._x.shape}")
        self._x[:] = x
        self.t = int(_scalar(state["t"]))
        self._load_extra(state)

    def _extra_state(self) -> dict:
        return {}

    def _load_extra(self, state: dict) -> None:
        return None


def _scalar(v):
    """Unwrap 0-d numpy arrays (as np.load returns them) and numpy scalars to Python scalars."""
    if isinstance(v, np.ndarray) and v.ndim == 0:
        v = v.item()
    if isinstance(v, np.generic):
        v = v.item()
    return v


def make_solver(name: str, n_features: int, loss: str, l2: float, *, history: int = 10,
                step0: float | None = None, seed: int = 0, **method_options) -> Solver:
    """Build a solver for the objective of this package's docstring.

    Parameters
    ----------
    name : {"olbfgs", "res", "sgd", "adagrad"}
        The method.
    n_features : int
        Number of buckets, 1..2^30.
    loss : {"logistic", "squared-hinge"}
        The data loss.
    l2 : float
        The per-row-average L2 strength, in [0, 1e6].
    history : int, default 10
        The curvature memory (olbfgs only).
    step0 : float, optional
        The initial step (None selects the method's default).
    seed : int, default 0
        In [0, 2^32 - 1]; validated for a uniform interface: no method draws random numbers, every run is
        deterministic whatever the seed.
    **method_options
        The method options listed on each class (``OPTIONS``).

    Returns
    -------
    Solver
        A solver following the :class:`Solver` protocol.

    Raises
    ------
    UserError
        Naming the option for an unknown name, loss or option, ``history`` with another method, or a
        value out of range.
    """
    cls = _method(name)
    check_int("--seed", seed, 0, 2**32 - 1)
    if name != "olbfgs" and history != 10:
        raise UserError(f"--history applies to --solver olbfgs only; got --solver {name}")
    if name == "olbfgs":
        method_options["history"] = history
    for key in method_options:
        if key != "history" and key not in cls.OPTIONS:
            accepted = ", ".join(cls.OPTIONS) or "none"
            raise UserError(f"unknown option {key!r} for --solver {name}; accepted: {accepted}")
    return cls(n_features, loss, l2, step0=step0, **method_options)


def solver_bytes(name: str, n_features: int, history: int = 10) -> int:
    """Bytes of the state a solver keeps per bucket, before it steps (each method's ``dense_bytes``).

    Parameters
    ----------
    name : {"olbfgs", "res", "sgd", "adagrad"}
        The method.
    n_features : int
        Number of buckets.
    history : int, default 10
        The curvature memory (olbfgs).

    Returns
    -------
    int

    Raises
    ------
    UserError
        For an unknown method.
    """
    return _method(name).dense_bytes(n_features, history)


def _method(name: str) -> type:
    """The class of a method named by ``make_solver``; raises UserError for another name."""
    check_choice("--solver", name, SOLVER_NAMES)
    if name == "olbfgs":
        from trainer.solvers.olbfgs import OnlineLBFGS as cls
    elif name == "res":
        from trainer.solvers.res import RES as cls
    elif name == "sgd":
        from trainer.solvers.sgd import SGD as cls
    else:
        from trainer.solvers.adagrad import AdaGrad as cls
    return cls
