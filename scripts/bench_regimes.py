"""The regime matrix: hashcurve at default options against the full-batch optimum on logs of many shapes.

Usage:
    python scripts/bench_regimes.py [--regimes NAME,...] [--passes 3] [--skip-peer]

For each regime (generated once under bench_data/regimes/, or written from an open data set a
package ships) it computes

- LL*: the holdout log-loss of the full-batch optimum of the same objective on the same hashed CSR the
  tool reads (scipy L-BFGS-B, ``bench_train.reference_optimum``), cached under bench_data/optima/
  with the settings it depends on (a cache computed for other settings is refused);
- per pass, the holdout LL / LL* of `hashcurve train` at default options (only the regime's --l2
  set; patience = passes), of the tool's AdaGrad, SGD and (for 2^12 buckets or fewer) RES at their
  defaults, and of the SGD peer (scikit-learn SGDClassifier over the grid of bench_train.py on the
  in-memory CSR, the best setting at each pass);
- time to LL <= 1.01 LL*: hashcurve's cumulative training seconds from Parquet (metrics.jsonl), the
  peer's whole grid (every setting run to the target or 30 passes, the sum: what a user who must
  search the step pays) and the peer's single best setting known in advance;
- (c) one pass: hashcurve's first pass from Parquet (training seconds) over the median of the peer
  grid's first-pass times on the in-memory CSR, and beside it the memory-traffic floor of that pass's
  dense work: its steps x ``bench_train.dense_bytes_per_step`` over the triad bandwidth measured at
  the start of the run (``bench_train.triad_bandwidth``).

Timings on a shared machine are noisy: read them as measured, not as the tool's speed.

Before the first regime, two untimed passes on its first day load numba's kernels (:func:`warm_up`).

Regimes: ``bench20-l2-*``: the 20-field benchmark shape (300k training rows over three days, a 100k
holdout day, 2^20 buckets) at l2 1e-4, 1e-5 and 1e-6; ``drift-ordered`` / ``drift-shuffled``: config
drift12 (hour, weekday and campaign effects that drift day by day), seven training days of 60k rows
read in time order, or the same rows in one shuffled file, the eighth day held out, l2 1e-5;
``ordinal80``: 80 dense ordinal columns, 250k training rows, 2^18 buckets; ``small``: the same shape
with 8k training rows and 2^12 buckets, l2 1e-3; ``rare``: the benchmark shape at a 0.4% base rate,
l2 1e-5; ``tags200``: long multi-valued tag lists and tag x field crosses (200+ entries a row);
``demo``: the shipped demo logs; ``fair``: the "fair" extramarital-affairs survey shipped with
statsmodels (``statsmodels.datasets.fair``, 6366 rows, eight ordinal columns hashed as categoricals,
label affairs > 0, a seeded 70/30 split), l2 1e-3.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

from trainer.cli import configure_process  # stdlib only: settings that must precede numpy's BLAS

configure_process()

import numpy as np  # noqa: E402
import pyarrow as pa  # noqa: E402
import pyarrow.parquet as pq  # noqa: E402

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import loggen  # noqa: E402
from bench_train import (OPTIMUM_METHOD, PEER_PASSES, TARGET, cached_optimum, dense_bytes_per_step,  # noqa: E402
                         load_csr, log_loss, run_hashcurve, run_peer, triad_bandwidth)

from trainer.atomic import write_atomic  # noqa: E402
from trainer.options import TrainOptions  # noqa: E402
from trainer.solvers.res import MAX_FEATURES as RES_MAX_FEATURES  # noqa: E402
from trainer.spec import load_spec  # noqa: E402

ROOT = HERE.parent / "bench_data"
FAIR_COLUMNS = ("rate_marriage", "age", "yrs_married", "children", "religious", "educ", "occupation",
                "occupation_husb")


@dataclass(frozen=True)
class Regime:
    """One cell of the matrix: a generated log (``config`` of loggen, ``days`` x ``rows_per_day``, the
    last day held out) or an open data set (``config`` = "fair"), its hashing bits and --l2."""

    name: str
    config: str
    l2: float
    bits: int
    rows_per_day: int = 0
    days: int = 0
    shuffled: bool = False
    crosses: tuple = field(default=())

    @property
    def data_key(self) -> str:
        """The rows this regime trains on (the shuffled regime reads the ordered regime's rows)."""
        return f"{self.config}-{self.rows_per_day}x{self.days}-b{self.bits}"


REGIMES = (
    Regime("bench20-l2-1e-4", "bench20", 1e-4, 20, 100_000, 4),
    Regime("bench20-l2-1e-5", "bench20", 1e-5, 20, 100_000, 4),
    Regime("bench20-l2-1e-6", "bench20", 1e-6, 20, 100_000, 4),
    Regime("drift-ordered", "drift12", 1e-5, 20, 60_000, 8),
    Regime("drift-shuffled", "drift12", 1e-5, 20, 60_000, 8, shuffled=True),
    Regime("ordinal80", "ordinal80", 1e-4, 18, 50_000, 6),
    Regime("small", "ordinal80", 1e-3, 12, 4_000, 3),
    Regime("rare", "rare20", 1e-5, 20, 100_000, 4),
    Regime("tags200", "tags200", 1e-4, 20, 70_000, 4,
           crosses=(("context_tags", "device"), ("context_tags", "slot"))),
    Regime("demo", "demo", 1e-4, 0),
    Regime("fair", "fair", 1e-3, 12),
)


def _days(logs: Path) -> list[str]:
    return sorted(p.name.split("=", 1)[1] for p in logs.iterdir() if "=" in p.name)


def _fair(folder: Path) -> None:
    """Write the statsmodels "fair" survey as train/holdout Parquet files and its spec (once)."""
    import statsmodels.api as sm

    frame = sm.datasets.fair.load_pandas().data
    order = np.random.default_rng(13).permutation(len(frame))
    cut = int(0.7 * len(frame))
    folder.mkdir(parents=True, exist_ok=True)
    for name, rows in (("train", order[:cut]), ("holdout", order[cut:])):
        part = frame.iloc[np.sort(rows)]
        cols = {c: pa.array([f"{v:g}" for v in part[c]]) for c in FAIR_COLUMNS}
        cols["affair"] = pa.array(part["affairs"].to_numpy() > 0)
        pq.write_table(pa.table(cols), folder / f"{name}.parquet")
    spec = {"label": {"column": "affair"}, "hashing": {"bits": 12, "seed": 0},
            "features": [{"column": c, "kind": "categorical"} for c in FAIR_COLUMNS],
            "crosses": [["rate_marriage", "yrs_married"], ["religious", "age"]]}
    write_atomic(folder / "spec.json", [json.dumps(spec, indent=2).encode()])


def prepare(r: Regime) -> dict:
    """Write the regime's data once; return its spec path, training and holdout paths and the
    api.train keywords (date filters, holdout, l2)."""
    if r.config == "demo":
        from trainer.api import demo_data_dir

        root = demo_data_dir()
        days = _days(root / "logs")
        return {"spec": root / "spec.json", "data": root / "logs", "train": (days[0], days[-2]),
                "holdout": root / "logs", "hold": (days[-1], days[-1])}
    if r.config == "fair":
        folder = ROOT / "regimes" / "fair"
        if not (folder / "spec.json").exists():
            _fair(folder)
        return {"spec": folder / "spec.json", "data": folder / "train.parquet", "train": (None, None),
                "holdout": folder / "holdout.parquet", "hold": (None, None)}
    folder = ROOT / "regimes" / r.data_key
    if not (folder / "spec.json").exists():
        print(f"generating {r.rows_per_day * r.days:,} rows of {r.config} into {folder} ...", flush=True)
        written = loggen.write_logs(loggen.CONFIGS[r.config], folder, r.rows_per_day * r.days, days=r.days,
                                    seed=7, chunk_rows=min(65536, r.rows_per_day), bits=r.bits,
                                    overwrite=True)
        spec = json.loads(written.spec_path.read_text())
        spec["crosses"] += [list(c) for c in r.crosses]
        write_atomic(written.spec_path, [json.dumps(spec, indent=2).encode()])
    days = _days(folder / "logs")
    out = {"spec": folder / "spec.json", "data": folder / "logs", "train": (days[0], days[-2]),
           "holdout": folder / "logs", "hold": (days[-1], days[-1])}
    if r.shuffled:
        path = folder / "train-shuffled.parquet"
        if not path.exists():
            table = pq.read_table(folder / "logs", partitioning="hive",
                                  filters=[("event_day", "<=", days[-2])]).drop_columns(["event_day"])
            table = table.take(np.random.default_rng(5).permutation(table.num_rows))
            tmp = path.with_suffix(".tmp")
            pq.write_table(table, tmp, row_group_size=65536)
            tmp.rename(path)
        out.update(data=path, train=(None, None))
    return out


def train_keywords(d: dict, r: Regime) -> dict:
    kw = {"holdout": d["holdout"], "l2_strength": r.l2}
    for key, value in zip(("start", "end"), d["train"]):
        if value:
            kw[key] = value
    for key, value in zip(("holdout_start", "holdout_end"), d["hold"]):
        if value:
            kw[key] = value
    return kw


def run_regime(r: Regime, passes: int, skip_peer: bool, bandwidth: float) -> dict:
    d = prepare(r)
    spec = load_spec(d["spec"])
    X, y = load_csr(spec, d["data"], *d["train"])
    Xh, yh = load_csr(spec, d["holdout"], *d["hold"])
    print(f"\n== {r.name}: train {X.shape[0]:,} rows, holdout {Xh.shape[0]:,} rows, {spec.n_buckets:,} buckets, "
          f"{X.nnz / X.shape[0]:.1f} entries per row, base rate {y.mean():.4f}, l2 {r.l2:g}", flush=True)
    settings = {"data": r.data_key if r.config not in ("demo", "fair") else r.config, "l2": r.l2,
                "spec": spec.fingerprint(), "rows": int(X.shape[0]), "nnz": int(X.nnz),
                "method": OPTIMUM_METHOD}
    w, b = cached_optimum(ROOT / "optima" / f"{settings['data']}-l2-{r.l2:g}.npz", settings, X, y, r.l2)
    ll_star = log_loss(yh, Xh @ w + b)
    print(f"  LL* = {ll_star:.5f}", flush=True)
    kw = train_keywords(d, r)
    out = {"name": r.name, "ll_star": ll_star, "rows": int(X.shape[0]), "l2": r.l2}
    out["hashcurve"] = run_hashcurve(d["spec"], d["data"], passes, quiet=True, **kw)
    for h in out["hashcurve"]:
        print(f"  hashcurve pass {h['pass']} ({h['phase']}): {h['ll'] / ll_star:.4f} LL*, {h['seconds']:.1f} s",
              flush=True)
    for name in ("adagrad", "sgd", "res"):
        if name == "res" and spec.n_buckets > RES_MAX_FEATURES:
            continue
        out[name] = run_hashcurve(d["spec"], d["data"], passes, quiet=True, solver=name, **kw)
        print(f"  {name} at defaults: " + " / ".join(f"{h['ll'] / ll_star:.4f}" for h in out[name]), flush=True)
    if not skip_peer:
        out["peer"] = run_peer(X, y, Xh, yh, r.l2, TARGET * ll_star)
    first = out["hashcurve"][0]
    if first["phase"] == "online":
        out["dense_floor"] = first["steps"] * dense_bytes_per_step(spec.n_buckets, TrainOptions().history) / bandwidth
    if "peer" in out:
        out["peer_pass"] = float(np.median([p["history"][0]["seconds"] for p in out["peer"]]))
        floor = (f"; the dense work of its {first['steps']} steps moves at least {out['dense_floor']:.2f} s of memory "
                 "traffic" if "dense_floor" in out else "")
        print(f"  (c) one pass: hashcurve {first['seconds']:.2f} s from Parquet, the peer's median "
              f"{out['peer_pass']:.3f} s from memory: {first['seconds'] / out['peer_pass']:.2f}x{floor}", flush=True)
    return out


def _ratio(hist: list[dict] | None, p: int, ll_star: float) -> str:
    if not hist:
        return "-"
    h = hist[min(p, len(hist)) - 1]
    return f"{h['ll'] / ll_star:.4f}" if math.isfinite(h["ll"]) else "inf"


def _seconds(value: float) -> str:
    return f"{value:.1f}" if math.isfinite(value) else "not reached"


def _rows(n: int) -> str:
    return f"{round(n / 1000)}k" if n >= 10_000 else f"{n / 1000:.1f}k"


def print_table(results: list[dict], passes: int) -> None:
    """The matrix as one Markdown table (the README's): regime x pass, LL / LL* per solver, times to 1.01
    LL*, hashcurve's time over the peer grid's (i), and (c) its first pass over the peer's median pass."""
    print("\n| regime | rows | l2 | pass | hashcurve | phase | SGD peer best | AdaGrad | tool SGD | RES | "
          "hashcurve s to 1.01 LL* | peer grid s (i) | peer best s (ii) | hashcurve / (i) | (c) pass 1 / peer pass |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    for res in results:
        ll_star = res["ll_star"]
        ours = res["hashcurve"]
        hit = next((h["seconds"] for h in ours if h["ll"] <= TARGET * ll_star), math.inf)
        peer = res.get("peer")
        grid = sum(p["history"][-1]["seconds"] for p in peer) if peer else math.nan
        best = min((p["reached"]["seconds"] for p in peer if p["reached"]), default=math.inf) if peer else math.nan
        for p in range(1, passes + 1):
            peer_best = (f"{min(q['history'][min(p, len(q['history'])) - 1]['ll'] for q in peer) / ll_star:.4f}"
                         if peer else "-")
            one = (f"{ours[0]['seconds']:.2f} / {res['peer_pass']:.3f} s = {ours[0]['seconds'] / res['peer_pass']:.1f}x"
                   if peer else "-")
            times = (f"{_seconds(hit)} | {_seconds(grid) if peer else '-'} | {_seconds(best) if peer else '-'} | "
                     + (f"{hit / grid:.2f}x" if peer and math.isfinite(hit) and grid > 0 else "-") + f" | {one}"
                     if p == 1 else " | | | | ")
            phase = ours[p - 1]["phase"] if p <= len(ours) else "-"
            l2 = f"{res['l2']:.0e}".replace("e-0", "e-")
            head = f"{res['name']} | {_rows(res['rows'])} | {l2}" if p == 1 else " |  | "
            print(f"| {head} | {p} | {_ratio(ours, p, ll_star)} | {phase} | {peer_best} | "
                  f"{_ratio(res.get('adagrad'), p, ll_star)} | {_ratio(res.get('sgd'), p, ll_star)} | "
                  f"{_ratio(res.get('res'), p, ll_star)} | {times} |")
    print("\nLL* per regime: " + ", ".join(f"{r['name']} {r['ll_star']:.5f}" for r in results))
    print(f"peer grid: SGDClassifier constant steps and 'optimal', each to LL <= {TARGET} LL* or {PEER_PASSES} "
          "passes on the in-memory CSR; hashcurve from Parquet, training seconds only")
    floors = [f"{r['name']} {r['dense_floor']:.2f} s" for r in results if "dense_floor" in r]
    if floors:
        print("(c) the memory-traffic floor of an online first pass's dense work (steps x bytes a step / triad "
              "bandwidth): " + ", ".join(floors))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--regimes", default=",".join(r.name for r in REGIMES),
                    help="comma-separated regime names (default: all)")
    ap.add_argument("--passes", type=int, default=3)
    ap.add_argument("--skip-peer", action="store_true", help="leave out the scikit-learn SGD grid")
    a = ap.parse_args()
    by_name = {r.name: r for r in REGIMES}
    chosen = a.regimes.split(",")
    for name in chosen:
        if name not in by_name:
            ap.error(f"--regimes: unknown regime {name!r}; known: {', '.join(by_name)}")
    warm_up(by_name[chosen[0]])
    bandwidth = triad_bandwidth()
    print(f"triad bandwidth {bandwidth / 1e9:.1f} GB/s", flush=True)
    results = [run_regime(by_name[name], a.passes, a.skip_peer, bandwidth) for name in chosen]
    print_table(results, a.passes)


def warm_up(r: Regime) -> None:
    """Two passes on the first day of a regime's log, untimed: numba loads the online and full-batch
    kernels from its cache once per process (0.3-0.5 s), which would otherwise count in the first
    regime's time only."""
    d = prepare(r)
    kw = train_keywords(d, r)
    if "start" in kw:
        kw["end"] = kw["start"]
    run_hashcurve(d["spec"], d["data"], 2, quiet=True, **kw)


if __name__ == "__main__":
    main()
