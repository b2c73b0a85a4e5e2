"""The ``hashcurve`` command line: argument parsing, exit codes and one-line error messages.

Exit codes: 0 done; 2 the user's mistake (one line on stderr, no traceback); 130 stopped by a signal
after saving a checkpoint; 1 a bug (with its traceback).

Only the standard library and ``trainer.options`` load with this module: each command imports
``trainer.api`` (numpy, pyarrow, numba) when it runs, so ``hashcurve --help`` and argument errors
answer without loading them.
"""

from __future__ import annotations

import argparse
import json
import os
import sys

from trainer import __version__
from trainer.errors import Interrupted, UserError
from trainer.options import TrainOptions


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors and exit code 2."""

    def error(self, message):
        raise UserError(f"{self.prog}: {message}")


def _add_dates(p: argparse.ArgumentParser, what: str) -> None:
    p.add_argument("--start", metavar="YYYY-MM-DD", help=f"first day of {what} (inclusive)")
    p.add_argument("--end", metavar="YYYY-MM-DD", help=f"last day of {what} (inclusive)")


CLUSTER_HELP = ("run on a Dask cluster: a scheduler address tcp://HOST:PORT, or local:N to start N worker "
                "processes for this command (needs the dask extra)")


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser (also used to document the commands).

    Returns
    -------
    argparse.ArgumentParser
    """
    d = TrainOptions()
    top = _Parser(prog="hashcurve", description="Train, check and export calibrated response-rate models "
                  "from hashed Parquet logs.")
    top.add_argument("--version", action="version", version=f"hashcurve {__version__}")
    sub = top.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("demo", help="train, evaluate, export, score and report on the shipped demo logs")
    p.add_argument("--out", default="hashcurve-demo", help="folder for every output (default: %(default)s)")
    p.add_argument("--quiet", action="store_true", help="no progress bars or per-pass table")

    p = sub.add_parser("train", help="train a model from a Parquet log")
    p.add_argument("--spec", required=True, help="feature spec (JSON)")
    p.add_argument("--data", required=True, help="Parquet file, folder or hive-partitioned folder")
    p.add_argument("--out", required=True, help="model folder to create (or to resume)")
    _add_dates(p, "training data")
    p.add_argument("--holdout", help="holdout log (default: --data, when holdout dates are given)")
    p.add_argument("--holdout-start", metavar="YYYY-MM-DD", help="first holdout day (inclusive)")
    p.add_argument("--holdout-end", metavar="YYYY-MM-DD", help="last holdout day (inclusive)")
    p.add_argument("--epochs", type=int, default=d.epochs, help="passes over the data (default: %(default)s)")
    p.add_argument("--loss", default=d.loss, help="logistic or squared-hinge (default: %(default)s)")
    p.add_argument("--solver", default=d.solver, help="olbfgs, res, sgd or adagrad (default: %(default)s)")
    p.add_argument("--l2-strength", default=d.l2_strength, metavar="L2[,L2...]|auto",
                   help="L2 strength lambda, per-row average form; up to 8 values separated by commas, or "
                        "auto (5 values around the default), train one model each from one read and keep the "
                        "best on the holdout (default: %(default)s)")
    p.add_argument("--history", type=int, default=d.history, help="curvature pairs kept (default: %(default)s)")
    p.add_argument("--batch-rows", type=int, default=d.batch_rows,
                   help="rows per step; the default solver's batches grow from this to 1/32 of the rows seen, "
                        "at most 16x it (default: %(default)s)")
    p.add_argument("--step0", type=float, default=d.step0, help="initial step size (default: the solver's)")
    p.add_argument("--seed", type=int, default=d.seed, help="seed for shuffling and sampling (default: %(default)s)")
    p.add_argument("--shuffle-buffer", type=int, default=d.shuffle_buffer,
                   help="shuffle rows within windows of this many rows; 0 keeps file order (default: %(default)s)")
    p.add_argument("--negative-keep-rate", type=float, default=d.negative_keep_rate,
                   help="keep each negative row with this probability, corrected in the model (default: %(default)s)")
    p.add_argument("--patience", type=int, default=d.patience,
                   help="passes without holdout improvement before stopping (default: %(default)s)")
    p.add_argument("--checkpoint-every", type=int, default=d.checkpoint_every,
                   help="rows between checkpoints (default: %(default)s)")
    p.add_argument("--full-batch-memory", type=int, default=d.full_batch_memory, metavar="MB",
                   help="passes after the first run full-batch when the hashed log fits in this many MB; "
                        "0: online passes only (default: %(default)s)")
    p.add_argument("--skip-bad-labels", action="store_true", help="drop rows with null or unaccepted labels")
    p.add_argument("--allow-one-class", action="store_true",
                   help="train even when every training label is 0, or every one is 1")
    p.add_argument("--refine-iterations", type=int, default=d.refine_iterations,
                   help="with --cluster: full-batch L-BFGS iterations after the online pass (default: %(default)s)")
    p.add_argument("--cluster", metavar="ADDRESS", help=CLUSTER_HELP)
    p.add_argument("--resume", action="store_true", help="continue from the checkpoint in --out")
    p.add_argument("--force", action="store_true", help="replace the files of another run in --out")
    p.add_argument("--quiet", action="store_true", help="no progress bars or per-pass table")

    p = sub.add_parser("evaluate", help="metrics of a model on a labelled log")
    p.add_argument("--model", required=True, help="model folder or export folder")
    p.add_argument("--data", required=True, help="Parquet file, folder or hive-partitioned folder")
    _add_dates(p, "the data")
    p.add_argument("--by", metavar="COLUMN", help="add one row per value of this column")
    p.add_argument("--segments", type=int, default=20, help="largest values listed with --by (default: %(default)s)")
    p.add_argument("--skip-bad-labels", action="store_true", help="drop rows with null or unaccepted labels")
    p.add_argument("--json", metavar="FILE", help="also write the summary as JSON")
    p.add_argument("--cluster", metavar="ADDRESS", help=CLUSTER_HELP)

    p = sub.add_parser("report", help="self-contained HTML report of a training folder")
    p.add_argument("--model", required=True, help="model folder (from train)")
    p.add_argument("--out", help="HTML file (default: MODEL/report.html)")
    p.add_argument("--probability-axis", choices=("auto", "linear", "log"), default="auto",
                   help="scale of the reliability diagram (default: auto, log below a 10%% base rate)")

    p = sub.add_parser("export", help="portable weights.parquet + model.json with the hashing contract")
    p.add_argument("--model", required=True, help="model folder (from train)")
    p.add_argument("--out", required=True, help="export folder (must be empty or new)")
    p.add_argument("--force", action="store_true", help="replace a non-empty export folder")

    p = sub.add_parser("score", help="score a Parquet log into a Parquet file")
    p.add_argument("--model", required=True, help="model folder or export folder")
    p.add_argument("--data", required=True, help="Parquet file, folder or hive-partitioned folder")
    p.add_argument("--out", required=True, help="output Parquet file (appears only when complete); with --cluster, "
                   "a dataset folder (one file per input part, manifest _parts.json written last)")
    p.add_argument("--keep", nargs="+", default=[], metavar="COLUMN", help="input columns to copy beside the score")
    p.add_argument("--missing-as-null", action="store_true", help="read absent feature columns as all null")
    _add_dates(p, "the data")
    p.add_argument("--cluster", metavar="ADDRESS", help=CLUSTER_HELP)
    p.add_argument("--force", action="store_true", help="with --cluster: replace the score dataset already in --out")

    p = sub.add_parser("inspect", help="size, collisions, largest weights and options of a model")
    p.add_argument("--model", required=True, help="model folder or export folder")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")
    return top


def format_summary(s: dict) -> str:
    """A readable evaluation summary (our own layout).

    Parameters
    ----------
    s : dict
        An evaluation summary (:func:`trainer.evaluation.evaluate`).

    Returns
    -------
    str
        The text: probability metrics, margin metrics and the segment table, those the summary holds.
    """
    from trainer.training import format_cell

    lines = [f"rows {s.get('rows', 0):,}   positives {s.get('positives', 0):,}"]
    if "log_loss" in s:
        lines += [f"  log-loss            {format_cell(s['log_loss'])}",
                  f"  normalized entropy  {format_cell(s['normalized_entropy'])}",
                  f"  AUC                 {format_cell(s['auc'])}",
                  f"  Brier score         {format_cell(s['brier'])}",
                  f"  predicted/observed  {format_cell(s['calibration_ratio'], '.4f')}",
                  f"  calibration error   {format_cell(s['ece'])}  (expected, over {len(s['bins'])} equal-weight bins)",
                  f"  error rate          {format_cell(s['error_rate'], '.4f')} at 0.5, "
                  f"{format_cell(s['error_rate_at_base_rate'], '.4f')} at the base-rate threshold"]
    if "margin" in s:
        m = s["margin"]
        lines += [f"  squared-hinge loss  {format_cell(s['squared_hinge_loss'])}",
                  f"  AUC (margins)       {format_cell(m['auc'])}",
                  f"  error rate          {format_cell(m['error_rate'], '.4f')} at margin 0"]
    if s.get("segments"):
        lines.append(f"\n  {'value':<24} {'rows':>10} {'observed':>9} {'predicted':>9} {'pred/obs':>9} {'log-loss':>9}")
        for r in s["segments"]:
            lines.append(f"  {str(r['value'])[:24]:<24} {r['rows']:>10,} {format_cell(r['observed_rate'], '9.5f')} "
                         f"{format_cell(r['mean_prediction'], '9.5f')} {format_cell(r['calibration_ratio'], '9.4f')} "
                         f"{format_cell(r['log_loss'], '9.5f')}")
    return "\n".join(lines)


def _fmt_value(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.6g}"
    return str(v)


def format_inspect(d: dict) -> str:
    """Render an inspection as compact plain text.

    One fact per line, weights as a small table with up to three example tokens each, as the reader
    recorded them.

    Parameters
    ----------
    d : dict
        A :func:`trainer.model.inspect_model` dict.

    Returns
    -------
    str
        The text, ending in a newline.

    Raises
    ------
    KeyError
        When ``d`` lacks a key of inspect_model.
    """
    lines = [f"model      {d['path']} ({d['form']} form, {d['bytes']:,} bytes on disk)",
             f"loss       {d['loss']}; probabilities: "
             + ("yes" if d["has_probability"] else "no (margins only)")
             + (f"; Platt a={d['calibration']['a']:.6g} b={d['calibration']['b']:.6g}" if d["calibration"] else ""),
             f"intercept  {d['intercept']:.6g} (negative keep rate {d['negative_keep_rate']:g})",
             f"buckets    {d['buckets']:,} (2^{d['bits']}), non-zero {d['nonzero']:,} ({100 * d['nonzero_share']:.2f}%)"]
    c = d["collision"]
    if c is None:
        lines.append("tokens     distinct count not recorded; collision rate unknown")
    else:
        lines.append(f"tokens     ~{c['tokens']:,} distinct (estimated from the non-zero buckets); expected "
                     f"{100 * c['shared_bucket_share']:.2f}% of the occupied buckets hold two or more")
    for title, rows in (("largest positive weights", d["top_positive"]), ("largest negative weights", d["top_negative"])):
        lines.append(f"{title}:")
        if not rows:
            lines.append("  (none)")
        for r in rows:
            ex = ", ".join(r["examples"][:3]) or "(no example recorded)"
            lines.append(f"  {r['weight']:+11.5f}  bucket {r['bucket']:>10}  {ex}")
    if d["options"]:
        lines.append("options    " + ", ".join(f"{k}={_fmt_value(v)}" for k, v in sorted(d["options"].items())))
    if d["summary"]:
        lines.append("training   " + ", ".join(f"{k}={_fmt_value(v)}" for k, v in sorted(d["summary"].items())
                                               if not isinstance(v, (dict, list))))
    h = d["holdout"]
    if h:
        keys = [k for k in ("rows", "log_loss", "normalized_entropy", "auc", "calibration_ratio", "error_rate")
                if k in h]
        lines.append("holdout    " + ", ".join(f"{k}={_fmt_value(h[k])}" for k in keys))
    return "\n".join(lines) + "\n"


def format_train_result(r) -> str:
    """A finished training run in a few lines (our own layout).

    Parameters
    ----------
    r : trainer.training.TrainResult
        The run's result.

    Returns
    -------
    str
        Passes, timings and stopping reason, the best holdout pass, the model folder.
    """
    from trainer.run_folder import l2_label

    lines = [f"{r.passes} pass(es), {r.train_seconds:.1f} s training + {r.eval_seconds:.1f} s holdout evaluation; "
             f"{r.stopping_reason}"]
    if r.sweep:
        lines.append(f"best holdout pass {r.best_pass} of l2 strength {l2_label(r.l2_strength)}, kept from "
                     f"{len(r.sweep)} values (each value's model under {r.model_dir / 'l2'})")
    elif r.best_pass is not None:
        lines.append(f"best holdout pass {r.best_pass}")
    lines.append(f"model written to {r.model_dir}")
    return "\n".join(lines)


def _train(a) -> None:
    from trainer import api

    options = {k: getattr(a, k) for k in ("epochs", "loss", "solver", "l2_strength", "history", "batch_rows", "step0",
                                          "seed", "shuffle_buffer", "negative_keep_rate", "patience",
                                          "checkpoint_every", "start", "end", "holdout_start", "holdout_end",
                                          "skip_bad_labels", "allow_one_class", "full_batch_memory",
                                          "refine_iterations")}
    print(format_train_result(api.train(a.spec, a.data, a.out, holdout=a.holdout, resume=a.resume,
                                        force=a.force, quiet=a.quiet, cluster=a.cluster, **options)))


def _demo(a) -> None:
    from trainer import api

    out = api.demo(a.out, quiet=a.quiet)
    print(f"\ntrained on {out['train_days']}, held out {out['holdout_day']}:")
    print(format_summary(out["summary"]))
    print("\noutputs:")
    for key, label in (("model", "model folder"), ("export", "export (weights + contract)"),
                       ("scores", "holdout scores"), ("metrics", "holdout metrics"), ("report", "HTML report")):
        print(f"  {label:<28} {out[key]}")


def _evaluate(a) -> None:
    from trainer import api

    s = api.evaluate(a.model, a.data, start=a.start, end=a.end, by=a.by, segments=a.segments,
                     skip_bad_labels=a.skip_bad_labels, json_out=a.json, cluster=a.cluster)
    print(format_summary(s))


def _report(a) -> None:
    from trainer import api

    print(f"report written to {api.report(a.model, a.out, probability_axis=a.probability_axis)}")


def _export(a) -> None:
    from trainer import api

    print(f"export written to {api.export(a.model, a.out, force=a.force)}")


def _score(a) -> None:
    from trainer import api

    r = api.score(a.model, a.data, a.out, keep=tuple(a.keep), missing_as_null=a.missing_as_null,
                  start=a.start, end=a.end, cluster=a.cluster, force=a.force)
    parts = f" ({r['parts']} part files)" if "parts" in r else ""
    print(f"{r['rows']:,} rows scored into {r['out']}{parts}")


def _inspect(a) -> None:
    from trainer import api

    d = api.inspect(a.model)
    print(json.dumps(d, indent=2) if a.json else format_inspect(d))


COMMANDS = {"demo": _demo, "train": _train, "evaluate": _evaluate, "report": _report, "export": _export,
            "score": _score, "inspect": _inspect}


def configure_process() -> None:
    """Process-wide settings of the command line (the benchmarks apply them too, before numpy loads).

    OpenBLAS runs on one thread unless the environment says otherwise (``OPENBLAS_NUM_THREADS``, read
    when numpy and scipy load their BLAS, so this must run first): the only BLAS calls of a run are
    the vector operations inside scipy's L-BFGS-B in the full-batch passes, and OpenBLAS's idle
    workers spin for the cores the numba kernels use; under load one full-batch pass spent 4.27 s in
    L-BFGS-B with the default threads against 0.37 s with one, idle a 3-pass run on 1M rows took
    2.31-2.59 / 8.03-8.60 / 6.11-6.38 s a pass against 2.89 / 8.81 / 6.39 s.

    Arrow buffers come from the system allocator, which hands the memory of finished row groups back
    to the OS where pyarrow's bundled allocator keeps it (peak RSS of a 1M-row training about 40 MB
    lower, measured with scripts/bench_train.py --memory; reading speed unchanged within noise)."""
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    import pyarrow as pa

    pa.set_memory_pool(pa.system_memory_pool())


def main(argv: list[str] | None = None) -> int:
    """Run the command line.

    A UserError is printed on one line to stderr (exit code 2); an interruption exits 130; output whose
    reader went away (``hashcurve inspect M | head``) ends quietly with exit code 1, as the Python
    documentation's note on SIGPIPE recommends (the rest of stdout goes to the null device).

    Parameters
    ----------
    argv : list of str, optional
        The arguments (default ``sys.argv[1:]``).

    Returns
    -------
    int
        The exit code: 0, 1 when stdout was closed early, 2 for a user mistake, 130 after SIGINT/SIGTERM.
    """
    try:
        args = build_parser().parse_args(argv)
        configure_process()
        COMMANDS[args.command](args)
        sys.stdout.flush()
    except BrokenPipeError:
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    except UserError as exc:
        print(f"hashcurve: error: {' '.join(str(exc).split())}", file=sys.stderr)
        return 2
    except Interrupted as exc:
        print(f"hashcurve: {exc}", file=sys.stderr)
        return 130
    return 0
