"""Benchmark the online solvers against the full-batch optimum on a synthetic hashed-categorical problem.

The problem imitates hashed event logs: ``--fields`` categorical fields whose vocabularies grow
geometrically from 3 to 1e5 values, values drawn from a Zipf law (exponent 1.1), a logistic ground truth
with a random effect per value and a base rate of about 5%; every (field, value) is mapped to a random
bucket among 2^bits (collisions allowed, as hashing does). Rows are generated directly as CSR batches.

For each solver it prints, after every pass, the progressive-validation loss, the holdout log-loss and
its relative gap to the holdout log-loss of the full-batch optimum (scipy L-BFGS-B on the same
objective), and the time ratio to the first solver listed. Example (about 10 minutes, most of it the
full-batch optimum)::

    python scripts/bench_solvers.py --rows 1000000 --bits 18 --l2-strength 1e-5 --epochs 3

The optimum depends on --rows, --holdout, --bits, --fields, --l2-strength and --seed only, so
``--optimum-cache`` lets several runs with different ``--option`` values share it; the cache records
those settings and is refused when they differ.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp
from scipy.special import expit

from bench_train import cached_optimum
from loggen import sample_ranks, zipf_probs
from trainer.kernels import predict_margin
from trainer.losses import pointwise_loss
from trainer.reader import Batch
from trainer.solvers import SOLVER_NAMES, make_solver


def make_problem(rows: int, bits: int, fields: int, seed: int):
    """Return (n_buckets, bucket ids of shape (rows, fields), labels)."""
    rng = np.random.default_rng(seed)
    truth = np.random.default_rng(seed + 1)
    n = 1 << bits
    cols = np.empty((rows, fields), dtype=np.int32)
    margin = np.full(rows, -4.2)
    for f, vocab in enumerate(np.geomspace(3, 1e5, fields).astype(np.int64)):
        values = sample_ranks(rng, np.cumsum(zipf_probs(int(vocab), 1.1)), rows)
        effect = truth.normal(0.0, 0.4, vocab)
        bucket = truth.integers(0, n, vocab)
        cols[:, f] = bucket[values]
        margin += effect[values]
    labels = (rng.random(rows) < expit(margin)).astype(np.float64)
    return n, cols, labels


def as_batch(cols: np.ndarray, labels: np.ndarray) -> Batch:
    rows, fields = cols.shape
    return Batch(np.arange(rows + 1, dtype=np.int64) * fields, np.ascontiguousarray(cols).ravel(),
                 np.ones(rows * fields), labels, np.ones(rows), rows)


def holdout_log_loss(batch: Batch, w: np.ndarray, b: float) -> float:
    return float(pointwise_loss("logistic", batch.labels, predict_margin(batch, w, b)).mean())


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--holdout", type=int, default=200_000)
    ap.add_argument("--bits", type=int, default=18)
    ap.add_argument("--fields", type=int, default=20)
    ap.add_argument("--l2-strength", type=float, default=1e-5)
    ap.add_argument("--batch", type=int, default=4096)
    ap.add_argument("--epochs", type=int, default=3)
    ap.add_argument("--solvers", default="olbfgs,adagrad,sgd")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--option", action="append", default=[], metavar="KEY=VALUE",
                    help="method option for every solver listed, e.g. --option t0=20 (repeatable)")
    ap.add_argument("--optimum-cache", metavar="PATH",
                    help="npz file holding the full-batch optimum; computed and written when missing")
    args = ap.parse_args()
    options = {}
    for item in args.option:
        key, sep, value = item.partition("=")
        if not sep:
            ap.error(f"--option expects KEY=VALUE; got {item!r}")
        options[key] = int(value) if key == "history" else float(value)
    names = args.solvers.split(",")
    for name in names:
        if name not in SOLVER_NAMES:
            ap.error(f"--solvers: unknown solver {name!r}")

    n, cols, labels = make_problem(args.rows + args.holdout, args.bits, args.fields, args.seed)
    train_cols, train_labels = cols[: args.rows], labels[: args.rows]
    holdout = as_batch(cols[args.rows:], labels[args.rows:])
    batches = [as_batch(train_cols[a:a + args.batch], train_labels[a:a + args.batch])
               for a in range(0, args.rows, args.batch)]
    print(f"rows {args.rows}, holdout {args.holdout}, buckets 2^{args.bits}, fields {args.fields}, "
          f"base rate {labels.mean():.4f}, l2 {args.l2_strength:g}, batch {args.batch}")
    t = time.perf_counter()
    cache = Path(args.optimum_cache) if args.optimum_cache else None
    settings = {k: getattr(args, k) for k in ("rows", "holdout", "bits", "fields", "l2_strength", "seed")}
    whole = as_batch(train_cols, train_labels)
    X = sp.csr_matrix((whole.data, whole.indices, whole.indptr), shape=(whole.n_rows, n))
    w, b = cached_optimum(cache, settings, X, train_labels, args.l2_strength)
    best = holdout_log_loss(holdout, w, b)
    print(f"full-batch optimum: holdout log-loss {best:.5f} ({time.perf_counter() - t:.0f} s)")

    first_time = None
    for name in names:
        solver = make_solver(name, n, "logistic", args.l2_strength, **options)
        solver.step(batches[0])  # compile the kernels outside the timing
        solver = make_solver(name, n, "logistic", args.l2_strength, **options)
        elapsed = 0.0
        for p in range(args.epochs):
            t = time.perf_counter()
            progressive = sum(solver.step(b) * b.n_rows for b in batches) / args.rows
            elapsed += time.perf_counter() - t
            loss = holdout_log_loss(holdout, np.asarray(solver.weights), solver.intercept)
            print(f"{name:8s} pass {p + 1}: progressive {progressive:.5f}  holdout {loss:.5f}  "
                  f"gap {100 * (loss - best) / best:+.3f}%")
        first_time = first_time or elapsed
        print(f"{name:8s} {elapsed:.1f} s for {args.epochs} passes, time ratio to {names[0]} "
              f"{elapsed / first_time:.2f}")


if __name__ == "__main__":
    main()
