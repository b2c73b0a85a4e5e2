"""The pass loop: progressive validation, per-pass holdout evaluation, early stop, checkpoints, resume.

One training run owns one model folder, whose files ``trainer.run_folder`` reads and writes.

A refused run leaves nothing behind: when a UserError stops a run before it wrote a checkpoint, the
files it wrote are removed (and the folder, when the run created it); after a checkpoint the folder
is kept for ``--resume`` and the message says what it holds. A folder whose run never wrote a
checkpoint (killed in its first seconds) starts that run afresh on ``--resume`` or on the same
command again; other options are refused, naming the first that differs.

Iterate averaging of the default solver (``olbfgs``; ``full_batch_memory`` 0 turns it off with the
full-batch phase and the batch growth below, leaving plain online passes): the model of an online
pass is a weighted mean of the solver's iterates in that pass ("Acceleration of stochastic
approximation by averaging", SIAM Journal on Control and Optimization 30, 1992): the iterate after
the pass's first R_t rows is blended in with weight 1 - (R_(t-1) / R_t)^(eta + 1), eta =
``AVERAGE_POWER``, so it weighs R_t^(eta+1) - R_(t-1)^(eta+1): the polynomial-decay average of
"Stochastic Gradient Descent for Non-smooth Optimization: Convergence Results and Optimal Averaging
Schemes" (ICML 2013) measured in rows instead of steps (for batches of equal size it weighs the t-th
iterate in proportion to about t^eta), so early iterates count little and a large batch counts for
its rows. The solver itself goes on from its last iterate.

Batch growth of the default solver: an online batch holds 1 / ``BATCH_GROWTH`` of the rows the run
has seen, at least ``batch_rows`` and at most ``BATCH_GROWTH_CAP`` x ``batch_rows`` rows (the dynamic
sample sizes of "Sample size selection in optimization methods for machine learning", Mathematical
Programming 134, 2012): small batches while the model is far off, larger ones, with less noise and
fewer dense passes over the stored curvature pairs, once many rows have been seen. A pass of 1M rows
takes about 100 steps instead of 245, and a pass of 100M rows about 1,600 instead of 24,000. The
sizes follow from the rows seen, which the checkpoint holds, so a resumed run cuts the same batches.
Each online pass's record and table row state its steps and the smallest and largest batch.

Phases of the default solver: passes are online (one step per batch) unless the hashed log fits
``full_batch_memory`` MB, in which case every pass after the first is a full-batch pass
(:mod:`trainer.solvers.full_batch`: L-BFGS-B on the whole log in memory), and a tiny log (at most
``TINY_BATCHES`` batches) is trained full-batch from the first pass. The choice is made from the
rows and entries the first pass read, printed in the per-pass table, written to each pass's line of
``metrics.jsonl`` and to ``run.json`` (``phases``), and kept in the checkpoint, so a resumed run
makes it the same way.

Progressive validation ("online" or "test-then-train" evaluation, common practice): each batch's
loss is measured before the solver learns from it.

A :class:`Trainer`'s methods are of two kinds: those of its value (``take``/``step``, ``record_pass``,
``notes``, ``current_model``, ``kept``, ``finished``, ``checkpoint_parts``, ``restore``) touch only its
solver, iterate average and state; the others run the model folder, readers, phases, checkpoint file and
per-pass table. :class:`trainer.sweep.SweepTrainer` is one run over several values, each stepped through
the value methods of its own Trainer; :func:`fit_full_batch` runs the full-batch pass of one value or of
several in lockstep.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import signal
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from tqdm import tqdm

from trainer.errors import Diverged, Interrupted, UserError
from trainer.evaluation import evaluate
from trainer.json_values import jsonable
from trainer.kernels import blend_into
from trainer.metrics import fit_platt
from trainer.model import ExampleTexts, Model, load_model
from trainer.options import TrainOptions
from trainer.reader.examples import BucketExamples
from trainer.reader.stream import Position, Reader
from trainer.run_folder import RunFolder, l2_label
from trainer.solvers import full_batch
from trainer.solvers import make_solver
from trainer.spec import Spec

PROGRESS_POINTS_PER_PASS = 200
#: Platt scaling of squared-hinge models is fitted on at most this many holdout rows (in file
#: order), so memory does not grow with the holdout.
PLATT_ROWS = 1_000_000
#: A pass whose holdout predicted/observed ratio falls outside this range is marked "!" in the
#: per-pass table, with a one-line note (a band for a first look, common practice; not a test).
CALIBRATED = (0.8, 1.25)
#: A numeric column without edges whose |value| exceeds this in the batch where the solver diverged is
#: named in the message as the likely cause (one-hot entries are 1.0; log1p keeps values under 710).
HUGE_NUMERIC = 1e3
#: A log of at most this many batches is trained full-batch from the first pass (when it fits the budget).
TINY_BATCHES = 16
#: eta of the polynomial-decay average that is the model of an online pass of the default solver.
AVERAGE_POWER = 3.0
#: The default solver's online batches hold 1 / BATCH_GROWTH of the rows seen so far ...
BATCH_GROWTH = 32
#: ... and at most BATCH_GROWTH_CAP x --batch-rows rows (memory).
BATCH_GROWTH_CAP = 16


@dataclass
class _State:
    """The trainer's own part of a checkpoint (the solver keeps the rest)."""

    pass_index: int = 0
    position: Position | None = None
    rows_in_pass: int = 0
    rows_total: int = 0
    steps: int = 0
    pv_loss: float = 0.0
    pv_weight: float = 0.0
    progress: list = dataclasses.field(default_factory=list)
    best_pass: int | None = None
    best_score: float | None = None
    bad_passes: int = 0
    stopped_early: bool = False
    positives: int = 0
    negatives: int = 0
    phase: str = "online"
    entries: int = 0
    averaged: bool = False
    pass_steps: int = 0
    batch_min: int = 0
    batch_max: int = 0
    phases: list = dataclasses.field(default_factory=list)

    def to_json(self) -> dict:
        """The state as the checkpoint's meta holds it."""
        s = dataclasses.asdict(self)
        s["position"] = list(dataclasses.astuple(self.position)) if self.position else None
        return s

    @classmethod
    def from_json(cls, s: dict) -> "_State":
        """The state :meth:`to_json` wrote."""
        return cls(**{**s, "position": Position(*s["position"]) if s["position"] is not None else None})


@dataclass
class TrainResult:
    """What a finished training run did, in the manner of ``scipy.optimize.OptimizeResult``.

    Attributes
    ----------
    model : trainer.model.Model
        The final model (the best pass's when a holdout decides).
    model_dir : Path
        The model folder it was written to.
    passes : int
        Passes finished (also by earlier sessions of a resumed run).
    per_pass : list of dict
        One record per finished pass as in ``metrics.jsonl``: ``pass``, ``rows``, ``rows_total``,
        ``progressive_loss``, ``holdout``, ``train_seconds``, ``eval_seconds``, ``phase`` (and
        ``full_batch`` after a full-batch pass).
    best_pass : int or None
        The pass of the best holdout loss (None without a holdout).
    stopped_early : bool
        True when the holdout loss stopped improving for ``patience`` passes.
    stopping_reason : str
        Why training ended, in words.
    train_seconds, eval_seconds : float
        The passes' time reading and stepping, and evaluating the holdout, summed.
    l2_strength : float or None
        The model's L2 strength (the kept one of a sweep).
    sweep : list of dict or None
        Per value of a sweep (:mod:`trainer.sweep`): ``l2_strength``, ``best_pass``, ``holdout_loss``
        (the best pass's), ``passes``, ``stopped`` (why it stopped stepping) and ``model_dir``; None for
        one value.
    """

    model: Model
    model_dir: Path
    passes: int
    per_pass: list[dict]
    best_pass: int | None
    stopped_early: bool
    stopping_reason: str
    train_seconds: float
    eval_seconds: float
    l2_strength: float | None = None
    sweep: list[dict] | None = None


class _StopFlag:
    """Turns SIGINT/SIGTERM into a flag the loop checks between steps, so a step is never cut."""

    def __init__(self):
        self.signal = None

    def __enter__(self):
        self._old = {s: signal.signal(s, self._set) for s in (signal.SIGINT, signal.SIGTERM)}
        return self

    def _set(self, signum, frame):
        self.signal = signum

    def __exit__(self, *exc):
        for s, h in self._old.items():
            signal.signal(s, h)


def format_cell(v, spec: str = ".5f") -> str:
    """A table cell: ``v`` formatted by ``spec``, or "-" right-aligned to the spec's width when ``v``
    is not a finite number (a missing metric). Used by the per-pass table and the CLI's summaries."""
    if isinstance(v, (int, float)) and math.isfinite(v):
        return format(v, spec)
    return format("-", f">{spec.split('.')[0]}")


def _off_calibration(holdout: dict | None) -> float | None:
    """The holdout's predicted/observed ratio when it lies outside ``CALIBRATED``, else None."""
    ratio = (holdout or {}).get("calibration_ratio")
    if ratio is None or not math.isfinite(ratio) or CALIBRATED[0] <= ratio <= CALIBRATED[1]:
        return None
    return ratio


def grown_batch_rows(rows_seen: int, batch_rows: int) -> int:
    """The default solver's batch size after ``rows_seen`` rows (module docstring).

    Parameters
    ----------
    rows_seen : int
        Rows the run has seen.
    batch_rows : int
        ``--batch-rows``.

    Returns
    -------
    int
        rows_seen // BATCH_GROWTH within [batch_rows, BATCH_GROWTH_CAP * batch_rows].

    References
    ----------
    "Sample size selection in optimization methods for machine learning", Mathematical Programming 134, 2012.
    """
    return min(max(batch_rows, rows_seen // BATCH_GROWTH), BATCH_GROWTH_CAP * batch_rows)


def average_weight(rows_before: int, rows_after: int) -> float:
    """The blend weight of the iterate after a batch in a pass's polynomial-decay average (module docstring).

    Parameters
    ----------
    rows_before, rows_after : int
        Rows of the pass before and after the batch (rows_after > 0).

    Returns
    -------
    float
        1 - (rows_before / rows_after)^(AVERAGE_POWER + 1); 1 for the pass's first batch.

    References
    ----------
    "Stochastic Gradient Descent for Non-smooth Optimization: Convergence Results and Optimal Averaging
    Schemes", ICML, 2013.
    """
    return 1.0 - (rows_before / rows_after) ** (AVERAGE_POWER + 1.0)


def _phase_text(rec: dict) -> str:
    """The per-pass table's phase cell: the phase, with an online pass's steps and batch sizes or a
    full-batch pass's iterations."""
    phase = rec.get("phase", "")
    if "steps" in rec:
        lo, hi = rec["batch_rows"]
        rows = f"{lo:,}" if lo == hi else f"{lo:,}-{hi:,}"
        return f"{phase}: {rec['steps']:,} steps of {rows} rows"
    if "full_batch" in rec:
        return f"{phase}: {rec['full_batch']['iterations']} iterations"
    return phase


def _holdout_score(summary: dict, loss: str) -> float:
    return summary["log_loss"] if loss == "logistic" else summary["squared_hinge_loss"]


def fit_full_batch(values: list[Trainer], memory: full_batch.InMemoryLog, stop: _StopFlag) -> list[dict]:
    """Run the full-batch pass of one or several values of a run (Trainers whose options differ only in
    the L2 strength) on an in-memory log, each from its model's weights, in lockstep
    (:func:`trainer.solvers.full_batch.minimize`): each value's weights are those of its pass alone.

    Parameters
    ----------
    values : list of Trainer
        The values.
    memory : trainer.solvers.full_batch.InMemoryLog
        The hashed log.
    stop : _StopFlag
        Polled after every iteration.

    Returns
    -------
    list of dict
        Each value's summary (:func:`trainer.solvers.full_batch.minimize`); with ``stopped`` set by a
        signal, every value's weights and state are left as they were.
    """
    xs = [value._model_x() for value in values]
    first = values[0]
    fitted = full_batch.minimize(memory, first.solver.code, [value.opt.l2_strength for value in values], xs,
                                 history=first.opt.history, stop=lambda: stop.signal is not None)
    if not fitted[0]["stopped"]:
        for value, x in zip(values, xs):
            st = value.state
            value.solver.assign(x)
            st.averaged = False
            st.rows_in_pass = memory.n_rows
            st.rows_total += memory.n_rows
    return fitted


class Trainer:
    """One training run into a model folder; :meth:`run` returns its :class:`TrainResult`.

    Parameters
    ----------
    spec : Spec
        The feature spec.
    data : str or Path
        The training log (file, folder or hive-partitioned folder).
    out : str or Path
        The model folder.
    options : TrainOptions
        The options (validated here).
    holdout : str or Path, optional
        The holdout log; with ``options.holdout_start/end`` it may be left out (the training path
        itself is used).
    resume : bool
        Continue from ``out/checkpoint.bin`` (or start afresh a run of the same fingerprint that never
        wrote one).
    force : bool
        Replace another run's files in ``out``.
    quiet : bool
        No progress bar and no per-pass table (otherwise the table goes to stdout and the bar, on a
        terminal only, to stderr).

    Raises
    ------
    UserError
        For bad options, data or model folders before writing anything, also when another process is
        running in ``out``.
    """

    def __init__(self, spec: Spec, data: str | Path, out: str | Path, options: TrainOptions, *,
                 holdout: str | Path | None = None, resume: bool = False, force: bool = False,
                 quiet: bool = False):
        options.validate()
        self.spec, self.opt = spec, options
        self.quiet = quiet
        self.data = str(data)
        self.holdout_path = self.holdout_of(data, holdout, options)
        self.reader, self.holdout = self.readers(spec, data, options, self.holdout_path)
        self._make_state()
        self.folder = RunFolder(out)
        self.resume = resume
        self.examples = BucketExamples(spec.n_buckets)
        self._texts = None
        self._saved: tuple[int, int] | None = None
        self._written: Model | None = None  # the model finish_pass just wrote, until another pass starts
        self.memory = None
        self._since_checkpoint = 0
        self._point_rows = max(self.reader.total_rows // PROGRESS_POINTS_PER_PASS, options.batch_rows)
        try:
            self._prepare_folder(force)
        except BaseException:
            self.folder.release()
            raise
        self.reader.watch(self.examples)

    def _make_state(self) -> None:
        """The solver this run steps, its training state and iterate average (``self.opt``'s value)."""
        o = self.opt
        self.solver = make_solver(o.solver, self.spec.n_buckets, o.loss, o.l2_strength, history=o.history,
                                  step0=o.step0, seed=o.seed)
        self.state = _State()
        self.average = np.zeros(self.spec.n_buckets + 1) if o.phased else None
        self._window = [0.0, 0.0]

    @staticmethod
    def holdout_of(data: str | Path, holdout: str | Path | None, options: TrainOptions) -> str | None:
        """The holdout log's path: ``holdout``, else the training log when holdout days are given, else None.

        Parameters
        ----------
        data : str or Path
            The training log.
        holdout : str or Path or None
            The holdout log given.
        options : TrainOptions
            The options (``holdout_start``, ``holdout_end``).

        Returns
        -------
        str or None
        """
        if holdout is not None:
            return str(holdout)
        return str(data) if (options.holdout_start or options.holdout_end) else None

    @staticmethod
    def readers(spec: Spec, data: str | Path, options: TrainOptions, holdout: str | None) -> tuple:
        """The training log's Reader and the holdout's (None without one), as a run of these options reads them.

        Parameters
        ----------
        spec : Spec
            The feature spec.
        data : str or Path
            The training log.
        options : TrainOptions
            The options (dates, batch rows, shuffling, sampling, bad labels).
        holdout : str or None
            The holdout log's path.

        Returns
        -------
        tuple of (trainer.reader.stream.Reader, trainer.reader.stream.Reader or None)
        """
        reader = Reader(spec, data, options.start, options.end, batch_rows=options.batch_rows,
                        shuffle_rows=options.shuffle_buffer, seed=options.seed,
                        negative_keep_rate=options.negative_keep_rate, skip_bad_labels=options.skip_bad_labels)
        held = (Reader(spec, holdout, options.holdout_start, options.holdout_end, batch_rows=65536,
                       skip_bad_labels=options.skip_bad_labels) if holdout else None)
        return reader, held

    # -- the model folder -------------------------------------------------------------------------

    def _fingerprint(self) -> dict:
        opts = self.opt.as_json()
        return {"spec": self.spec.fingerprint(), "data": self.data,
                **{k: opts[k] for k in TrainOptions.TRAJECTORY}}

    def _difference(self, theirs: dict) -> str | None:
        """How a recorded fingerprint differs from this run's: "the spec", "--data" or the first
        differing option with its two values; None when they are the same run."""
        ours = self._fingerprint()
        for key in ours:
            if theirs.get(key) != ours[key]:
                what = "the spec" if key == "spec" else ("--data" if key == "data" else f"--{key.replace('_', '-')}")
                return f"{what} differs ({theirs.get(key)!r} there, {ours[key]!r} now)"
        return None

    def _prepare_folder(self, force: bool) -> None:
        folder = self.folder
        if self.resume and not folder.path.is_dir():
            raise UserError(f"{folder.checkpoint}: no checkpoint to resume from (no such folder)")
        folder.claim()
        run = folder.read_run()
        fingerprint = run.get("fingerprint") if run is not None else None
        restart = (isinstance(fingerprint, dict) and not folder.checkpoint.exists()
                   and self._difference(fingerprint) is None)
        if self.resume and folder.checkpoint.exists():
            self._load_checkpoint()
            return
        if self.resume and run is None:
            raise UserError(f"{folder.checkpoint}: no checkpoint to resume from")
        if self.resume and not restart:
            why = self._difference(fingerprint) if isinstance(fingerprint, dict) else "run.json holds no fingerprint"
            raise UserError(f"{folder.path / 'run.json'}: cannot resume: {why}")
        if restart:
            self.log(f"{folder.path}: its run of the same spec and options ended before its first checkpoint; "
                     "starting it again from the beginning")
            self.resume = False
            folder.clear()
        elif not folder.is_empty():
            if not force:
                why = self._difference(fingerprint) if isinstance(fingerprint, dict) else None
                raise UserError(f"{folder.path}: folder is not empty (another run{'; ' + why if why else '?'}); use "
                                "--resume to continue it or --force to replace its files")
            if not folder.has_run_file():
                raise UserError(f"{folder.path}: not a hashcurve model folder (no run.json); --force only "
                                "replaces a model folder, choose an empty or new --out")
            folder.clear()
        folder.write_run({"format": "hashcurve-run", "version": 2, "spec": self.spec.raw, "data": self.data,
                          "holdout": self.holdout_path, "options": self.opt.as_json(),
                          "fingerprint": self._fingerprint(),
                          "created": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"), "phases": []})

    def _choose_phase(self, phase: str, reason: str) -> None:
        """Switch the passes from the next one on to ``phase``; say why in the log and in run.json."""
        st = self.state
        st.phase = phase
        st.phases.append({"from_pass": st.pass_index + 1, "phase": phase, "reason": reason})
        self.folder.write_run({**(self.folder.read_run() or {}), "phases": st.phases})
        self.log(f"passes from {st.pass_index + 1} on: {phase} ({reason})")

    def _load_checkpoint(self) -> None:
        arrays, meta = self._read_checkpoint()
        self.restore(arrays, meta["state"])
        self._resumed(meta)
        if self.state.position is None:
            self.patience_stop()
            self.next_phase()

    def _read_checkpoint(self) -> tuple[dict, dict]:
        """The folder's checkpoint (arrays, meta); refuses one of another run."""
        arrays, meta = self.folder.read_checkpoint()
        why = self._difference(meta["fingerprint"])
        if why:
            raise UserError(f"{self.folder.checkpoint}: cannot resume: {why}")
        return arrays, meta

    def _resumed(self, meta: dict) -> None:
        """After the state was restored from a checkpoint's ``meta``: take its bucket examples, and drop the
        metrics lines of the passes it does not count. A checkpoint at a pass end is then followed by
        that pass end's decisions for this run's ``--epochs`` (the early stop, the switch to full-batch
        passes), which a run with fewer passes left untaken: resumed with more passes, a run goes on as
        one started with them would have."""
        ex = meta["examples"]
        self.examples = BucketExamples(self.spec.n_buckets, max_rows=ex["rows_left"], values=ex["values"])
        self._saved = (self.state.pass_index, self.state.rows_in_pass)
        self.folder.keep_metrics(self.state.pass_index)

    def restore(self, arrays: dict, state: dict) -> None:
        """Take back the solver, iterate average and training state of :meth:`checkpoint_parts`.

        Parameters
        ----------
        arrays : dict of str to numpy.ndarray
            The arrays :meth:`checkpoint_parts` gave.
        state : dict
            The state it gave.

        Raises
        ------
        UserError
            When the solver's state was written with other settings.
        """
        self.state = _State.from_json(state)
        if self.from_weights():
            self.solver.assign(arrays["weights"])
            return
        self.solver.load_state({k[7:]: (v.item() if v.ndim == 0 else v)
                                for k, v in arrays.items() if k.startswith("solver.")})
        if self.average is not None:
            self.average[:] = arrays["average"]

    def _refused(self, exc: UserError) -> UserError:
        """After a UserError stopped the run: remove what a run without a checkpoint wrote (and the
        folders it created), or keep a checkpointed folder; return the error with what was kept."""
        if self._saved is None:
            self.folder.remove_new()
            kept = "nothing was kept (no checkpoint had been written)"
        else:
            p, rows = self._saved
            where = f"after pass {p}" if rows == 0 else f"in pass {p + 1} after {rows:,} rows"
            kept = f"{self.folder.checkpoint} ({where}) is kept"
            if (self.folder.path / "model.json").exists() and self.state.best_pass:
                kept += f", and model.json holds the weights of pass {self.state.best_pass}"
            kept += "; continue with --resume once the cause is fixed, or start over with --force"
        return type(exc)(f"{exc}; {kept}")

    def save_checkpoint(self) -> None:
        """Write the complete state to ``checkpoint.bin`` (and the progress curve); the rows counted
        towards the next ``checkpoint_every`` start again from zero."""
        arrays, state = self.checkpoint_parts()
        self.write_checkpoint(arrays, {"state": state}, self.state.progress)

    def write_checkpoint(self, arrays: dict, meta: dict, progress: list) -> None:
        """Write ``checkpoint.bin`` (with the run's fingerprint and bucket examples added to ``meta``) and
        ``progress.json``; the rows counted towards the next ``checkpoint_every`` start again from zero.

        Parameters
        ----------
        arrays : dict of str to numpy.ndarray
            The checkpoint's arrays.
        meta : dict
            Its meta: ``state``, the run's :class:`_State` as JSON, and whatever else the run keeps.
        progress : list
            The progressive-validation curve.
        """
        ex = self.examples
        self.folder.write_checkpoint(arrays, {"fingerprint": self._fingerprint(), **meta,
                                              "examples": {"values": ex.values, "rows_left": ex.rows_left}},
                                     progress)
        self._saved = (self.state.pass_index, self.state.rows_in_pass)
        self._since_checkpoint = 0

    def checkpoint_parts(self) -> tuple[dict, dict]:
        """The solver, iterate average and training state as a checkpoint holds them; once a full-batch
        pass has run, the weights alone (:meth:`from_weights`).

        Returns
        -------
        tuple of (dict of str to numpy.ndarray, dict)
            The arrays (views of the live state, valid until the next step) and the state as JSON.
        """
        if self.from_weights():
            return {"weights": self.solver.state(copy=False)["x"]}, self.state.to_json()
        arrays = {f"solver.{k}": np.asarray(v) for k, v in self.solver.state(copy=False).items()}
        if self.average is not None:
            arrays["average"] = self.average
        return arrays, self.state.to_json()

    def from_weights(self) -> bool:
        """Whether a full-batch pass has run: every pass to come is one, and starts from the weights
        alone, so the solver's own memory and the iterate average are not used again (at 2^20 buckets
        and history 10, a checkpoint of 8 MB instead of 71 MB).

        Returns
        -------
        bool
        """
        st = self.state
        return st.phase == "full-batch" and st.phases[-1]["from_pass"] <= st.pass_index

    # -- the model --------------------------------------------------------------------------------

    def current_model(self, holdout: dict | None = None) -> Model:
        """A Model of the solver's current weights (copied).

        The intercept carries the downsampling correction ``ln(negative_keep_rate)``, and the summary an
        estimate of the distinct tokens seen: every bucket a token reached has a non-zero weight, so
        D ~ -m ln(1 - occupied/m).

        Parameters
        ----------
        holdout : dict, optional
            The holdout metrics to record in the model's info.

        Returns
        -------
        trainer.model.Model

        References
        ----------
        "A Linear-Time Probabilistic Counting Algorithm for Database Applications", ACM Transactions on
        Database Systems, 1990.
        """
        x = self._model_x()
        intercept = float(x[-1]) + math.log(self.opt.negative_keep_rate)
        weights = x[:-1]
        m, occupied = weights.size, int(np.count_nonzero(weights))
        distinct = round(-m * math.log1p(-occupied / m)) if occupied < m else None
        info = {"options": self.opt.as_json(), "negative_keep_rate": self.opt.negative_keep_rate,
                "summary": {"passes": self.state.pass_index, "rows": self.state.rows_total,
                            "distinct_tokens": distinct, "distinct_tokens_method":
                            "linear counting on the occupied buckets (ACM TODS 1990)",
                            "steps": self.state.steps, "step0": self.solver.step0, "data": self.data,
                            "holdout_data": self.holdout_path,
                            "stopped_early": self.state.stopped_early, "best_pass": self.state.best_pass},
                "holdout": holdout, "calibration": None, "examples": self.example_texts()}
        return Model(self.spec, weights, intercept, self.opt.loss, info)

    def example_texts(self) -> ExampleTexts:
        """The bucket examples as models hold them, made again only once new values were recorded.

        Returns
        -------
        trainer.model.ExampleTexts
        """
        ex = self.examples
        if self._texts is None or self._texts[0] is not ex or self._texts[1] != ex.total:
            self._texts = (ex, ex.total, ExampleTexts(ex.values))
        return self._texts[2]

    # -- the loop ---------------------------------------------------------------------------------

    def _model_x(self) -> np.ndarray:
        """The model's weights then intercept (a new array): the averaged iterate of the last online
        pass when there is one, else the solver's weights."""
        if self.state.averaged:
            return self.average.copy()
        return np.append(self.solver.weights, self.solver.intercept)

    def _average(self, batch_rows: int) -> None:
        """Blend the solver's iterate after a batch of ``batch_rows`` rows into the pass's polynomial-decay
        average (module docstring)."""
        st = self.state
        st.averaged = True
        blend_into(self.average, self.solver.weights, self.solver.intercept,
                   average_weight(st.rows_in_pass - batch_rows, st.rows_in_pass))

    def run(self) -> TrainResult:
        """Train to the requested passes (or an early stop).

        Releases the folder's lock however it ends.

        Returns
        -------
        TrainResult
            The final model and what the run did.

        Raises
        ------
        Interrupted
            On SIGINT/SIGTERM, after saving a checkpoint.
        Diverged
            (a UserError) When a step would make the loss, gradient or weights non-finite.
        UserError
            For bad data met on the way; the message says what the folder keeps (see the module docstring).
        """
        st = self.state
        try:
            if self.fresh:
                self.log(self.table_header())
            self.start()
            with _StopFlag() as stop:
                while st.pass_index < self.opt.epochs and not st.stopped_early:
                    self._written = None  # not held in memory through another pass
                    started = time.monotonic()
                    fitted = None
                    if st.phase == "full-batch" and self.collect():
                        fitted = self.full_batch_pass(stop)
                    if fitted is None:
                        self._one_pass(stop)
                    self.finish_pass(time.monotonic() - started, fitted)
            return self._result(self._final_model())
        except UserError as exc:
            raise self._refused(exc) from None
        finally:
            self.folder.release()

    @property
    def fresh(self) -> bool:
        """Whether the run starts at the beginning (not resumed from a checkpoint)."""
        return self.state.pass_index == 0 and self.state.position is None and not self.resume

    def start(self) -> None:
        """Before the first pass of a fresh run: train a tiny log full-batch from the start (a no-op otherwise)."""
        st = self.state
        if not self.fresh or st.phases:
            return
        batches = -(-self.reader.total_rows // self.opt.batch_rows)
        if self.opt.phased and batches <= TINY_BATCHES:
            self._choose_phase("full-batch", f"a tiny log: {self.reader.total_rows:,} rows, at most "
                               f"{TINY_BATCHES} batches of {self.opt.batch_rows}")

    def _budget(self) -> int:
        return self.opt.full_batch_memory * 2**20

    def collect(self) -> bool:
        """Before a full-batch pass: read the log into memory (``self.memory``) unless it is there.

        In the first pass, the class counts come from it.

        Returns
        -------
        bool
            False after switching back to online passes, when the log turned out not to fit the budget.
        """
        st = self.state
        if self.memory is None:
            self.memory = full_batch.InMemoryLog.collect(self.reader.batches(0), self._budget(), self.spec.n_buckets)
            if self.memory is None:
                self._choose_phase("online", f"the hashed log does not fit --full-batch-memory "
                                   f"{self.opt.full_batch_memory} MB")
                return False
        if st.pass_index == 0:
            st.positives = int(np.count_nonzero(self.memory.labels))
            st.negatives = self.memory.n_rows - st.positives
        return True

    def full_batch_pass(self, stop: _StopFlag) -> dict:
        """One full-batch pass on the collected log (:meth:`collect`).

        Parameters
        ----------
        stop : _StopFlag
            Polled after every iteration.

        Returns
        -------
        dict
            The pass's summary (:func:`fit_full_batch`).

        Raises
        ------
        Interrupted
            On SIGINT/SIGTERM, keeping the checkpoint of the last finished pass.
        """
        fitted, = fit_full_batch([self], self.memory, stop)
        if fitted["stopped"]:
            raise self._stopped_in_full_batch(stop.signal)
        return fitted

    def _stopped_in_full_batch(self, signum: int) -> Interrupted:
        st = self.state
        return Interrupted(f"{signal.Signals(signum).name}: stopped in full-batch pass {st.pass_index + 1}; "
                           f"the checkpoint of pass {st.pass_index} in {self.folder.checkpoint} is kept; "
                           "continue with the same command plus --resume")

    def _diverged(self, exc: Diverged, batch) -> Diverged:
        """The solver's Diverged message, naming a numeric column without edges whose huge values in
        the diverging batch are the likely cause."""
        worst, name = HUGE_NUMERIC, None
        for column, bucket in self.reader.featurizer.value_buckets().items():
            at = batch.indices == bucket
            big = float(np.abs(batch.data[at]).max()) if at.any() else 0.0
            if big > worst:
                worst, name = big, column
        if name is None:
            return exc
        return Diverged(f"{exc}; column '{name}' reaches {worst:.3g} in that batch: give it \"transform\": "
                        "\"log1p\" or \"edges\" in the spec")

    def take(self, batch, first=None) -> bool:
        """Count one batch of the current pass and step the solver on it (:meth:`count`, :meth:`step`).

        Parameters
        ----------
        batch : trainer.reader.stream.Batch
            The pass's next batch.
        first : concurrent.futures.Future, optional
            See :meth:`step`.

        Returns
        -------
        bool
            True when ``checkpoint_every`` rows have gone by since the last checkpoint (the caller saves one).

        Raises
        ------
        Diverged
            When the step would make the loss, gradient or weights non-finite.
        """
        due = self.count(batch)
        self.step(batch, first)
        return due

    def count(self, batch) -> bool:
        """Count one batch of the current pass: rows, reader position, first-pass class counts and entries.

        Parameters
        ----------
        batch : trainer.reader.stream.Batch
            The pass's next batch.

        Returns
        -------
        bool
            True when ``checkpoint_every`` rows have gone by since the last checkpoint.
        """
        st = self.state
        if st.pass_index == 0:
            pos = int(np.count_nonzero(batch.labels))
            st.positives += pos
            st.negatives += batch.n_rows - pos
            st.entries += batch.indices.shape[0]
        st.rows_in_pass += batch.n_rows
        st.rows_total += batch.n_rows
        st.position = batch.position
        self._since_checkpoint += batch.n_rows
        return self._since_checkpoint >= self.opt.checkpoint_every

    def step(self, batch, first=None) -> None:
        """Step the solver on a batch :meth:`count` counted; add to the progressive loss, the progress
        curve and the iterate average.

        Parameters
        ----------
        batch : trainer.reader.stream.Batch
            The batch.
        first : concurrent.futures.Future, optional
            Resolves to the solver's ``first_gradient`` of the batch, computed on another thread (a
            sweep's values); else the step computes it.

        Raises
        ------
        Diverged
            When the step would make the loss, gradient or weights non-finite.
        """
        st = self.state
        try:
            loss = self.solver.step(batch, None if first is None else first.result())
        except Diverged as exc:
            raise self._diverged(exc, batch) from None
        w = float(batch.weights.sum())
        st.pv_loss += loss * w
        st.pv_weight += w
        self._window[0] += loss * w
        self._window[1] += w
        st.steps += 1
        st.pass_steps += 1
        st.batch_min = min(st.batch_min or batch.n_rows, batch.n_rows)
        st.batch_max = max(st.batch_max, batch.n_rows)
        if self.average is not None:
            self._average(batch.n_rows)
        point = self._point_rows
        if self._window[1] and (st.rows_in_pass // point) != ((st.rows_in_pass - batch.n_rows) // point):
            st.progress.append({"rows": st.rows_total, "loss": self._window[0] / self._window[1]})
            self._window = [0.0, 0.0]

    def interrupted(self, signum: int) -> Interrupted:
        """Save a checkpoint after a signal stopped an online pass; the Interrupted error to raise.

        Parameters
        ----------
        signum : int
            The signal.

        Returns
        -------
        trainer.errors.Interrupted
        """
        self.save_checkpoint()
        st = self.state
        return Interrupted(f"{signal.Signals(signum).name}: stopped in pass {st.pass_index + 1} after "
                           f"{st.rows_in_pass:,} rows; checkpoint saved in {self.folder.checkpoint}; continue "
                           "with the same command plus --resume")

    def progress_text(self) -> str:
        """The progress bar's note.

        Returns
        -------
        str
            The pass's progressive loss so far.
        """
        st = self.state
        return f"progressive loss {st.pv_loss / st.pv_weight:.5f}"

    def batch_sizes(self):
        """The rows of each online batch of the pass about to run: ``batch_rows``, or in the default
        solver's phases :func:`grown_batch_rows` of the rows seen (module docstring).

        Returns
        -------
        callable
            ``sizes(rows)`` for :meth:`trainer.reader.stream.Reader.batches`: the next batch's rows after
            ``rows`` rows of this pass's reading (from its start or its resume position).
        """
        start, rows = self.state.rows_total, self.opt.batch_rows
        if not self.opt.phased:
            return lambda read: rows
        return lambda read: grown_batch_rows(start + read, rows)

    def _one_pass(self, stop: _StopFlag) -> None:
        st = self.state
        bar = tqdm(total=self.reader.total_rows, initial=st.rows_in_pass, unit="rows", unit_scale=True,
                   desc=f"pass {st.pass_index + 1}/{self.opt.epochs}",
                   disable=self.quiet or not sys.stderr.isatty(),
                   mininterval=0.5, leave=False, dynamic_ncols=True)
        shown = -math.inf
        for batch in self.reader.batches(st.pass_index, st.position, sizes=self.batch_sizes()):
            if self.take(batch):
                self.save_checkpoint()
            bar.update(batch.n_rows)
            if time.monotonic() - shown > 0.5:
                bar.set_postfix_str(self.progress_text())
                shown = time.monotonic()
            if stop.signal is not None:
                bar.close()
                raise self.interrupted(stop.signal)
        bar.close()

    def finish_pass(self, train_seconds: float, fitted: dict | None = None) -> None:
        """Evaluate, record and checkpoint the pass just run.

        Parameters
        ----------
        train_seconds : float
            The pass's time reading and stepping.
        fitted : dict, optional
            A full-batch pass's summary (None after an online pass).
        """
        self.check_classes()
        started = time.monotonic()
        model = holdout = None
        if self.holdout is not None:
            model = self.current_model()
            holdout = evaluate(model, self.holdout)
        record, improved = self.record_pass(train_seconds, time.monotonic() - started, fitted, holdout)
        if improved:
            self.folder.save_model(self.kept(model, holdout))
            self._written = model
        self.folder.append_metrics(record)
        self.log(self.table_row(record))
        for line in self.notes(record):
            self.log(line)
        self.next_phase()
        self.save_checkpoint()

    def kept(self, model: Model, holdout: dict) -> Model:
        """The pass's model (built before :meth:`record_pass`) as the best so far: its holdout metrics and
        the pass counts recorded in its info, as model.json holds them.

        Parameters
        ----------
        model : Model
            The model :meth:`current_model` gave for the pass.
        holdout : dict
            Its holdout metrics.

        Returns
        -------
        Model
            ``model``, updated.
        """
        model.info["holdout"] = jsonable(holdout)
        model.info["summary"].update(passes=self.state.pass_index, best_pass=self.state.best_pass)
        return model

    def check_classes(self) -> None:
        """After the first pass: refuse a log of one class unless ``allow_one_class`` (a no-op later).

        Raises
        ------
        UserError
            Naming the log, the two counts and the label column.
        """
        st = self.state
        if st.pass_index == 0 and not self.opt.allow_one_class and not (st.positives and st.negatives):
            raise UserError(f"{self.data}: the training rows after the filters hold {st.negatives:,} negative "
                            f"and {st.positives:,} positive labels (column '{self.spec.label_column}'); a "
                            "response model needs both classes; --allow-one-class trains anyway")

    def record_pass(self, train_seconds: float, eval_seconds: float, fitted: dict | None,
                    holdout: dict | None) -> tuple[dict, bool]:
        """Close this value's pass (:meth:`end_pass`): its ``metrics.jsonl`` record, the best pass and
        the early stop.

        Parameters
        ----------
        train_seconds, eval_seconds : float
            The pass's time reading and stepping, and evaluating the holdout.
        fitted : dict or None
            A full-batch pass's summary (None after an online pass).
        holdout : dict or None
            The holdout metrics of the pass's model (None without a holdout).

        Returns
        -------
        tuple of (dict, bool)
            The record, and whether its holdout loss is the best so far (the caller keeps the model).
        """
        st = self.state
        record = {"pass": st.pass_index + 1, "rows": st.rows_in_pass, "rows_total": st.rows_total,
                  "progressive_loss": st.pv_loss / st.pv_weight if st.pv_weight else None,
                  "holdout": holdout, "train_seconds": train_seconds, "eval_seconds": eval_seconds,
                  "phase": "online" if fitted is None else "full-batch"}
        if fitted is None:
            record.update(steps=st.pass_steps, batch_rows=[st.batch_min, st.batch_max])
        else:
            record["full_batch"] = {k: fitted[k] for k in ("iterations", "evaluations", "objective", "converged")}
        self.end_pass()
        st.pv_loss, st.pv_weight = 0.0, 0.0
        self._window = [0.0, 0.0]
        if holdout is None:
            return record, False
        score = _holdout_score(holdout, self.opt.loss)
        if st.best_score is None or score < st.best_score:
            st.best_score, st.best_pass, st.bad_passes = score, st.pass_index, 0
            return record, True
        st.bad_passes += 1
        self.patience_stop()
        return record, False

    def patience_stop(self) -> None:
        """Stop early when the holdout loss has not improved for ``--patience`` passes and passes remain
        (a pass end's decision, taken again on a resume at a pass end for this run's ``--epochs`` and
        ``--patience``: a run that stopped early goes on when resumed with a patience it has not used up,
        as a run started with it would have)."""
        st = self.state
        st.stopped_early = st.bad_passes >= self.opt.patience and st.pass_index < self.opt.epochs

    def end_pass(self) -> None:
        """Count a finished pass: the pass index, the position back to the start, the pass's step counts."""
        st = self.state
        st.pass_index += 1
        st.position, st.rows_in_pass = None, 0
        st.pass_steps, st.batch_min, st.batch_max = 0, 0, 0

    def notes(self, record: dict, who: str = "") -> list[str]:
        """The lines that follow a pass's table row: a predicted/observed ratio outside ``CALIBRATED``,
        an early stop.

        Parameters
        ----------
        record : dict
            The pass's record (:meth:`record_pass`).
        who : str, optional
            Text naming the value, after "pass N" and "early stop" (a sweep's).

        Returns
        -------
        list of str
        """
        st, lines = self.state, []
        ratio = _off_calibration(record["holdout"])
        if ratio is not None:
            lines.append(f"  ! pass {record['pass']}{who}: the holdout's mean prediction is {ratio:.2f}x its "
                         f"observed rate (outside [{CALIBRATED[0]}, {CALIBRATED[1]}]): not calibrated yet")
        if st.stopped_early:
            lines.append(f"early stop{who}: holdout loss has not improved for {st.bad_passes} pass(es); "
                         f"keeping the weights of pass {st.best_pass}")
        return lines

    def next_phase(self) -> None:
        """After the first online pass: switch to full-batch passes when the hashed log fits the budget."""
        st = self.state
        if st.pass_index == 1 and st.phase == "online" and self.opt.phased and self.opt.epochs > 1:
            size = full_batch.log_bytes(st.rows_total, st.entries)
            if size <= self._budget():
                self._choose_phase("full-batch", f"the hashed log takes {size / 2**20:.0f} MB in memory, within "
                                   f"--full-batch-memory {self.opt.full_batch_memory} MB")

    def _final_model(self) -> Model:
        """The run's model (:meth:`finish_in`) in the folder."""
        return self.finish_in(self.folder.path)

    def finish_in(self, folder: Path) -> Model:
        """The run's model, with its final summary, saved in ``folder``: the solver's current one
        without a holdout, else the best pass's (still in memory when the last pass was the best, else
        read back from ``folder``); not written again when ``folder`` already holds it as it is.

        Parameters
        ----------
        folder : Path
            The model folder the passes wrote.

        Returns
        -------
        Model
        """
        if self.holdout is None:
            model, saved = self.current_model(), False
        else:
            model = self._written or load_model(folder)
            saved = all(model.info["summary"].get(k) == v for k, v in self._final_summary().items())
        final = self.finished(model)
        if final is not model or not saved:
            final.save(folder)
        return final

    def _final_summary(self) -> dict:
        st = self.state
        return {"passes": st.pass_index, "stopped_early": st.stopped_early, "best_pass": st.best_pass}

    def finished(self, model: Model) -> Model:
        """The final form of the kept model: a squared-hinge model with a holdout gets its Platt
        calibration, and the summary says how training ended.

        Parameters
        ----------
        model : Model
            The model kept (the best pass's with a holdout, else the last).

        Returns
        -------
        Model

        References
        ----------
        "Probabilistic Outputs for Support Vector Machines and Comparisons to Regularized Likelihood
        Methods", Advances in Large Margin Classifiers, MIT Press, 1999.
        """
        if self.opt.loss == "squared-hinge" and self.holdout is not None:
            margins, labels, weights = [], [], []
            rows = 0
            for batch in self.holdout.batches():
                margins.append(model.margin(batch))
                labels.append(batch.labels)
                weights.append(batch.weights)
                rows += batch.n_rows
                if rows >= PLATT_ROWS:
                    break
            a, b = fit_platt(np.concatenate(margins), np.concatenate(labels), np.concatenate(weights))
            calibration = {"method": "platt", "a": a, "b": b, "fitted_on": self.holdout_path, "rows": rows}
            model = Model(model.spec, model.weights, model.intercept, model.loss,
                          {**model.info, "calibration": calibration})
        model.info["summary"].update(self._final_summary())
        return model

    def _result(self, model: Model) -> TrainResult:
        st = self.state
        records = self.folder.metrics()
        if st.stopped_early:
            reason = (f"early stop: holdout loss did not improve for {st.bad_passes} pass(es); "
                      f"kept the weights of pass {st.best_pass}")
        else:
            reason = f"reached --epochs {self.opt.epochs}"
        return TrainResult(model, self.folder.path, st.pass_index, records, st.best_pass, st.stopped_early, reason,
                           sum(r["train_seconds"] for r in records), sum(r["eval_seconds"] for r in records),
                           l2_strength=self.opt.l2_strength)

    # -- the per-pass table -------------------------------------------------------------------------

    def log(self, line: str) -> None:
        """Print one line of the per-pass table (or a note about the run) unless quiet.

        Parameters
        ----------
        line : str
            The line.
        """
        if not self.quiet:
            print(line, flush=True)

    #: Whether the per-pass table has a column naming each row's L2 strength (a sweep's rows).
    value_column = False

    def table_header(self) -> str:
        """The per-pass table's header line (the columns of :meth:`table_row`)."""
        value = f" {'l2':>9}" if self.value_column else ""
        return (f"{'pass':>4}{value} {'rows':>11} {'train loss':>11} {'holdout loss':>13} {'norm.ent':>9} "
                f"{'AUC':>7} {'pred/obs':>9} {'error':>7} {'train s':>8} {'eval s':>7}  {'phase':<10}")

    def table_row(self, rec: dict) -> str:
        """One pass's line of the per-pass table; a predicted/observed ratio outside ``CALIBRATED`` is marked "!".

        Parameters
        ----------
        rec : dict
            The pass's ``metrics.jsonl`` record (with ``l2_strength`` in a table of :attr:`value_column`).

        Returns
        -------
        str
        """
        value = f" {l2_label(rec['l2_strength']):>9}" if self.value_column else ""
        h = rec["holdout"] or {}
        margin = h.get("margin", {})
        loss = h.get("log_loss", h.get("squared_hinge_loss"))
        flagged = _off_calibration(h) is not None

        f = format_cell
        return (f"{rec['pass']:>4}{value} {rec['rows']:>11,} {f(rec['progressive_loss'], '11.5f')} "
                f"{f(loss, '13.5f')} "
                f"{f(h.get('normalized_entropy'), '9.4f')} {f(h.get('auc', margin.get('auc')), '7.4f')} "
                f"{f(h.get('calibration_ratio'), '8.4f')}{'!' if flagged else ' '} {f(h.get('error_rate', margin.get('error_rate')), '7.4f')} "
                f"{rec['train_seconds']:8.1f} {rec['eval_seconds']:7.1f}  {_phase_text(rec):<10}")
