"""The training options: ``TrainOptions`` with their defaults, and the range checks of option values.

Standard library only, so that the command line builds its parser (``hashcurve --help``) without
loading numpy, pyarrow or numba.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import numbers
from dataclasses import dataclass

from trainer.errors import UserError

#: The online methods of ``--solver`` (:func:`trainer.solvers.make_solver`).
SOLVER_NAMES = ("olbfgs", "res", "sgd", "adagrad")


def check_float(option: str, value, lo: float, hi: float = math.inf, *, lo_open: bool = False) -> float:
    """A float option checked against its range.

    Parameters
    ----------
    option : str
        The option's name, for the error.
    value : object
        The value given.
    lo, hi : float
        The accepted range [lo, hi]; ``hi`` = inf means any finite value above ``lo``.
    lo_open : bool
        Accept (lo, hi] instead.

    Returns
    -------
    float
        ``value`` as a float.

    Raises
    ------
    UserError
        Naming ``option`` and the accepted range, for a bool, a non-number, a non-finite number or one
        out of range.
    """
    left = "(" if lo_open else "["
    right = ")" if math.isinf(hi) else "]"
    message = f"{option} must be a finite number in {left}{lo:g}, {hi:g}{right}; got {value!r}"
    if isinstance(value, bool):
        raise UserError(message)
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise UserError(message) from None
    if not math.isfinite(v) or v < lo or v > hi or (lo_open and v == lo):
        raise UserError(message)
    return v


def check_int(option: str, value, lo: int, hi: int) -> int:
    """An integer option checked against its range.

    Parameters
    ----------
    option : str
        The option's name, for the error.
    value : object
        The value given (a bool is not an integer).
    lo, hi : int
        The accepted range [lo, hi].

    Returns
    -------
    int
        ``value`` as an int.

    Raises
    ------
    UserError
        Naming ``option`` and the accepted range otherwise.
    """
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or not lo <= value <= hi:
        raise UserError(f"{option} must be an integer in [{lo}, {hi}]; got {value!r}")
    return int(value)


def check_choice(option: str, value, choices) -> str:
    """An option checked against its choices.

    Parameters
    ----------
    option : str
        The option's name, for the error.
    value : object
        The value given.
    choices : sequence of str
        The accepted values.

    Returns
    -------
    str
        ``value``.

    Raises
    ------
    UserError
        Listing the choices, for any other value.
    """
    if value not in choices:
        raise UserError(f"{option} must be one of {', '.join(choices)}; got {value!r}")
    return value


@dataclass
class TrainOptions:
    """Training options; the ones in ``TRAJECTORY`` decide the weights and must match on resume.

    Each is the command line's option of the same name (``--l2-strength`` for ``l2_strength``).

    Attributes
    ----------
    epochs : int, default 3
        Passes over the log.
    loss : {"logistic", "squared-hinge"}
        The data loss.
    solver : {"olbfgs", "res", "sgd", "adagrad"}
        The online method (:func:`trainer.solvers.make_solver`).
    l2_strength : float, tuple of float or "auto", default 1e-4
        lambda of the per-row-average objective ``(lambda / 2) ||w||^2``; several values (a tuple) or
        "auto" train one model per value from one read of the log (:mod:`trainer.sweep`).
    history : int, default 10
        Curvature pairs kept (``olbfgs`` only; also scipy's L-BFGS-B memory of the full-batch phase).
    batch_rows : int, default 4096
        Rows per minibatch.
    step0 : float or None
        The solver's initial step (None: the method's default).
    seed : int, default 0
        Seed of shuffling and negative sampling (no solver draws random numbers).
    shuffle_buffer : int, default 0
        Rows per shuffle window (0: file order).
    negative_keep_rate : float, default 1.0
        Keep each negative row with this probability; ``ln Q`` is added to the intercept so predictions
        stay calibrated on unsampled data ("Practical Lessons from Predicting Clicks on Ads at
        Facebook", ADKDD, 2014).
    checkpoint_every : int, default 2000000
        Rows between checkpoints (and one at each pass end).
    patience : int, default 1
        Passes without a better holdout loss before an early stop.
    start, end : datetime.date or None
        Inclusive day filter of the training log.
    holdout_start, holdout_end : datetime.date or None
        Days of the training log used as the holdout.
    skip_bad_labels : bool
        Drop rows with a null or unaccepted label instead of refusing the log.
    allow_one_class : bool
        Accept a log whose labels are all 0 or all 1.
    full_batch_memory : int, default 1024
        MB within which the hashed log is trained full-batch after the first pass (0: plain online
        passes, no iterate averaging).
    refine_iterations : int, default 20
        L-BFGS-B iterations of training over a cluster only (``trainer.cluster``).
    """

    epochs: int = 3
    loss: str = "logistic"
    solver: str = "olbfgs"
    l2_strength: float | tuple[float, ...] | str = 1e-4
    history: int = 10
    batch_rows: int = 4096
    step0: float | None = None
    seed: int = 0
    shuffle_buffer: int = 0
    negative_keep_rate: float = 1.0
    checkpoint_every: int = 2_000_000
    patience: int = 1
    start: dt.date | None = None
    end: dt.date | None = None
    holdout_start: dt.date | None = None
    holdout_end: dt.date | None = None
    skip_bad_labels: bool = False
    allow_one_class: bool = False
    full_batch_memory: int = 1024
    refine_iterations: int = 20

    TRAJECTORY = ("loss", "solver", "l2_strength", "history", "batch_rows", "step0", "seed", "shuffle_buffer",
                  "negative_keep_rate", "start", "end", "skip_bad_labels", "full_batch_memory")

    def validate(self) -> None:
        """Raise UserError naming the first option outside its accepted range."""
        check_int("--epochs", self.epochs, 1, 10_000)
        check_choice("--loss", self.loss, ("logistic", "squared-hinge"))
        check_choice("--solver", self.solver, SOLVER_NAMES)
        if self.l2_strength != "auto":  # trainer.sweep.l2_option also checks the count and repeats of several
            for value in self.l2_strength if isinstance(self.l2_strength, tuple) else (self.l2_strength,):
                check_float("--l2-strength", value, 0.0, 1e6)
        check_int("--history", self.history, 1, 100)
        check_int("--batch-rows", self.batch_rows, 1, 10_000_000)
        if self.step0 is not None:
            check_float("--step0", self.step0, 0.0, 1e6, lo_open=True)
        check_int("--seed", self.seed, 0, 2**32 - 1)
        check_int("--shuffle-buffer", self.shuffle_buffer, 0, 100_000_000)
        check_float("--negative-keep-rate", self.negative_keep_rate, 0.0, 1.0, lo_open=True)
        check_int("--checkpoint-every", self.checkpoint_every, 1, 10**15)
        check_int("--patience", self.patience, 1, 10_000)
        check_int("--full-batch-memory", self.full_batch_memory, 0, 10_000_000)
        check_int("--refine-iterations", self.refine_iterations, 0, 100_000)

    def as_json(self) -> dict:
        """The options as JSON values.

        Returns
        -------
        dict
            Every field by name; dates as YYYY-MM-DD, several l2 strengths as a list.
        """
        out = {}
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            out[f.name] = v.isoformat() if isinstance(v, dt.date) else list(v) if isinstance(v, tuple) else v
        return out

    @property
    def phased(self) -> bool:
        """Whether training goes in the default solver's phases: online passes whose model is the iterate
        average, then full-batch passes when the hashed log fits ``full_batch_memory``."""
        return self.solver == "olbfgs" and self.full_batch_memory > 0
