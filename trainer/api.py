"""The command line's verbs for notebooks: train, evaluate, score, export, inspect, report, demo.

Every function takes plain values, returns data and raises ``trainer.errors.UserError`` for the
user's mistakes. Only training prints: its per-pass table and, on a terminal, its progress bar, both
silenced by ``quiet=True`` like the command line's ``--quiet``.
"""

from __future__ import annotations

import json
from pathlib import Path

from trainer.atomic import write_atomic
from trainer.errors import UserError
from trainer.evaluation import EvaluationResult, evaluate as _evaluate
from trainer.export import write_export
from trainer.json_values import jsonable
from trainer.model import Model, inspect_model, load_model, model_folder
from trainer.reader.files import parse_day
from trainer.reader.stream import Reader
from trainer.report import write_report
from trainer.run_folder import RunFolder
from trainer.scoring import check_keep, check_paths, score_to_parquet
from trainer.spec import Spec, load_spec
from trainer.sweep import SweepTrainer, is_sweep, l2_option
from trainer.training import TrainOptions, Trainer, TrainResult

__all__ = ["EvaluationResult", "TrainResult", "train", "evaluate", "score", "export", "inspect", "report", "demo", "load_model", "TrainOptions"]


def train(spec: str | Path | Spec, data: str | Path, out: str | Path, *, holdout: str | Path | None = None,
          resume: bool = False, force: bool = False, quiet: bool = False, cluster=None,
          **options) -> TrainResult:
    """Train a model from a log into a model folder.

    Parameters
    ----------
    spec : str, Path or Spec
        A spec file or a loaded Spec.
    data : str or Path
        The training log (file, folder or hive-partitioned folder).
    out : str or Path
        The model folder.
    holdout : str or Path, optional
        A holdout log (or use ``holdout_start``/``holdout_end`` on the training path).
    resume : bool
        Continue the run in ``out`` from its checkpoint.
    force : bool
        Replace another run's files in ``out``.
    quiet : bool
        No progress bar and no per-pass table.
    cluster : str or distributed.Client, optional
        A Dask scheduler address, ``local:N`` or a ``distributed.Client`` to train over (one online
        pass per shard, averaged, then full-batch L-BFGS; see ``trainer.cluster``).
    **options
        Any :class:`trainer.training.TrainOptions` field (dates as YYYY-MM-DD strings or dates).
        ``l2_strength`` takes a float, a sequence of up to 8 floats or "auto" (also as text: "1e-5,1e-4");
        several values train one model each from one read of the log and keep the best
        (:class:`trainer.sweep.SweepTrainer`; needs a holdout).

    Returns
    -------
    trainer.training.TrainResult
        The model, its folder, passes run, per-pass metrics, best pass, stopping reason, timings (and, for
        several L2 strengths, the kept one and each value's outcome).

    Raises
    ------
    UserError
        For bad or unknown options, data or folders.
    Interrupted
        On SIGINT/SIGTERM (after saving a checkpoint).
    """
    spec = spec if isinstance(spec, Spec) else load_spec(spec)
    if "l2_strength" in options:
        options["l2_strength"] = l2_option(options["l2_strength"])
    for key in ("start", "end", "holdout_start", "holdout_end"):
        if key in options:
            options[key] = parse_day(options[key], f"--{key.replace('_', '-')}")
    unknown = set(options) - {f for f in TrainOptions.__dataclass_fields__}
    if unknown:
        raise UserError(f"train: unknown option(s) {', '.join(sorted(unknown))}")
    if cluster is not None:
        from trainer import cluster as dask_cluster

        return dask_cluster.train(cluster, spec, data, out, TrainOptions(**options), holdout=holdout, resume=resume,
                                  force=force, quiet=quiet)
    opts = TrainOptions(**options)
    runner = SweepTrainer if is_sweep(opts.l2_strength) else Trainer
    return runner(spec, data, out, opts, holdout=holdout, resume=resume, force=force, quiet=quiet).run()


def evaluate(model: str | Path | Model, data: str | Path, *, start=None, end=None, by: str | None = None,
             segments: int = 20, skip_bad_labels: bool = False,
             json_out: str | Path | None = None, cluster=None) -> EvaluationResult:
    """Metrics of a model on a labelled log.

    Parameters
    ----------
    model : str, Path or Model
        A training model folder, an export folder, or a loaded Model.
    data : str or Path
        The labelled log.
    start, end : str or datetime.date, optional
        Inclusive date filter (YYYY-MM-DD).
    by : str, optional
        Add one row per value of this column.
    segments : int, default 20
        With ``by``, the number of largest values listed (the rest pooled); at least 1.
    skip_bad_labels : bool
        Drop rows with null or unaccepted labels (their count is reported as ``skipped_bad_labels``).
    json_out : str or Path, optional
        Also write the summary there as JSON (atomically).
    cluster : str or distributed.Client, optional
        A Dask scheduler address, ``local:N`` or a ``distributed.Client``; computes the metrics there,
        one task per file or row groups, with the same result.

    Returns
    -------
    trainer.evaluation.EvaluationResult
        The summary, a dict whose keys read as attributes too.

    Raises
    ------
    UserError
        For a bad model, log, option or column.
    """
    model = model if isinstance(model, Model) else load_model(model)
    if segments < 1:
        raise UserError(f"--segments must be an integer >= 1; got {segments}")
    reader = Reader(model.spec, data, parse_day(start, "--start"), parse_day(end, "--end"), batch_rows=65536,
                    skip_bad_labels=skip_bad_labels, keep=(by,) if by else (), keep_option="--by")
    if cluster is not None:
        from trainer import cluster as dask_cluster

        summary, bad_labels = dask_cluster.evaluate(cluster, model, reader, by=by, segments=segments)
    else:
        summary = _evaluate(model, reader, by=by, segments=segments)
        bad_labels = reader.counts.bad_labels
    if bad_labels:
        summary["skipped_bad_labels"] = bad_labels
    if json_out is not None:
        write_atomic(Path(json_out), [json.dumps(jsonable(summary), indent=2, allow_nan=False).encode()])
    return summary


def score(model: str | Path, data: str | Path, out: str | Path, *, keep: tuple[str, ...] = (),
          missing_as_null: bool = False, start=None, end=None, cluster=None, force: bool = False) -> dict:
    """Score a log with a model into Parquet.

    Parameters
    ----------
    model : str or Path
        A training model folder or an export folder.
    data : str or Path
        The log to score.
    out : str or Path
        The Parquet file written; with ``cluster``, a dataset folder instead: one Parquet file per input
        part and the manifest ``_parts.json`` written last (see ``trainer.cluster.score``).
    keep : tuple of str
        Input columns (or hive partition keys) copied beside the scores.
    missing_as_null : bool
        Feature columns absent from a file count as all null.
    start, end : str or datetime.date, optional
        Inclusive date filter (YYYY-MM-DD).
    cluster : str or distributed.Client, optional
        A Dask scheduler address, ``local:N`` or a ``distributed.Client``.
    force : bool
        With ``cluster``, replace an earlier dataset folder at ``out``.

    Returns
    -------
    dict
        What was written (``rows``, ``out``; see :func:`trainer.scoring.score_to_parquet` and
        ``trainer.cluster.score``).

    Raises
    ------
    UserError
        For a bad model, a missing feature or kept column, a bad option or output path, or unreadable
        data.
    """
    if cluster is None:
        return score_to_parquet(model, data, out, keep=tuple(keep), missing_as_null=missing_as_null,
                                start=start, end=end)
    from trainer import cluster as dask_cluster

    loaded = model if isinstance(model, Model) else load_model(model)
    keep = check_keep(keep)
    data, out = Path(data), Path(out)
    check_paths(data, out, folder=True)
    reader = Reader(loaded.spec, data, parse_day(start, "--start"), parse_day(end, "--end"), batch_rows=65536,
                    with_labels=False, keep=keep, missing_as_null=missing_as_null)
    return dask_cluster.score(cluster, loaded, reader, out, keep=keep, model_path=None if isinstance(model, Model) else str(model), force=force)


def export(model: str | Path, out: str | Path, *, force: bool = False) -> Path:
    """Export a trained model folder (or an export folder) (:func:`trainer.export.write_export`).

    Parameters
    ----------
    model : str or Path
        The model folder.
    out : str or Path
        The export folder (weights.parquet + model.json).
    force : bool
        Replace a previous export at ``out``.

    Returns
    -------
    Path
        ``out``.

    Raises
    ------
    UserError
        For a bad model or destination.
    """
    source = model_folder(model)
    return write_export(load_model(source), out, source=source, force=force)


def inspect(model: str | Path) -> dict:
    """Size, non-zero buckets, collision estimate, largest weights and options of a model.

    Parameters
    ----------
    model : str or Path
        A training model folder or an export folder.

    Returns
    -------
    dict
        See :func:`trainer.model.inspect_model`.

    Raises
    ------
    UserError
        For a bad model folder.
    """
    return inspect_model(model)


def report(model_dir: str | Path, out: str | Path | None = None, *, top: int = 15,
           probability_axis: str = "auto") -> Path:
    """Write the self-contained HTML report of a training folder.

    Parameters
    ----------
    model_dir : str or Path
        The training model folder.
    out : str or Path, optional
        The HTML file (default ``MODEL_DIR/report.html``).
    top : int, default 15
        Largest positive and negative weights listed.
    probability_axis : {"auto", "linear", "log"}
        Scale of the reliability diagram (auto: log below a 10% base rate).

    Returns
    -------
    Path
        The report's path.

    Raises
    ------
    UserError
        For another ``probability_axis`` or a bad model folder.
    """
    if probability_axis not in ("auto", "linear", "log"):
        raise UserError(f"--probability-axis must be auto, linear or log; got {probability_axis!r}")
    folder = RunFolder(model_dir)
    model = folder.load_model()
    records, progress, options = folder.metrics(), folder.progress(), model.info.get("options", {})
    run_doc = folder.read_run() or {}
    kept = (run_doc.get("sweep") or {}).get("kept")
    sweep = None
    if kept is not None:  # several L2 strengths: the kept one's figures, and a section of them all
        points = [{k: r[k] for k in ("l2_strength", "pass", "holdout")} for r in records]
        sweep = {"kept": kept, "points": points}
        records = [r for r in records if r["l2_strength"] == kept]
        progress = [p for p in progress if p["l2_strength"] == kept]
        options = {**options, "l2_strength": run_doc["options"]["l2_strength"]}
    passes = [{"pass": rec["pass"], "rows": rec["rows"], "progressive_loss": rec["progressive_loss"],
               "holdout": rec["holdout"]} for rec in records]
    top_weights = model.top_weights(top, 1) + model.top_weights(top, -1)
    summary = model.info.get("summary", {})
    run = {"title": f"hashcurve report: {model_dir}", "options": options,
           "option_defaults": TrainOptions().as_json(),
           "resolved_options": {"step0": summary["step0"]} if "step0" in summary else {},
           "best_pass": summary.get("best_pass"),
           "passes": passes, "progress": progress, "final_holdout": model.info.get("holdout"),
           "top_weights": top_weights, "loss": model.loss, "sweep": sweep}
    path = Path(out) if out is not None else folder.report
    write_report(run, path, probability_axis)
    return path


def demo_data_dir() -> Path:
    """The shipped demo folder: beside the package in a source checkout, else ./demo_data.

    Returns
    -------
    Path

    Raises
    ------
    UserError
        When neither holds ``demo_data/spec.json``.
    """
    for base in (Path(__file__).resolve().parents[1], Path.cwd()):
        if (base / "demo_data" / "spec.json").exists():
            return base / "demo_data"
    raise UserError("demo_data/spec.json not found beside the package or in the current folder; "
                    "run from a source checkout (pip install -e .)")


def demo(out: str | Path = "hashcurve-demo", *, quiet: bool = False) -> dict:
    """The whole job on the shipped demo logs.

    Trains on all days but the last with default options, evaluates the last day after each pass,
    exports, scores the held-out day and writes the report.

    Parameters
    ----------
    out : str or Path, default "hashcurve-demo"
        The folder written into (its model and export are replaced).
    quiet : bool
        No progress bar and no per-pass table.

    Returns
    -------
    dict
        The paths written (``model``, ``export``, ``scores``, ``metrics``, ``report``), ``train_days``,
        ``holdout_day`` and the holdout ``summary``.

    Raises
    ------
    UserError
        When the demo data is missing or has fewer than two days.
    """
    root = demo_data_dir()
    logs = root / "logs"
    days = sorted(p.name.split("=", 1)[1] for p in logs.iterdir() if p.is_dir() and "=" in p.name)
    if len(days) < 2:
        raise UserError(f"{logs}: the demo needs at least two days of logs")
    out = Path(out)
    model_dir, export_dir = out / "model", out / "export"
    train(root / "spec.json", logs, model_dir, end=days[-2], holdout_start=days[-1], holdout_end=days[-1],
          force=True, quiet=quiet)
    export(model_dir, export_dir, force=True)
    scores = out / "holdout-scores.parquet"
    score(export_dir, logs, scores, start=days[-1], end=days[-1])
    summary = evaluate(model_dir, logs, start=days[-1], end=days[-1], json_out=out / "holdout-metrics.json")
    html = report(model_dir, out / "report.html")
    return {"model": model_dir, "export": export_dir, "scores": scores, "metrics": out / "holdout-metrics.json",
            "report": html, "train_days": f"{days[0]}..{days[-2]}", "holdout_day": days[-1], "summary": summary}
