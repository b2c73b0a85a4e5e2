"""Scale-out on Dask: score, evaluate and train over a cluster (the optional ``dask`` extra).

This is the only module that imports ``dask`` / ``distributed``, and it does so inside functions:
the single-machine path never imports them. Every verb takes ``cluster``: a scheduler address
(``tcp://host:8786``), ``local:N`` (a ``distributed.LocalCluster`` of N worker processes, started
for the call and closed after it) or an existing ``distributed.Client`` (left open).

Work is cut into :class:`trainer.reader.Part` s (whole row groups of one file, at most
``PART_ROWS`` rows); each part is one task, read and hashed on a worker by the same reader
(:meth:`trainer.reader.Reader.for_part`) and scored by the same kernels as on one machine. Partial
results are added up by a fixed binary tree over the parts in input order
(:func:`_tree_reduce`), so a sum never depends on the number of workers, on which worker ran what,
or on a retry: the same inputs give the same bits.

* ``evaluate``: each part returns its :class:`trainer.evaluation.EvalState` (counts, sums, rank
  histograms), merged exactly, so the summary equals the single-machine one.
* ``score``: each part is scored into its own Parquet file of a dataset folder, written
  atomically by the worker; the manifest ``_parts.json`` is written last, by the driver.
* ``train``: the average-then-L-BFGS scheme of "A Reliable Effective Terascale Linear Learning
  System" (Journal of Machine Learning Research 15, 2014): every part (shard) is read and hashed
  once into worker memory (a Dask future per part, recomputed from the Parquet by Dask if a
  worker is lost), the online solver makes one pass over each shard, the driver averages the
  shard models weighted by their rows, then full-batch L-BFGS refines that point: at each point
  the workers return the loss and gradient sums of their shards, added up by the tree, and the
  driver runs scipy's L-BFGS-B iteration (the map-reduce gradient of "Large-scale L-BFGS using
  MapReduce", NeurIPS 2014, with the two-loop recursion on the driver).
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import logging
import math
import re
import time
import warnings
from pathlib import Path

import numpy as np
from numba import njit

from trainer.atomic import atomic_path, write_atomic
from trainer.errors import Interrupted, UserError
from trainer.evaluation import EvalState, accumulate, summarize
from trainer.export import sha256_file
from trainer.losses import d2loss, dloss, loss, loss_code
from trainer.model import Model
from trainer.reader import Part, Reader
from trainer.reader.examples import BucketExamples
from trainer.scoring import write_scores
from trainer.solvers import make_solver
from trainer.solvers.full_batch import LBFGSB
from trainer.sweep import is_sweep
from trainer.training import Trainer, TrainResult, _StopFlag

INSTALL = 'pip install -e ".[dask]"'
#: Seconds to wait for a scheduler before giving up on an address.
CONNECT_TIMEOUT = 5
MAX_LOCAL_WORKERS = 256
#: A part (one task) holds at most this many rows, unless one row group is larger.
PART_ROWS = 1_000_000
MANIFEST = "_parts.json"
_PART_FILE = re.compile(r"part-\d{5}\.parquet")


def _distributed():
    """The ``distributed`` package, or UserError with the install command when the extra is absent."""
    try:
        import distributed
    except ImportError:
        raise UserError(f"--cluster needs the optional Dask extra, which is not installed; install it with: "
                        f"{INSTALL}") from None
    return distributed


@contextlib.contextmanager
def connect(cluster):
    """A ``distributed.Client`` for a cluster.

    ``local:N`` starts N single-threaded worker processes and closes them on exit; an address is
    connected to within ``CONNECT_TIMEOUT`` seconds; a Client is used as it is and left open.

    Parameters
    ----------
    cluster : str or distributed.Client
        A scheduler address, ``local:N`` or a Client (see :func:`connect`).

    Yields
    ------
    distributed.Client

    Raises
    ------
    UserError
        Naming the address when it is malformed or no scheduler answers there, and when the ``dask``
        extra is not installed (with the command that installs it).
    """
    distributed = _distributed()
    if isinstance(cluster, distributed.Client):
        yield cluster
        return
    if not isinstance(cluster, str) or not cluster.strip():
        raise UserError(f"--cluster: expected tcp://HOST:PORT, local:N or a distributed.Client; got {cluster!r}")
    if cluster.startswith("local:"):
        count = cluster[len("local:"):]
        if not count.isdigit() or not 1 <= int(count) <= MAX_LOCAL_WORKERS:
            raise UserError(f"--cluster {cluster}: local:N needs a worker count N from 1 to {MAX_LOCAL_WORKERS}")
        with distributed.LocalCluster(n_workers=int(count), threads_per_worker=1, processes=True,
                                      dashboard_address=":0", silence_logs=logging.ERROR) as local, \
                distributed.Client(local) as client:
            yield client
        return
    if "://" not in cluster:
        raise UserError(f"--cluster {cluster}: expected a scheduler address such as tcp://HOST:8786, or local:N")
    try:
        client = distributed.Client(cluster, timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError, ValueError) as exc:
        reason = " ".join(str(exc).split()) or type(exc).__name__
        raise UserError(f"--cluster {cluster}: no Dask scheduler answered there ({reason})") from None
    with client:
        yield client


def _workers_ready(client) -> None:
    """Wait (briefly) until the cluster has at least one worker; UserError otherwise."""
    try:
        client.wait_for_workers(1, timeout=60)
    except TimeoutError:
        raise UserError(f"--cluster {client.scheduler.address}: the scheduler has no workers") from None


def _identity(value):
    """A task returning its argument: puts a value on the cluster as a recomputable result (scattered
    data is lost with the worker holding it; a task's result is recomputed)."""
    return value


def _put(client, value):
    """A future holding ``value`` on the cluster (a model or a weight vector travels once to the
    scheduler inside the task, which Dask would otherwise warn about as a large graph)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Sending large graph", category=UserWarning)
        return client.submit(_identity, value, pure=False)


def _map(client, func, items, *args) -> list:
    """One task per item, ``func(item, *args)``, in item order."""
    return [client.submit(func, item, *args, pure=False) for item in items]


def _tree_reduce(client, futures: list, combine):
    """The result of ``combine`` over ``futures`` by a fixed binary tree in list order: the grouping,
    and hence every floating-point sum, depends on the list alone. A UserError raised in a task
    comes back as one."""
    level = list(futures)
    while len(level) > 1:
        nxt = [client.submit(combine, level[i], level[i + 1], pure=False) for i in range(0, len(level) - 1, 2)]
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    return client.gather(level[0])


# ----------------------------------------------------------------------------------------------
# evaluate


def _merge_states(a: EvalState, b: EvalState) -> EvalState:
    return a.merge(b)


def _evaluate_part(part: Part, model: Model, reader: Reader, by: str | None):
    r = reader.for_part(part)
    state = accumulate(model, r.batches(), by=by)
    return state, r.counts.bad_labels, r.counts.rows


def _add_counted(a, b):
    return a[0].merge(b[0]), a[1] + b[1], a[2] + b[2]


def evaluate(cluster, model: Model, reader: Reader, *, by: str | None = None, segments: int = 20) -> tuple[dict, int]:
    """The evaluation summary computed over a cluster.

    One task per part, states merged exactly in input order.

    Parameters
    ----------
    cluster : str or distributed.Client
        A scheduler address, ``local:N`` or a Client (see :func:`connect`).
    model : Model
        The model.
    reader : Reader
        The labelled input (keeping ``by``).
    by : str, optional
        A column to split the metrics by.
    segments : int, default 20
        With ``by``, the largest values listed.

    Returns
    -------
    tuple of (EvaluationResult, int)
        The summary of :func:`trainer.evaluation.evaluate` and the count of rows skipped for bad labels.

    Raises
    ------
    UserError
        As the single-machine path does, and when the filters leave no rows.
    """
    with connect(cluster) as client:
        _workers_ready(client)
        futures = _map(client, _evaluate_part, reader.parts(PART_ROWS), _put(client, model), _put(client, reader), by)
        state, bad, rows = _tree_reduce(client, futures, _add_counted)
    if rows == 0:
        raise UserError(f"{reader.path}: no rows left after the filters (dates {reader.start or '...'} to "
                        f"{reader.end or '...'})")
    return summarize(state, segments), bad


# ----------------------------------------------------------------------------------------------
# score


class _NoRows(Exception):
    """Raised inside a part's atomic write when the part has no rows, so no file appears."""


def _score_part(item: tuple[int, Part], model: Model, reader: Reader, keep: tuple[str, ...], out: str) -> dict:
    index, part = item
    r = reader.for_part(part)
    name = f"part-{index:05d}.parquet"
    target = Path(out) / name
    try:
        with atomic_path(target) as tmp:
            rows = write_scores(model, r, keep, tmp, Path(reader.path))
            if rows == 0:
                raise _NoRows
    except _NoRows:
        return {"file": None, "rows": 0, "sha256": None}
    return {"file": name, "rows": rows, "sha256": sha256_file(target)}


def _check_dataset_folder(out: Path, force: bool) -> list[Path]:
    """The files of an earlier score dataset in ``out`` to replace (``force``), or [] for a new or
    empty folder; UserError for anything else."""
    if not out.exists():
        return []
    if not out.is_dir():
        raise UserError(f"--out {out}: exists and is not a folder; with --cluster, score writes a dataset folder")
    entries = list(out.iterdir())
    ours = all(e.is_file() and (e.name == MANIFEST or _PART_FILE.fullmatch(e.name)
                                or (e.name.startswith(".part-") and e.name.endswith(".tmp"))) for e in entries)
    if entries and (not force or not ours):
        raise UserError(f"--out {out}: folder is not empty; "
                        + ("use --force to replace the scores written there" if ours else
                           "it holds files other than a score dataset, choose an empty or new folder"))
    return entries


def _prepare_dataset_folder(out: Path, old: list[Path]) -> None:
    """Create ``out``, or remove the earlier dataset's files ``old`` from it, manifest first, so an
    interrupted replacement never leaves a manifest."""
    out.mkdir(exist_ok=True)
    (out / MANIFEST).unlink(missing_ok=True)
    for e in old:
        e.unlink(missing_ok=True)


def score(cluster, model: Model, reader: Reader, out: Path, *, keep: tuple[str, ...], model_path: str | None,
          force: bool = False) -> dict:
    """Score a reader's input over a cluster into a dataset folder.

    One Parquet file ``part-NNNNN.parquet`` per part (rows in input order; each written atomically by
    its worker), then the manifest ``_parts.json`` (format, model, data, columns, total rows, and per
    part: file, input file, row groups, rows, SHA-256), written atomically last.

    Parameters
    ----------
    cluster : str or distributed.Client
        A scheduler address, ``local:N`` or a Client (see :func:`connect`).
    model : Model
        The model.
    reader : Reader
        The input, read without labels, keeping ``keep``.
    out : Path
        The dataset folder: new or empty, or with ``force`` an earlier score dataset.
    keep : tuple of str
        Columns copied beside the scores.
    model_path : str or None
        The model's folder, recorded in the manifest.
    force : bool
        Replace an earlier score dataset at ``out``.

    Returns
    -------
    dict
        ``{"rows", "out", "parts"}``.

    Raises
    ------
    UserError
        For a bad ``out`` folder, a cluster that cannot be reached, or filters that leave no rows.
    """
    old = _check_dataset_folder(out, force)
    with connect(cluster) as client:
        _workers_ready(client)
        _prepare_dataset_folder(out, old)
        parts = reader.parts(PART_ROWS)
        written = client.gather(_map(client, _score_part, enumerate(parts), _put(client, model), _put(client, reader),
                                     keep, str(out)))
    root = Path(reader.path)
    entries = []
    for p, w in zip(parts, written):
        src = reader.files[p.file].path
        entries.append({**w, "input": str(src.relative_to(root)) if src != root else src.name,
                        "row_groups": [p.first_group, p.end_group]})
    total = sum(e["rows"] for e in entries)
    if total == 0:
        raise UserError(f"{reader.path}: no rows left after the filters (dates {reader.start or '...'} to "
                        f"{reader.end or '...'})")
    columns = list(keep) + ["score"] + (["probability"] if model.loss == "squared-hinge" and model.has_probability
                                        else [])
    manifest = {"format": "hashcurve-scores", "version": 1, "model": model_path, "data": str(reader.path),
                "score": "probability" if model.loss == "logistic" else "margin", "columns": columns,
                "rows": total, "parts": entries}
    write_atomic(out / MANIFEST, [json.dumps(manifest, indent=1).encode()])
    return {"rows": total, "out": str(out), "parts": len(entries)}


# ----------------------------------------------------------------------------------------------
# train: worker side


def _load_part(item: tuple[int, Part], reader: Reader, examples: bool):
    """The hashed batches of one shard (pass 0's order: shuffled and sampled as on one machine),
    their rows, the readable bucket examples recorded while hashing (first shard only, when asked
    for) and the rows skipped for bad labels."""
    index, part = item
    ex = BucketExamples(reader.spec.n_buckets) if examples and index == 0 else None
    r = reader.for_part(part)
    if ex is not None:
        r.watch(ex)
    batches = []
    for b in r.batches():
        b.columns = None
        batches.append(b)
    return batches, r.counts.rows, (ex.values if ex is not None else None), r.counts.bad_labels


def _shard_counts(shard) -> tuple[int, int, int]:
    """Rows, rows skipped for bad labels, and positive rows of a cached shard."""
    return shard[1], shard[3], sum(int(np.count_nonzero(b.labels == 1.0)) for b in shard[0])


def _shard_examples(shard) -> dict | None:
    return shard[2]


def _add_pairs(a, b):
    return a[0] + b[0], a[1] + b[1]


def _add_triples(a, b):
    return a[0] + b[0], a[1] + b[1], a[2] + b[2]


def _online_part(shard, n: int, solver: dict):
    """One pass of the online solver over a cached shard, from zero: returns (rows, rows * x, the
    progressive-validation loss and weight sums), x the weights followed by the intercept."""
    batches, rows = shard[0], shard[1]
    if not rows:
        return 0, np.zeros(n + 1), 0.0, 0.0
    s = make_solver(solver["solver"], n, solver["loss"], solver["l2"], history=solver["history"],
                    step0=solver["step0"], seed=solver["seed"])
    pv_loss = pv_w = 0.0
    for b in batches:
        step_loss = s.step(b)
        w = float(b.weights.sum())
        pv_loss += step_loss * w
        pv_w += w
    x = np.empty(n + 1)
    x[:n] = s.weights
    x[n] = s.intercept
    return rows, rows * x, pv_loss, pv_w


def _add_online(a, b):
    return a[0] + b[0], a[1] + b[1], a[2] + b[2], a[3] + b[3]


@njit(cache=True, nogil=True)
def _add_gradient(code, indptr, indices, data, labels, weights, x, n, g):
    """Add the data gradient of one batch at x (weights then intercept at n) into ``g``: g[j] +=
    sum_i c_i l'(y_i, z_i) x_ij, g[n] += sum_i c_i l'_i; return (sum_i c_i l_i, sum_i c_i)."""
    loss_sum = 0.0
    weight_sum = 0.0
    b = x[n]
    for i in range(indptr.shape[0] - 1):
        z = b
        for k in range(indptr[i], indptr[i + 1]):
            z += data[k] * x[indices[k]]
        c = weights[i]
        loss_sum += c * loss(code, labels[i], z)
        weight_sum += c
        r = c * dloss(code, labels[i], z)
        for k in range(indptr[i], indptr[i + 1]):
            g[indices[k]] += r * data[k]
        g[n] += r
    return loss_sum, weight_sum


def _gradient_part(shard, x: np.ndarray, code: int):
    """Loss, weight and gradient sums of a cached shard at x (the same order every time)."""
    g = np.zeros(x.size)
    loss_sum = weight_sum = 0.0
    for b in shard[0]:
        ls, ws = _add_gradient(code, b.indptr, b.indices, b.data, b.labels, b.weights, x, x.size - 1, g)
        loss_sum += ls
        weight_sum += ws
    return loss_sum, weight_sum, g


@njit(cache=True, nogil=True)
def _add_curvature(code, indptr, indices, data, labels, weights, x, n, h):
    """Add the Gauss-Newton diagonal of one batch at x into ``h``: h[j] += sum_i c_i l''(y_i, z_i)
    x_ij^2 (entries of one bucket in a row counted apart), h[n] += sum_i c_i l''_i."""
    b = x[n]
    for i in range(indptr.shape[0] - 1):
        z = b
        for k in range(indptr[i], indptr[i + 1]):
            z += data[k] * x[indices[k]]
        c = weights[i] * d2loss(code, labels[i], z)
        for k in range(indptr[i], indptr[i + 1]):
            h[indices[k]] += c * data[k] * data[k]
        h[n] += c


def _curvature_part(shard, x: np.ndarray, code: int):
    """The Gauss-Newton diagonal sums of a cached shard at x, and its weight sum."""
    h = np.zeros(x.size)
    for b in shard[0]:
        _add_curvature(code, b.indptr, b.indices, b.data, b.labels, b.weights, x, x.size - 1, h)
    return h, float(sum(b.weights.sum() for b in shard[0]))


def _add_gradients(a, b):
    return a[0] + b[0], a[1] + b[1], a[2] + b[2]


def _holdout_part(shard, x: np.ndarray, spec, loss_name: str, log_keep_rate: float) -> EvalState:
    n = x.size - 1
    model = Model(spec, np.ascontiguousarray(x[:n]), float(x[n]) + log_keep_rate, loss_name)
    return accumulate(model, shard[0])


# ----------------------------------------------------------------------------------------------
# train: driver side


class Refinement:
    """Full-batch L-BFGS-B on the driver, one iteration at a time.

    Its complete state is in plain arrays so a checkpoint after any iteration resumes bit for bit. It
    drives scipy's L-BFGS-B through the reverse-communication routine behind
    ``scipy.optimize.minimize(method="L-BFGS-B")`` (:class:`trainer.solvers.full_batch.LBFGSB`, the
    driver of the single-machine full-batch passes too) with no bounds, ``history`` correction pairs
    and that function's default tolerances; its workspace (2 * history + 5 vectors of n + 1 float64)
    and ``scale`` are the state. It works on scaled variables u = x / scale with a fixed diagonal
    ``scale`` = D^(-1/2), D the Gauss-Newton diagonal of the objective at the start point (plus l2 on
    the weights), the diagonal preconditioner of "Efficient BackProp": bucket curvatures follow bucket
    frequencies, which span orders of magnitude in hashed logs (on the demo, 20 iterations from zero
    reach a holdout log-loss of 1.0007 LL* this way, 1.0028 LL* unscaled). ``weights`` and
    ``intercept`` are those of the current iterate x (the solver protocol's read side, so the trainer's
    model and checkpoint code apply).

    Parameters
    ----------
    n : int
        Buckets.
    loss_name : str
        The loss, recorded in the state.
    l2 : float
        The L2 strength.
    history : int
        Correction pairs.
    step0 : float
        The online pass's resolved initial step, for the record.

    References
    ----------
    "Algorithm 778: L-BFGS-B", ACM Transactions on Mathematical Software, 1997.
    "Efficient BackProp", Neural Networks: Tricks of the Trade, Springer, 1998.
    """

    method = "cluster-lbfgsb"
    FTOL = 2.220446049250313e-09
    GTOL = 1e-5
    NEW_POINT, EVALUATE, CONVERGED = LBFGSB.NEW_POINT, LBFGSB.EVALUATE, LBFGSB.CONVERGED

    def __init__(self, n: int, loss_name: str, l2: float, history: int, step0: float):
        self.n, self.loss_name, self.l2, self.history = n, loss_name, l2, history
        self.step0 = step0
        self.lbfgsb = LBFGSB(n + 1, history, self.FTOL, self.GTOL)
        workspace = self.lbfgsb.arrays
        self.arrays = {"u": workspace["u"], "scale": np.ones(n + 1),
                       **{k: v for k, v in workspace.items() if k != "u"}}

    @property
    def x(self) -> np.ndarray:
        """The current iterate: bucket weights, then the intercept (a new array)."""
        return self.arrays["u"] * self.arrays["scale"]

    @property
    def weights(self) -> np.ndarray:
        """Bucket weights of the current iterate, read-only."""
        v = self.x[: self.n]
        v.flags.writeable = False
        return v

    @property
    def intercept(self) -> float:
        """The intercept of the current iterate."""
        return float(self.arrays["u"][self.n] * self.arrays["scale"][self.n])

    @property
    def task(self) -> int:
        """L-BFGS-B's task code after the last call (``NEW_POINT``, ``EVALUATE``, ``CONVERGED``, ...)."""
        return self.lbfgsb.task

    def start(self, x0: np.ndarray, curvature: np.ndarray) -> None:
        """Begin at a start point, scaled by the objective's diagonal there.

        Parameters
        ----------
        x0 : numpy.ndarray
            Weights then intercept.
        curvature : numpy.ndarray
            The data part of the objective's diagonal at x0; l2 is added to the weights' entries, and every
            entry is kept >= 1e-12.
        """
        d = curvature.copy()
        d[: self.n] += self.l2
        self.arrays["scale"][:] = 1.0 / np.sqrt(np.maximum(d, 1e-12))
        self.arrays["u"][:] = x0 / self.arrays["scale"]
        self.arrays["task"][:] = 0

    def iterate(self, fg) -> int:
        """Run L-BFGS-B until it accepts a new point or stops; ``task`` then says which.

        Parameters
        ----------
        fg : callable
            ``fg(x) -> (f, g)``: objective and gradient in x, called for every point L-BFGS-B asks for.

        Returns
        -------
        int
            The number of calls of ``fg``.
        """
        a = self.arrays
        calls = 0
        while self.lbfgsb.call() == self.EVALUATE:
            f, g = fg(self.x)
            a["f"][...] = f
            a["g"][:] = g * a["scale"]
            calls += 1
        return calls

    def state(self, copy: bool = True) -> dict:
        """The complete state: settings and the L-BFGS-B workspace arrays.

        Parameters
        ----------
        copy : bool, default True
            Copy the arrays (else they are the live ones).

        Returns
        -------
        dict
        """
        st = {"method": self.method, "loss": self.loss_name, "n_features": self.n, "l2": self.l2,
              "history": self.history, **self.arrays}
        return {k: v.copy() if copy and isinstance(v, np.ndarray) else v for k, v in st.items()}

    def load_state(self, state: dict) -> None:
        """Restore a :meth:`state` exactly.

        Parameters
        ----------
        state : dict
            A :meth:`state` with the same method, loss, size, l2 and history.

        Raises
        ------
        UserError
            When a setting differs.
        """
        expected = {"method": self.method, "loss": self.loss_name, "n_features": self.n, "l2": self.l2,
                    "history": self.history}
        for key, mine in expected.items():
            theirs = state.get(key)
            theirs = theirs.item() if isinstance(theirs, np.generic) else theirs
            if theirs != mine:
                raise UserError(f"checkpoint was written with {key} = {theirs!r} but this run uses {mine!r}")
        for key, arr in self.arrays.items():
            arr[...] = state[key]


class ClusterTrainer(Trainer):
    """A training run whose passes run on a Dask cluster.

    Pass 1 is one online pass per shard, averaged by rows; every later pass is one full-batch L-BFGS-B
    iteration (see the module docstring). Same model folder, per-pass table, metrics, checkpoints and
    export as :class:`trainer.training.Trainer`; the checkpoint after each pass resumes bit for bit.

    Parameters
    ----------
    client : distributed.Client
        The cluster.
    *args, **kwargs
        As :class:`trainer.training.Trainer`.
    """

    def __init__(self, client, *args, **kwargs):
        self.client = client
        super().__init__(*args, **kwargs)

    def _prepare_folder(self, force: bool) -> None:
        o = self.opt
        self.solver = Refinement(self.spec.n_buckets, o.loss, o.l2_strength, o.history, self.solver.step0)
        super()._prepare_folder(force)

    def _fingerprint(self) -> dict:
        return {**super()._fingerprint(), "cluster": True}

    def _load(self, reader: Reader, examples: bool) -> list:
        return _map(self.client, _load_part, enumerate(reader.parts(PART_ROWS)), _put(self.client, reader), examples)

    def _holdout(self, x: np.ndarray) -> dict | None:
        if not self._holdout_shards:
            return None
        futures = _map(self.client, _holdout_part, self._holdout_shards, _put(self.client, x), self.spec,
                       self.opt.loss, math.log(self.opt.negative_keep_rate))
        return summarize(_tree_reduce(self.client, futures, _merge_states))

    def _objective(self, shards: list):
        """fg(x): the objective of the training package's docstring and its gradient at x, from
        the shards' sums; keeps the data part of the loss in ``_data_loss``."""
        code = loss_code(self.opt.loss)
        n, lam = self.spec.n_buckets, self.opt.l2_strength

        def fg(x):
            loss_sum, weight_sum, g = _tree_reduce(
                self.client, _map(self.client, _gradient_part, shards, _put(self.client, x), code), _add_gradients)
            g /= weight_sum
            w = x[:n]
            g[:n] += lam * w
            self._data_loss = loss_sum / weight_sum
            return self._data_loss + 0.5 * lam * float(w @ w), g

        return fg

    def _pass_done(self, started: float, evaluations: int, data_loss: float | None, pv: float | None) -> None:
        st = self.state
        eval_started = time.monotonic()
        holdout = self._holdout(self.solver.x)
        st.pass_index += 1
        st.steps += evaluations
        st.rows_total += self._rows * max(evaluations, 1)
        record = {"pass": st.pass_index, "phase": "online" if st.pass_index == 1 else "refine",
                  "rows": self._rows, "rows_total": st.rows_total, "progressive_loss": pv,
                  "full_batch_loss": data_loss, "evaluations": evaluations, "holdout": holdout,
                  "train_seconds": eval_started - started, "eval_seconds": time.monotonic() - eval_started}
        if holdout is not None:
            st.best_pass, st.best_score = st.pass_index, holdout.get("log_loss", holdout.get("squared_hinge_loss"))
        self.folder.save_model(self.current_model(holdout))
        self.folder.append_metrics(record)
        self.log(self.table_row({**record, "progressive_loss": pv if pv is not None else data_loss}))
        self.save_checkpoint()

    def run(self) -> TrainResult:
        """Train (pass 1, then the refinement iterations).

        Errors, locking and what a refused run keeps are as in :meth:`trainer.training.Trainer.run`.

        Returns
        -------
        TrainResult
            With the stopping reason: converged, or reached ``--refine-iterations``.

        Raises
        ------
        UserError
            As :meth:`trainer.training.Trainer.run`.
        """
        try:
            model = self._run()
            reason = ("full-batch L-BFGS converged" if self.solver.task == Refinement.CONVERGED
                      else f"reached --refine-iterations {self.opt.refine_iterations}")
            return dataclasses.replace(self._result(model), stopping_reason=reason)
        except UserError as exc:
            raise self._refused(exc) from None
        finally:
            self.folder.release()

    def _run(self) -> Model:
        st, opt = self.state, self.opt
        client = self.client
        _workers_ready(client)
        if st.pass_index == 0:
            self.log("pass 1: one online pass per shard, averaged by rows; passes 2..: full-batch L-BFGS "
                     "iterations (train loss: progressive in pass 1, full-batch after)")
            self.log(self.table_header())
        shards = self._load(self.reader, True)
        self._holdout_shards = self._load(self.holdout, False) if self.holdout is not None else []
        self._rows, bad, positives = _tree_reduce(client, _map(client, _shard_counts, shards), _add_triples)
        if self._rows == 0:
            raise UserError(f"{self.data}: no rows left after the filters (dates {opt.start or '...'} to "
                            f"{opt.end or '...'})")
        if bad:
            self.log(f"skipped {bad:,} rows with bad labels")
        if not opt.allow_one_class and not 0 < positives < self._rows:
            raise UserError(f"{self.data}: the training rows after the filters hold {self._rows - positives:,} "
                            f"negative and {positives:,} positive labels (column '{self.spec.label_column}'); a "
                            "response model needs both classes; --allow-one-class trains anyway")
        with _StopFlag() as stop:
            if st.pass_index == 0:
                started = time.monotonic()
                values = client.submit(_shard_examples, shards[0], pure=False).result()
                self.examples = BucketExamples(self.spec.n_buckets, values=values or {})
                setting = {"solver": opt.solver, "loss": opt.loss, "l2": opt.l2_strength, "history": opt.history,
                           "step0": opt.step0, "seed": opt.seed}
                rows, xsum, pv_loss, pv_w = _tree_reduce(
                    client, _map(client, _online_part, shards, self.spec.n_buckets, setting), _add_online)
                x0 = xsum / rows
                h, weight_sum = _tree_reduce(client, _map(client, _curvature_part, shards, _put(client, x0),
                                                          loss_code(opt.loss)), _add_pairs)
                self.solver.start(x0, h / weight_sum)
                self._pass_done(started, 0, None, pv_loss / pv_w)
            fg = self._objective(shards)
            while st.pass_index < opt.refine_iterations + 1 and self.solver.task in (0, Refinement.NEW_POINT):
                if stop.signal is not None:
                    raise Interrupted(f"stopped after pass {st.pass_index}; checkpoint saved in {self.folder.checkpoint}; "
                                      "continue with the same command plus --resume")
                started = time.monotonic()
                calls = self.solver.iterate(fg)
                if self.solver.task != Refinement.NEW_POINT:
                    self.log("full-batch L-BFGS: converged" if self.solver.task == Refinement.CONVERGED
                             else f"full-batch L-BFGS stopped (code {self.solver.arrays['task'].tolist()})")
                    self.save_checkpoint()
                    break
                self._pass_done(started, calls, self._data_loss, None)
        st.stopped_early = st.pass_index < opt.refine_iterations + 1
        return self._final_model()


def train(cluster, spec, data, out, options, **kwargs) -> TrainResult:
    """Train over a cluster (see the module docstring).

    Parameters
    ----------
    cluster : str or distributed.Client
        A scheduler address, ``local:N`` or a Client (see :func:`connect`).
    spec, data, out, options, **kwargs
        As :class:`trainer.training.Trainer`. Options that only shape single-machine passes
        (``epochs``, ``patience``, ``checkpoint_every``) must keep their defaults.

    Returns
    -------
    TrainResult

    Raises
    ------
    UserError
        For a single-machine option changed, a cluster that cannot be reached, or as
        :meth:`ClusterTrainer.run`.
    """
    if is_sweep(options.l2_strength):
        raise UserError("--l2-strength: --cluster trains one L2 strength; give one value, or train the "
                        "values without --cluster")
    default = type(options)()
    for name in ("epochs", "patience", "checkpoint_every"):
        if getattr(options, name) != getattr(default, name):
            raise UserError(f"--{name.replace('_', '-')} applies to single-machine training; with --cluster, "
                            "training is one online pass per shard, then --refine-iterations full-batch L-BFGS "
                            "iterations, with a checkpoint after each")
    with connect(cluster) as client:
        return ClusterTrainer(client, spec, data, out, options, **kwargs).run()
