"""Cluster benchmark: score, evaluate and train over Dask LocalClusters against the single-machine path.

Usage:
    python scripts/bench_cluster.py [--rows-per-day 100000] [--train-days 4] [--refine-iterations 20]

Uses the 20-field benchmark log of scripts/bench_train.py (loggen config "bench20", 2^20 buckets,
generated once under bench_data/). In one run it measures

- rows/s of ``evaluate`` and ``score`` over the whole log (all days), single machine, then over
  ``local:1`` and ``local:2`` clusters (started once each, not charged; one untimed warm-up call
  per cluster loads the numba cache in the workers), with the ratio to the single machine;
- distributed training on ``local:2``: holdout LL / LL* after every pass (LL* the holdout
  log-loss of the full-batch optimum of the same objective, by scipy L-BFGS-B, as in
  bench_train.py), time per refinement iteration (train_seconds / iteration from metrics.jsonl)
  and the per-worker gradient rate derived from it;
- the inputs of the README's paper estimate: bytes of a weight vector, cached bytes per row.

Timings on a shared machine are noisy; compare ratios taken in the same run only.
"""

from __future__ import annotations

import argparse
import json
import logging
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_train import day_names, load_csr, log_loss, make_log, reference_optimum  # noqa: E402

from trainer import api  # noqa: E402
from trainer.cli import configure_process  # noqa: E402
from trainer.cluster import PART_ROWS  # noqa: E402
from trainer.reader import Reader  # noqa: E402
from trainer.spec import load_spec  # noqa: E402
from trainer.training import TrainOptions  # noqa: E402


def timed(fn) -> float:
    t = time.perf_counter()
    fn()
    return time.perf_counter() - t


def rates(model: Path, logs: Path, tmp: Path, rows: int, cluster=None) -> dict:
    """Rows/s of evaluate and score over ``logs`` (single machine when ``cluster`` is None)."""
    out = tmp / ("scores" if cluster is not None else "scores.parquet")
    kw = {"cluster": cluster} if cluster is not None else {}
    if cluster is not None:
        api.evaluate(model, logs, **kw)
    ev = timed(lambda: api.evaluate(model, logs, **kw))
    sc = timed(lambda: api.score(model, logs, out, force=True, **kw))
    return {"evaluate": rows / ev, "score": rows / sc}


def main() -> None:
    import distributed

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows-per-day", type=int, default=100_000)
    ap.add_argument("--train-days", type=int, default=4)
    ap.add_argument("--refine-iterations", type=int, default=20)
    a = ap.parse_args()
    configure_process()
    folder = make_log(a.rows_per_day, a.train_days + 1)
    spec_path, logs = folder / "spec.json", folder / "logs"
    spec = load_spec(spec_path)
    days = day_names(folder)
    rows = a.rows_per_day * len(days)
    print(f"log: {rows:,} rows in {len(days)} daily files, {spec.n_buckets:,} buckets", flush=True)

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        model = tmp / "model"
        print("single-machine model for scoring (one pass, first day) ...", flush=True)
        api.train(spec_path, logs, model, start=days[0], end=days[0], epochs=1, quiet=True)
        print("\nrows/s over the whole log (ratio to the single machine):")
        one = rates(model, logs, tmp, rows)
        print(f"  single machine   evaluate {one['evaluate']:>10,.0f}   score {one['score']:>10,.0f}", flush=True)
        for n in (1, 2):
            with distributed.LocalCluster(n_workers=n, threads_per_worker=1, dashboard_address=":0",
                                          silence_logs=logging.ERROR) as lc, distributed.Client(lc) as client:
                r = rates(model, logs, tmp, rows, client)
            print(f"  local:{n}          evaluate {r['evaluate']:>10,.0f} ({r['evaluate'] / one['evaluate']:.2f}x)   "
                  f"score {r['score']:>10,.0f} ({r['score'] / one['score']:.2f}x)", flush=True)

        train_end, hold_day = days[-2], days[-1]
        X, y = load_csr(spec, logs, days[0], train_end)
        Xh, yh = load_csr(spec, logs, hold_day, hold_day)
        w, b, fstar, secs, nit, _ = reference_optimum(X, y, TrainOptions().l2_strength)
        ll_star = log_loss(yh, Xh @ w + b)
        print(f"\nreference optimum: holdout LL* {ll_star:.5f} (scipy L-BFGS-B, {nit} iterations)", flush=True)

        reader = Reader(spec, logs, batch_rows=TrainOptions().batch_rows)
        shard = list(reader.for_part(reader.parts(PART_ROWS)[0]).batches())
        nbytes = sum(bt.indptr.nbytes + bt.indices.nbytes + bt.data.nbytes + bt.labels.nbytes + bt.weights.nbytes
                     for bt in shard)
        print(f"cached shard: {nbytes / sum(bt.n_rows for bt in shard):.0f} bytes per row; "
              f"weight vector {8 * (spec.n_buckets + 1) / 2**20:.1f} MB")

        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=":0",
                                      silence_logs=logging.ERROR) as lc, distributed.Client(lc) as client:
            out = tmp / "cluster-model"
            api.train(spec_path, logs, out, end=train_end, holdout_start=hold_day, holdout_end=hold_day,
                      cluster=client, refine_iterations=a.refine_iterations, quiet=True)
        records = [json.loads(line) for line in (out / "metrics.jsonl").read_text().splitlines()]
        print("\ndistributed training on local:2 (pass 1: online pass per shard, averaged; then L-BFGS):")
        for r in records:
            print(f"  pass {r['pass']:>3} {r['phase']:<7} LL/LL* {r['holdout']['log_loss'] / ll_star:.4f}  "
                  f"evaluations {r['evaluations']}  train {r['train_seconds']:.2f} s", flush=True)
        refine = [r for r in records if r["phase"] == "refine"]
        per_iter = float(np.median([r["train_seconds"] for r in refine]))
        per_eval = sum(r["train_seconds"] for r in refine) / sum(r["evaluations"] for r in refine)
        train_rows = refine[0]["rows"]
        hit = next((r["pass"] - 1 for r in refine if r["holdout"]["log_loss"] <= 1.002 * ll_star), None)
        print(f"  median time per refinement iteration {per_iter:.2f} s; per gradient evaluation {per_eval:.2f} s "
              f"= {train_rows / per_eval / 2:,.0f} rows/s per worker")
        print(f"  iterations to LL <= 1.002 LL*: {hit}; "
              f"evaluations per iteration {sum(r['evaluations'] for r in refine) / len(refine):.2f}")


if __name__ == "__main__":
    main()
