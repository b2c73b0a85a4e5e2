"""Reader throughput: Parquet -> hashed CSR batches, beside pyarrow's own read of the same file.

Usage: python scripts/bench_reader.py [--rows 1000000] [--data FILE --spec SPEC] [--repeat 3]
Without --data it generates (once) the 20-field benchmark log with scripts/loggen.py under
bench_data/. Prints the best of --repeat runs of each and their ratio (target: reader <= 2.5x).
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq

from trainer.cli import configure_process
from trainer.reader import Reader
from trainer.spec import load_spec

HERE = Path(__file__).resolve().parent


def best_of(repeat: int, fn) -> float:
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return min(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--data")
    ap.add_argument("--spec")
    ap.add_argument("--batch-rows", type=int, default=4096)
    ap.add_argument("--repeat", type=int, default=3)
    a = ap.parse_args()
    configure_process()
    if a.data is None:
        data = HERE.parent / "bench_data" / f"bench20-{a.rows}.parquet"
        if not data.exists():
            data.parent.mkdir(exist_ok=True)
            subprocess.run([sys.executable, str(HERE / "loggen.py"), "--config", "bench20", "--rows", str(a.rows),
                            "--out", str(data), "--bits", "20", "--chunk-rows", "131072"], check=True)
        spec_path = data.with_suffix(".spec.json")
    else:
        data, spec_path = Path(a.data), Path(a.spec)
    spec = load_spec(spec_path)
    columns = [c for c in spec.data_columns() if c != spec.time_column]  # what the reader reads without dates
    n_cols = len(columns)

    def plain():
        pq.read_table(data, columns=columns, use_threads=False)

    def plain_threads():
        pq.read_table(data, columns=columns)

    rows = 0

    def ours():
        nonlocal rows
        rows = sum(b.n_rows for b in Reader(spec, data, batch_rows=a.batch_rows).batches())

    ours()  # compile numba kernels (cached on disk) before timing
    t_plain = best_of(a.repeat, plain)
    t_threads = best_of(a.repeat, plain_threads)
    t_ours = best_of(a.repeat, ours)
    print(f"file: {data} ({rows:,} rows, {n_cols} columns read, {len(spec.features)} features, "
          f"{len(spec.crosses)} crosses, 2^{spec.bits} buckets)")
    print(f"pyarrow read_table, 1 thread     {t_plain:8.3f} s  {rows / t_plain / 1e6:6.2f} M rows/s")
    print(f"pyarrow read_table, all threads  {t_threads:8.3f} s  {rows / t_threads / 1e6:6.2f} M rows/s")
    print(f"hashcurve reader -> CSR batches  {t_ours:8.3f} s  {rows / t_ours / 1e6:6.2f} M rows/s")
    print(f"ratio reader / pyarrow (1 thread): {t_ours / t_plain:.2f}x   "
          f"(/ all threads: {t_ours / t_threads:.2f}x; target <= 2.5x)")


if __name__ == "__main__":
    main()
