"""Several L2 strengths from one read of the log: ``--l2-strength A,B,C`` (up to ``MAX_VALUES``) or ``auto``.

Each batch is read and hashed once and stepped by one solver per value, one after another
(:class:`SweepTrainer`), the values' first gradients of the batch computed side by side on numba's
threads before their steps. A value's training is exactly a single-value run's with the same options
and seed: its solver, iterate average, phases (the in-memory log of the full-batch passes is collected
once and shared), early stop and best pass are a :class:`trainer.training.Trainer`'s, so its weights
are bit for bit those of that run. The values' full-batch passes run in lockstep
(:func:`trainer.solvers.full_batch.minimize`): one pass over the in-memory log per group of values, the
groups on numba's threads, evaluates every value waiting for an evaluation. On the 1M-row benchmark
(``scripts/bench_train.py --sweep``, 3 passes; three runs of three rounds) the 5 values of the auto
grid as a list took 2.38x one value's median wall time over the nine rounds (runs' medians 2.09x-2.57x)
and ``auto`` 1.90x (the README's Performance section has the history). A value that stops early stops
stepping; training ends when every value has stopped or ``--epochs`` is reached. The holdout, required,
is read once per pass for all values. The value of the lowest best-pass holdout loss (log-loss;
squared-hinge loss for that loss) is kept as the folder's model; every value's model is in
``MODEL_DIR/l2/<value>/`` (:meth:`trainer.run_folder.RunFolder.value_folder`). One checkpoint holds
every value's state.

``auto`` is the grid ``AUTO_GRID``, five values a factor of about 3 apart centred on the default
1e-4 (1e-5, 3e-5, 1e-4, 3e-4, 1e-3). After pass 1 it narrows (:func:`narrowed`): a value whose
holdout loss exceeds the best value's by more than ``AUTO_MARGIN`` (relative) stops stepping, unless
it is the best's neighbour on the grid (the best of later passes can still move one step). When the
kept value lies at an edge of the values tried, the closing lines say so and suggest the grid
centred on it (:func:`edge_note`).

Memory: each value keeps its solver's state, iterate average, best pass's model and full-batch
workspace (:func:`value_bytes`; 372 bytes a bucket at the default options). A sweep whose values
would take more than ``BUDGET_SHARE`` of the machine's physical memory is refused before anything is
read (:func:`check_budget`). While the holdout is scored, each value's metric accumulators add about
28 MB.
"""

from __future__ import annotations

import dataclasses
import math
import os
import time
from concurrent.futures import ThreadPoolExecutor, wait
from contextlib import nullcontext
from pathlib import Path

import numba
import numpy as np

from trainer.errors import Diverged, UserError
from trainer.evaluation import evaluate_many
from trainer.model import Model
from trainer.run_folder import l2_label
from trainer.options import check_float
from trainer.solvers import solver_bytes
from trainer.solvers.full_batch import workspace_bytes
from trainer.spec import Spec
from trainer.training import TrainOptions, Trainer, TrainResult, _State, _StopFlag, fit_full_batch

AUTO = "auto"
#: Most values of one sweep.
MAX_VALUES = 8
#: After pass 1 of ``auto``, a value this much (relative) above the best holdout loss stops stepping,
#: unless it is the best's neighbour on the grid.
AUTO_MARGIN = 0.01
#: A sweep's solvers may take at most this share of the physical memory.
BUDGET_SHARE = 0.5


def grid(centre: float) -> tuple[float, ...]:
    """Five L2 strengths a factor of about 3 apart centred on ``centre``: the half decades
    ``centre * 10^(k/2)``, k = -2..2, rounded to one significant digit (values above 1e6 left out).

    Parameters
    ----------
    centre : float
        The middle value (> 0).

    Returns
    -------
    tuple of float
        Ascending; ``grid(1e-4)`` is (1e-5, 3e-5, 1e-4, 3e-4, 1e-3).
    """
    values = (float(f"{centre * 10 ** (k / 2):.0e}") for k in range(-2, 3))
    return tuple(v for v in values if v <= 1e6)


#: The values of ``--l2-strength auto``: the grid centred on the default.
AUTO_GRID = grid(TrainOptions().l2_strength)


def l2_option(value):
    """``--l2-strength`` as given, in the form :class:`trainer.training.TrainOptions` takes.

    Parameters
    ----------
    value : float, str or sequence of float
        A number; text holding a number, numbers separated by commas, or "auto"; or a sequence.

    Returns
    -------
    float, tuple of float or str
        One value as it was given (a float for text); several as a tuple; "auto".

    Raises
    ------
    UserError
        Naming ``--l2-strength``, for text that is not a number list or "auto", more than
        ``MAX_VALUES`` values, a value out of [0, 1e6] or a value given twice.
    """
    if isinstance(value, str):
        if value.strip() == AUTO:
            return AUTO
        try:
            values = [float(part) for part in value.split(",")]
        except ValueError:
            raise UserError(f"--l2-strength must be a number, up to {MAX_VALUES} numbers separated by "
                            f"commas, or {AUTO}; got {value!r}") from None
    elif isinstance(value, (list, tuple)):
        values = list(value)
    else:
        return value
    if len(values) == 1:
        return values[0]
    if len(values) > MAX_VALUES:
        raise UserError(f"--l2-strength: {len(values)} values given; one run trains at most {MAX_VALUES}")
    values = tuple(check_float("--l2-strength", v, 0.0, 1e6) for v in values)
    twice = next((v for i, v in enumerate(values) if v in values[:i]), None)
    if twice is not None:
        raise UserError(f"--l2-strength: {twice!r} is given twice; give each value once")
    return values


def is_sweep(l2_strength) -> bool:
    """Whether an ``l2_strength`` option (:func:`l2_option`'s form) asks for several values.

    Parameters
    ----------
    l2_strength : float, tuple of float or str

    Returns
    -------
    bool
    """
    return isinstance(l2_strength, tuple) or l2_strength == AUTO


def value_bytes(n_buckets: int, options: TrainOptions) -> int:
    """Bytes one value of a sweep keeps while it trains: its solver's state
    (:func:`trainer.solvers.solver_bytes`), its best pass's model while the next pass runs (n_buckets + 1
    float64 values) and, in the default solver's phases, the iterate average (as many) and what its
    full-batch passes add (:func:`trainer.solvers.full_batch.workspace_bytes`; the values' passes run in
    lockstep, all at once).

    Parameters
    ----------
    n_buckets : int
        The model's buckets.
    options : TrainOptions
        The options (solver, history, phases).

    Returns
    -------
    int
    """
    phases = 8 * (n_buckets + 1) + workspace_bytes(n_buckets, options.history) if options.phased else 0
    return solver_bytes(options.solver, n_buckets, options.history) + 8 * (n_buckets + 1) + phases


def memory_budget() -> int:
    """Bytes a sweep's values may take: ``BUDGET_SHARE`` of the physical memory.

    Returns
    -------
    int
    """
    return int(BUDGET_SHARE * os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))


def check_budget(spec: Spec, options: TrainOptions, count: int) -> None:
    """Refuse a sweep whose values would take more than :func:`memory_budget`.

    Parameters
    ----------
    spec : Spec
        The feature spec (its buckets).
    options : TrainOptions
        The options.
    count : int
        The number of values.

    Raises
    ------
    UserError
        Naming ``--l2-strength``, the estimate and the budget.
    """
    each = value_bytes(spec.n_buckets, options)
    budget = memory_budget()
    if count * each > budget:
        mb = 2**20
        raise UserError(f"--l2-strength: {count} values need about {count * each / mb:,.0f} MB for their "
                        f"solvers and full-batch passes ({each / mb:,.0f} MB each at {spec.n_buckets:,} "
                        f"buckets, --solver {options.solver}, --history {options.history}), over the budget "
                        f"of {budget / mb:,.0f} MB (half of this machine's physical memory); "
                        "give fewer values, fewer hashing bits or a smaller --history")


def l2_values(l2_strength) -> tuple[float, ...]:
    """The values a sweep trains.

    Parameters
    ----------
    l2_strength : tuple of float or str
        :func:`l2_option`'s form of several values, or "auto".

    Returns
    -------
    tuple of float
        ``AUTO_GRID`` for "auto".
    """
    return AUTO_GRID if l2_strength == AUTO else tuple(l2_strength)


def _rank(score) -> float:
    """A holdout loss for ordering: an undefined one (None, NaN) comes last."""
    return score if isinstance(score, float) and not math.isnan(score) else math.inf


def narrowed(values: tuple[float, ...], scores: dict) -> list[float]:
    """The rule of ``auto`` after pass 1: the values that stop stepping.

    A value stops when its holdout loss exceeds the best one's by more than ``AUTO_MARGIN`` of it
    and it is not the best's neighbour in ``values``.

    Parameters
    ----------
    values : tuple of float
        The grid, ascending.
    scores : dict of float to float
        Each value's holdout loss after pass 1.

    Returns
    -------
    list of float
        In grid order.
    """
    best = min(values, key=lambda v: _rank(scores[v]))
    at = values.index(best)
    limit = _rank(scores[best]) * (1.0 + AUTO_MARGIN)
    return [v for i, v in enumerate(values) if abs(i - at) > 1 and _rank(scores[v]) > limit]


def edge_note(values: tuple[float, ...], kept: float) -> str | None:
    """What to say when the kept value is the smallest or largest tried, with the next grid to try.

    Parameters
    ----------
    values : tuple of float
        The values tried.
    kept : float
        The value kept.

    Returns
    -------
    str or None
        None when ``kept`` lies inside.
    """
    if kept not in (min(values), max(values)):
        return None
    side, other = ("smallest", "smaller") if kept == min(values) else ("largest", "larger")
    note = f"the kept l2 strength {l2_label(kept)} is the {side} tried: a {other} one may do better"
    if kept > 0:
        note += f"; next grid: --l2-strength {','.join(l2_label(v) for v in grid(kept))}"
    return note


class _Lane(Trainer):
    """One value of a sweep: a Trainer's own solver, training state and iterate average, on the sweep's
    readers and bucket examples.

    It owns no folder, readers or checkpoint, so ``Trainer.__init__`` (which opens them) is not called;
    the sweep calls only its value methods (``take``, ``record_pass``, ``notes``, ``current_model``,
    ``kept``, ``finish_in``, ``checkpoint_parts``, ``restore``), runs its full-batch passes with the
    others' (:func:`trainer.training.fit_full_batch`) and writes its files.
    """

    def __init__(self, sweep: SweepTrainer, value: float):
        self.sweep = sweep
        self.spec, self.data, self.holdout_path = sweep.spec, sweep.data, sweep.holdout_path
        self.opt = dataclasses.replace(sweep.opt, l2_strength=value)
        self.reader, self.holdout = sweep.reader, sweep.holdout
        self._since_checkpoint = 0
        self._written = None
        self._make_state()

    @property
    def value(self) -> float:
        """The L2 strength."""
        return self.opt.l2_strength

    @property
    def examples(self):
        """The sweep's bucket examples."""
        return self.sweep.examples

    def example_texts(self):
        """The sweep's bucket examples as models hold them (one for all values)."""
        return self.sweep.example_texts()

    def from_weights(self) -> bool:
        """Whether the sweep has run a full-batch pass (its state holds the phases)."""
        return self.sweep.from_weights()

    @property
    def _point_rows(self) -> int:
        return self.sweep._point_rows


class SweepTrainer(Trainer):
    """A training run of several L2 strengths into one model folder (see the module docstring).

    Parameters
    ----------
    spec, data, out, options, holdout, resume, force, quiet
        As :class:`trainer.training.Trainer`; ``options.l2_strength`` is a tuple of values or "auto"
        (:func:`l2_option`).

    Raises
    ------
    UserError
        As :class:`trainer.training.Trainer`, and before reading anything for a sweep without a holdout
        or over the memory budget (:func:`check_budget`).
    """

    value_column = True

    def __init__(self, spec: Spec, data: str | Path, out: str | Path, options: TrainOptions, *,
                 holdout: str | Path | None = None, resume: bool = False, force: bool = False,
                 quiet: bool = False):
        options.validate()
        self.values = l2_values(options.l2_strength)
        if self.holdout_of(data, holdout, options) is None:
            raise UserError("--l2-strength: several values need a holdout to choose among them; give "
                            "--holdout PATH, or --holdout-start/--holdout-end days of --data")
        check_budget(spec, options, len(self.values))
        self.auto = options.l2_strength == AUTO
        self.narrowed: list[float] | None = None  # auto's rule not applied yet
        self._pool = None
        self._bits = np.zeros((spec.n_buckets + 63) // 64, dtype=np.uint64)
        super().__init__(spec, data, out, options, holdout=holdout, resume=resume, force=force, quiet=quiet)

    def _make_state(self) -> None:
        self.state = _State()
        self.lanes = [_Lane(self, v) for v in self.values]

    @property
    def stepping(self) -> list[_Lane]:
        """The values still training (not stopped early, nor by the ``auto`` rule)."""
        return [lane for lane in self.lanes if not lane.state.stopped_early]

    # -- the passes -------------------------------------------------------------------------------

    def take(self, batch) -> bool:
        """Step every value still training on one batch, one after another, and count it; on several
        threads (:meth:`_one_pass`), the values' first gradients are computed side by side before.

        Parameters
        ----------
        batch : trainer.reader.stream.Batch
            The pass's next batch.

        Returns
        -------
        bool
            True when ``checkpoint_every`` rows have gone by since the last checkpoint.

        Raises
        ------
        Diverged
            Naming the value whose step would make the loss, gradient or weights non-finite.
        """
        lanes = self.stepping
        firsts = [None] * len(lanes)
        if self._pool is not None:
            batch.support(self._bits)
            firsts = [self._pool.submit(lane.solver.first_gradient, batch) for lane in lanes]
            wait(firsts)
        for lane, first in zip(lanes, firsts):
            try:
                lane.take(batch, first)
            except Diverged as exc:
                raise Diverged(f"--l2-strength {l2_label(lane.value)}: {exc}") from None
        return self.count(batch)

    def _one_pass(self, stop: _StopFlag) -> None:
        """An online pass (:meth:`trainer.training.Trainer._one_pass`), the values' first gradients of
        each batch on numba's threads side by side, before their steps (one after another)."""
        threads = min(len(self.stepping), numba.get_num_threads())
        with ThreadPoolExecutor(threads) if threads > 1 else nullcontext() as pool:
            self._pool = pool
            try:
                super()._one_pass(stop)
            finally:
                self._pool = None  # no pass, no pool: take() outside a pass steps one thread

    def progress_text(self) -> str:
        """The progress bar's note.

        Returns
        -------
        str
            Each value's progressive loss so far in the pass.
        """
        losses = (f"{l2_label(lane.value)} {lane.state.pv_loss / lane.state.pv_weight:.5f}"
                  for lane in self.stepping if lane.state.pv_weight)
        return "progressive loss " + ", ".join(losses)

    def full_batch_pass(self, stop: _StopFlag) -> dict:
        """One full-batch pass of every value still training, on the log collected once, the values in
        lockstep (:func:`trainer.training.fit_full_batch`: one read of the log evaluates every value
        waiting for an evaluation, and each value's weights are those of a pass run alone).

        Parameters
        ----------
        stop : _StopFlag
            Polled after every iteration.

        Returns
        -------
        dict of float to dict
            Each value's summary.

        Raises
        ------
        Interrupted
            On SIGINT/SIGTERM, keeping the checkpoint of the last finished pass.
        """
        lanes = self.stepping
        fitted = dict(zip((lane.value for lane in lanes), fit_full_batch(lanes, self.memory, stop)))
        if any(f["stopped"] for f in fitted.values()):
            raise self._stopped_in_full_batch(stop.signal)
        return fitted

    def finish_pass(self, train_seconds: float, fitted: dict | None = None) -> None:
        """Evaluate every value still training on one read of the holdout, record and checkpoint the pass.

        Every value's record of the pass carries the pass's ``train_seconds`` and ``eval_seconds``.

        Parameters
        ----------
        train_seconds : float
            The pass's time reading and stepping.
        fitted : dict of float to dict, optional
            Each value's full-batch summary (None after an online pass).
        """
        self.check_classes()
        lanes = self.stepping
        started = time.monotonic()
        models = [lane.current_model() for lane in lanes]
        summaries = evaluate_many(models, self.holdout)
        eval_seconds = time.monotonic() - started
        records = []
        for lane, model, holdout in zip(lanes, models, summaries):
            full = (fitted or {}).get(lane.value)
            record, improved = lane.record_pass(train_seconds, eval_seconds, full, holdout)
            lane._written = model if improved else None  # as a run of the value alone, until its next pass
            if improved:
                lane.kept(model, holdout).save(self.folder.value_folder(lane.value))
            records.append({"l2_strength": lane.value, **record})
        self.folder.append_metrics(*records)
        for lane, record in zip(lanes, records):
            self.log(self.table_row(record))
            for line in lane.notes(record, f" (l2 {l2_label(lane.value)})"):
                self.log(line)
        self.end_pass()
        self._decide()
        self.save_checkpoint()

    def _decide(self) -> None:
        """A pass end's decisions that look at the passes left: ``auto``'s narrowing after pass 1 (once),
        the sweep's stop when no value steps any more, the switch to full-batch passes."""
        st = self.state
        if self.auto and self.narrowed is None and st.pass_index == 1 and st.pass_index < self.opt.epochs:
            self._narrow()
        st.stopped_early = not self.stepping and st.pass_index < self.opt.epochs
        self.next_phase()

    def _narrow(self) -> None:
        """Stop the values that :func:`narrowed` names after pass 1; say so in the log and in run.json."""
        scores = {lane.value: lane.state.best_score for lane in self.lanes}
        self.narrowed = narrowed(self.values, scores)
        for lane in self.lanes:
            if lane.value in self.narrowed:
                lane.state.stopped_early = True
        if self.narrowed:
            best = min(self.values, key=lambda v: _rank(scores[v]))
            self.log(f"auto: l2 {', '.join(l2_label(v) for v in self.narrowed)} stop after pass 1: holdout "
                     f"loss more than {AUTO_MARGIN:.0%} above the best ({l2_label(best)}: "
                     f"{scores[best]:.5f}) and not next to it on the grid")
        self._write_sweep()

    # -- the checkpoint ---------------------------------------------------------------------------

    def save_checkpoint(self) -> None:
        """Write every value's state, and the run's, to the one ``checkpoint.bin`` (atomically), and the
        values' progress curves (each point with its ``l2_strength``) to ``progress.json``."""
        arrays, lanes, progress = {}, [], []
        for lane in self.lanes:
            parts, state = lane.checkpoint_parts()
            arrays.update({f"l2/{l2_label(lane.value)}/{k}": v for k, v in parts.items()})
            lanes.append(state)
            progress += [{"l2_strength": lane.value, **point} for point in lane.state.progress]
        meta = {"state": self.state.to_json(), "lanes": lanes, "narrowed": self.narrowed}
        self.write_checkpoint(arrays, meta, progress)

    def _load_checkpoint(self) -> None:
        arrays, meta = self._read_checkpoint()
        self.state = _State.from_json(meta["state"])
        for lane, state in zip(self.lanes, meta["lanes"]):
            prefix = f"l2/{l2_label(lane.value)}/"
            lane.restore({k[len(prefix):]: v for k, v in arrays.items() if k.startswith(prefix)}, state)
        self.narrowed = meta["narrowed"]
        self._resumed(meta)
        if self.state.position is None:
            for lane in self.lanes:
                if lane.state.pass_index == self.state.pass_index and lane.value not in (self.narrowed or ()):
                    lane.patience_stop()
            self._decide()

    # -- the end ----------------------------------------------------------------------------------

    def _final_model(self) -> Model:
        """Finish every value's model in its folder, keep the best as the folder's model, say which."""
        models = {lane.value: lane.finish_in(self.folder.value_folder(lane.value)) for lane in self.lanes}
        self.kept = min(self.lanes, key=lambda lane: _rank(lane.state.best_score))
        model = models[self.kept.value]
        self.folder.save_model(model)
        name = "log-loss" if self.opt.loss == "logistic" else "loss"
        for lane in self.lanes:
            s = lane.state
            self.log(f"l2 {l2_label(lane.value)}: best holdout {name} {s.best_score:.5f} at pass "
                     f"{s.best_pass} ({self._stopped(lane)})")
        self.log(f"kept l2 strength {l2_label(self.kept.value)}, the best holdout {name}; each value's model "
                 f"is in {self.folder.path / 'l2'}")
        note = edge_note(self.values, self.kept.value)
        if note:
            self.log(note)
        self._write_sweep(kept=self.kept.value, kept_pass=self.kept.state.best_pass,
                          kept_holdout_loss=self.kept.state.best_score, note=note)
        return model

    def _stopped(self, lane: _Lane) -> str:
        """Why a value stopped stepping, in words."""
        if lane.value in (self.narrowed or ()):
            return "stopped after pass 1 by the auto rule"
        if lane.state.stopped_early:
            return f"early stop after pass {lane.state.pass_index}"
        return f"reached --epochs {self.opt.epochs}"

    def _write_sweep(self, **end) -> None:
        """The ``sweep`` entry of run.json: the values, the auto rule and what it stopped, and at the end the
        kept value (``end``)."""
        sweep = {"values": list(self.values), "auto": self.auto, "narrowed": self.narrowed or [], **end}
        if self.auto:
            sweep["rule"] = (f"after pass 1, a value whose holdout loss exceeds the best's by more than "
                             f"{AUTO_MARGIN:.0%} stops, unless it is the best's neighbour on the grid")
        self.folder.write_run({**(self.folder.read_run() or {}), "sweep": sweep})

    def _result(self, model: Model) -> TrainResult:
        st, kept = self.state, self.kept
        records = self.folder.metrics()
        per_pass = lambda key: sum({r["pass"]: r[key] for r in records}.values())  # noqa: E731
        sweep = [{"l2_strength": lane.value, "best_pass": lane.state.best_pass,
                  "holdout_loss": lane.state.best_score, "passes": lane.state.pass_index,
                  "stopped": self._stopped(lane), "model_dir": self.folder.value_folder(lane.value)}
                 for lane in self.lanes]
        reason = ("every value stopped before --epochs" if st.stopped_early
                  else f"reached --epochs {self.opt.epochs}")
        return TrainResult(model, self.folder.path, st.pass_index, records, kept.state.best_pass,
                           st.stopped_early, reason, per_pass("train_seconds"), per_pass("eval_seconds"),
                           l2_strength=kept.value, sweep=sweep)
