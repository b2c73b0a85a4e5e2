"""Shared fixtures: a small invented log with every feature kind, written hive-partitioned."""

import datetime as dt
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.optimize
import scipy.sparse as sp
from scipy.special import expit, log_expit

SMALL_SPEC = {
    "label": {"column": "clicked"},
    "time": {"column": "day"},
    "weight": {"column": "w"},
    "hashing": {"bits": 12, "seed": 42},
    "features": [
        {"column": "shop", "kind": "categorical"},
        {"column": "hour", "kind": "categorical"},
        {"column": "tags", "kind": "multi"},
        {"column": "amount", "kind": "numeric", "transform": "log1p"},
        {"column": "age_days", "kind": "numeric", "edges": [1, 7, 30]},
    ],
    "crosses": [["shop", "hour"], ["tags", "age_days"]],
}


def make_table(rng: np.random.Generator, n: int, day: dt.date | None = None) -> pa.Table:
    """An invented table of n rows with nulls in every feature column."""
    shops = np.array([f"shop-{i}" for i in range(30)] + ["é-ß-☃"], dtype=object)
    tags_pool = [f"t{i}" for i in range(8)]
    shop = shops[rng.integers(0, shops.size, n)]
    shop[rng.random(n) < 0.05] = None
    hour = rng.integers(0, 24, n)
    hour_mask = rng.random(n) < 0.05
    tags = []
    for _ in range(n):
        u = rng.random()
        if u < 0.1:
            tags.append(None)
        else:
            k = rng.integers(0, 4)
            tags.append([tags_pool[j] if rng.random() > 0.1 else None for j in rng.integers(0, 8, k)])
    amount = rng.exponential(20, n) - 2
    amount_mask = rng.random(n) < 0.1
    age = rng.integers(0, 60, n).astype(float)
    age_mask = rng.random(n) < 0.1
    clicked = (rng.random(n) < 0.2).astype(np.int64)
    cols = {
        "shop": pa.array(shop, pa.string()),
        "hour": pa.array(hour, pa.int64(), mask=hour_mask),
        "tags": pa.array(tags, pa.list_(pa.string())),
        "amount": pa.array(amount, pa.float64(), mask=amount_mask),
        "age_days": pa.array(age, pa.float64(), mask=age_mask),
        "clicked": pa.array(clicked),
        "w": pa.array(rng.uniform(0.5, 2.0, n)),
    }
    if day is not None:
        cols["day"] = pa.array([day] * n, pa.date32())
    return pa.table(cols)


def write_parts(folder: Path, rng: np.random.Generator, rows: int, parts: int = 2) -> Path:
    """``parts`` invented files of ``rows`` rows each (row groups of 1000) in a new ``folder``."""
    folder.mkdir()
    for i in range(parts):
        pq.write_table(make_table(rng, rows), folder / f"part-{i}.parquet", row_group_size=1000)
    return folder


@pytest.fixture
def small_log(tmp_path):
    """A hive-partitioned folder of three days (two files on the second day) plus its spec file."""
    rng = np.random.default_rng(5)
    root = tmp_path / "logs"
    for d, parts in [(1, 1), (2, 2), (3, 1)]:
        folder = root / f"day=2026-03-0{d}"
        folder.mkdir(parents=True)
        for p in range(parts):
            pq.write_table(make_table(rng, 700 + 100 * p), folder / f"part-{p}.parquet", row_group_size=300)
    spec_path = tmp_path / "spec.json"
    spec_path.write_text(json.dumps(SMALL_SPEC))
    return root, spec_path


def assert_one_line(code, err, needle):
    """The project's rule for bad input: exit code 2 and one line of error text that names ``needle``
    (the file, column or option), no traceback."""
    assert code == 2
    assert len(err.splitlines()) == 1 and "Traceback" not in err
    assert needle in err, err


def batch_csr(batch, n: int) -> sp.csr_matrix:
    """A hashed batch (trainer.reader.Batch) as a scipy.sparse CSR matrix of n columns, the tests'
    reference path for products with the weights. scipy sums duplicate entries: the meaning of
    colliding tokens (README.md, 'Hashing contract')."""
    return sp.csr_matrix((batch.data, batch.indices, batch.indptr), shape=(batch.n_rows, n))


def reference_objective(loss, X, y, c, lam):
    """F(w, b) = sum c_i l(y_i, x_i.w + b) / sum c_i + lam/2 ||w||^2 and its gradient, written with
    scipy/numpy only (no project code); ``loss`` "logistic" or "squared-hinge"."""
    n = X.shape[1]
    s = 2 * y - 1
    C = c.sum()

    def fg(x):
        z = X @ x[:n] + x[n]
        if loss == "logistic":
            values, dz = -log_expit(s * z), -s * expit(-s * z)
        else:
            u = np.maximum(0.0, 1.0 - s * z)
            values, dz = u * u, -2.0 * s * u
        g = np.empty(n + 1)
        g[:n] = X.T @ (c * dz) / C + lam * x[:n]
        g[n] = (c * dz).sum() / C
        return (c @ values) / C + 0.5 * lam * x[:n] @ x[:n], g

    return fg


def reference_optimum(fg, size: int):
    """The minimizer of ``fg`` (value and gradient) from zero by scipy.optimize.minimize L-BFGS-B with
    tight tolerances: the full-batch reference the online solvers are measured against."""
    return scipy.optimize.minimize(fg, np.zeros(size), jac=True, method="L-BFGS-B",
                                   options={"maxiter": 10000, "ftol": 1e-15, "gtol": 1e-12})


def make_model(spec, loss: str = "logistic", calibration: dict | None = None, seed: int = 0, info: dict | None = None):
    """A trainer.model.Model with random weights (about 30% exactly zero) and a random intercept,
    for tests that need a model but no training."""
    from trainer.model import Model

    rng = np.random.default_rng(seed)
    w = rng.normal(0.0, 0.7, spec.n_buckets)
    w[rng.random(spec.n_buckets) < 0.3] = 0.0
    return Model(spec, w, float(rng.normal(-1.0, 0.3)), loss, {"calibration": calibration, **(info or {})})


def hashed_demo(spec, day_from: str, day_to: str):
    """The demo logs of days ``day_from``..``day_to`` hashed by the reader, as one scipy CSR matrix and labels."""
    from trainer.api import demo_data_dir
    from trainer.reader import Reader

    reader = Reader(spec, demo_data_dir() / "logs", dt.date.fromisoformat(day_from), dt.date.fromisoformat(day_to),
                    batch_rows=1 << 20)
    parts, labels = [], []
    for b in reader.batches():
        parts.append(batch_csr(b, spec.n_buckets))
        labels.append(b.labels)
    return sp.vstack(parts).tocsr(), np.concatenate(labels)


@pytest.fixture(scope="session")
def demo_optimum():
    """The full-batch optimum of the demo's default objective (mean log-loss + l2/2 ||w||^2, intercept
    free, default l2) over all days but the last, by :func:`reference_optimum` (scipy L-BFGS-B), and
    its holdout log-loss on the last day by sklearn.metrics.log_loss: {"train_days", "holdout_day",
    "x", "ll_star"}. Computed once per session; it is the slowest reference of the suite."""
    from sklearn.metrics import log_loss

    from trainer.api import demo_data_dir
    from trainer.spec import load_spec
    from trainer.training import TrainOptions

    root = demo_data_dir()
    spec = load_spec(root / "spec.json")
    days = sorted(p.name.split("=", 1)[1] for p in (root / "logs").iterdir() if "=" in p.name)
    X, y = hashed_demo(spec, days[0], days[-2])
    Xh, yh = hashed_demo(spec, days[-1], days[-1])
    n = X.shape[1]
    opt = reference_optimum(reference_objective("logistic", X, y, np.ones(X.shape[0]), TrainOptions().l2_strength), n + 1)
    return {"train_days": f"{days[0]}..{days[-2]}", "holdout_day": days[-1], "x": opt.x,
            "ll_star": log_loss(yh, expit(Xh @ opt.x[:n] + opt.x[n]))}
