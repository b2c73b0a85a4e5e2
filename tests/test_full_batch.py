"""The default solver's automatic phases: a tiny log trained full-batch reaches the scipy optimum, a
scikit-learn data set gives scikit-learn's model, and a log that fits in memory switches to
full-batch passes after the first, recorded in metrics.jsonl and run.json; the full-batch pass of
several values in lockstep is scipy's L-BFGS-B run on each alone."""

import json

import numba
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.optimize
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import log_loss

from conftest import SMALL_SPEC, batch_csr, make_table, reference_objective, reference_optimum
from trainer import api
from trainer.kernels import batch_support, dot, margins_into, residuals_into, scatter_compact
from trainer.losses import loss_code
from trainer.model import LOSSES
from trainer.reader import Reader
from trainer.solvers import full_batch, make_solver
from trainer.solvers.full_batch import InMemoryLog
from trainer.training import AVERAGE_POWER


def hashed(spec, path):
    reader = Reader(spec, path, batch_rows=1 << 20)
    batch = next(reader.batches())
    return batch_csr(batch, spec.n_buckets), batch.labels, batch.weights


def test_tiny_log_reaches_the_scipy_optimum(tmp_path):
    # Reference: the same objective (weighted mean log-loss + l2/2 ||w||^2, intercept free) on the same
    # hashed rows, minimized by scipy.optimize L-BFGS-B with tight tolerances (conftest helpers).
    rng = np.random.default_rng(21)
    pq.write_table(make_table(rng, 6000), tmp_path / "log.parquet")
    spec_path = tmp_path / "spec.json"
    spec_path.write_text(json.dumps({k: v for k, v in SMALL_SPEC.items() if k != "time"}))
    model = api.train(spec_path, tmp_path / "log.parquet", tmp_path / "m", l2_strength=1e-3).model
    spec = model.spec
    X, y, c = hashed(spec, tmp_path / "log.parquet")
    fg = reference_objective("logistic", X, y, c, 1e-3)
    best = reference_optimum(fg, spec.n_buckets + 1)
    ours = fg(np.append(model.weights, model.intercept))[0]
    assert abs(ours - best.fun) <= 1e-6 * best.fun
    lines = [json.loads(x) for x in (tmp_path / "m" / "metrics.jsonl").read_text().splitlines()]
    assert [x["phase"] for x in lines] == ["full-batch"] * 3
    phases = json.loads((tmp_path / "m" / "run.json").read_text())["phases"]
    assert phases[0]["from_pass"] == 1 and phases[0]["phase"] == "full-batch" and "tiny" in phases[0]["reason"]


def test_breast_cancer_matches_scikit_learn(tmp_path):
    # Reference: scikit-learn's LogisticRegression (lbfgs, intercept unpenalized) with C = 1 / (n l2),
    # the same objective as --l2 in per-row-average form, on scikit-learn's bundled Wisconsin breast
    # cancer data (569 rows, 30 numeric columns), standardized, split 70/30 with a fixed seed.
    X, y = load_breast_cancer(return_X_y=True)
    X = (X - X.mean(axis=0)) / X.std(axis=0)
    order = np.random.default_rng(2).permutation(len(y))
    train, hold = order[:400], order[400:]
    names = [f"x{j:02d}" for j in range(X.shape[1])]
    for name, rows in (("train", train), ("hold", hold)):
        cols = {c: pa.array(X[rows, j]) for j, c in enumerate(names)}
        cols["malignant"] = pa.array(y[rows] == 0)
        pq.write_table(pa.table(cols), tmp_path / f"{name}.parquet")
    spec = {"label": {"column": "malignant"}, "hashing": {"bits": 18},
            "features": [{"column": c, "kind": "numeric"} for c in names]}
    (tmp_path / "spec.json").write_text(json.dumps(spec))
    l2 = 1e-3
    model = api.train(tmp_path / "spec.json", tmp_path / "train.parquet", tmp_path / "m", l2_strength=l2,
                      holdout=tmp_path / "hold.parquet").model
    assert np.count_nonzero(model.weights) == len(names)  # no two columns share a bucket
    ref = LogisticRegression(C=1.0 / (len(train) * l2), tol=1e-10, max_iter=10_000).fit(X[train], y[train] == 0)
    ll_ref = log_loss(y[hold] == 0, ref.predict_proba(X[hold])[:, 1])
    ours = api.evaluate(model, tmp_path / "hold.parquet")["log_loss"]
    assert abs(ours - ll_ref) <= 0.002 * ll_ref


@pytest.fixture(scope="module")
def log_60k(tmp_path_factory):
    root = tmp_path_factory.mktemp("phaselog")
    rng = np.random.default_rng(8)
    pq.write_table(make_table(rng, 60_000), root / "log.parquet", row_group_size=5000)
    spec = root / "spec.json"
    spec.write_text(json.dumps({k: v for k, v in SMALL_SPEC.items() if k != "time"}))
    return root / "log.parquet", spec


def test_full_batch_after_the_first_pass_and_only_within_the_budget(log_60k, tmp_path):
    # Reference: the budget arithmetic of trainer.solvers.full_batch.log_bytes (12 bytes per entry, 48
    # per row) against the entries the reader hands out; the phase follows the stated rule.
    data, spec_path = log_60k
    api.train(spec_path, data, tmp_path / "fits", batch_rows=1000, epochs=2)
    recs = [json.loads(x) for x in (tmp_path / "fits" / "metrics.jsonl").read_text().splitlines()]
    assert [r["phase"] for r in recs] == ["online", "full-batch"]
    assert recs[1]["full_batch"]["iterations"] >= 1
    api.train(spec_path, data, tmp_path / "big", batch_rows=1000, epochs=2, full_batch_memory=1)
    recs = [json.loads(x) for x in (tmp_path / "big" / "metrics.jsonl").read_text().splitlines()]
    assert [r["phase"] for r in recs] == ["online", "online"]  # 60k rows x ~8 entries take more than 1 MB
    assert json.loads((tmp_path / "big" / "run.json").read_text())["phases"] == []


def test_an_online_pass_gives_the_polynomial_decay_average_of_its_iterates(log_60k, tmp_path):
    # Reference: the solver replayed outside the training loop on batches cut by the documented growth
    # rule (1/32 of the rows seen, between --batch-rows and 16x it; "Sample size selection in
    # optimization methods for machine learning", Mathematical Programming 134, 2012), its iterates
    # averaged in numpy with the polynomial-decay weights measured in rows, R_t^(eta+1) - R_(t-1)^(eta+1)
    # after R_t rows (for equal batches proportional to t^eta as in "Stochastic Gradient Descent for
    # Non-smooth Optimization: Convergence Results and Optimal Averaging Schemes", ICML 2013; from memory).
    data, spec_path = log_60k
    result = api.train(spec_path, data, tmp_path / "m", batch_rows=1000, epochs=1)
    model = result.model
    solver = make_solver("olbfgs", model.spec.n_buckets, "logistic", 1e-4)
    iterates, rows = [], [0]

    def grown(seen):  # the rule as documented, written out
        return min(max(1000, seen // 32), 16_000)

    for batch in Reader(model.spec, data, batch_rows=1000).batches(0, sizes=grown):
        solver.step(batch)
        iterates.append(np.append(solver.weights, solver.intercept))
        rows.append(rows[-1] + batch.n_rows)
    rows = rows[1:]
    assert rows[31] == 32_000 and rows[32] == 33_000 and rows[33] == 34_031  # growth starts at 32k rows
    sizes = np.diff([0] + rows)
    record = result.per_pass[0]  # the per-pass record states the steps and batch sizes it took
    assert record["steps"] == len(iterates) and record["batch_rows"] == [sizes.min(), sizes.max()]
    ends = np.array([0] + rows, dtype=np.float64)
    weights = np.diff(ends ** (AVERAGE_POWER + 1))
    expected = weights @ np.array(iterates) / weights.sum()
    np.testing.assert_allclose(np.append(model.weights, model.intercept), expected, rtol=1e-9, atol=1e-12)
    assert not np.allclose(expected, iterates[-1], rtol=1e-3)  # the average is not the last iterate


def _in_memory_log(rng, rows=2000, n=300, nnz=6):
    """A random weighted log as the full-batch pass holds it; row 0 holds one bucket twice."""
    indices = rng.integers(0, n, rows * nnz).astype(np.int32)
    indices[1] = indices[0]
    slot = np.empty(indices.shape[0], dtype=np.int32)
    cols = batch_support(indices, np.zeros((n + 63) // 64, dtype=np.uint64), slot)
    return InMemoryLog(np.arange(rows + 1, dtype=np.int64) * nnz, cols, slot, rng.normal(size=rows * nnz),
                       (rng.random(rows) < 0.3).astype(np.float64), rng.uniform(0.5, 2.0, rows))


def _scipy_pass(log, code, l2, x, iterations):
    """One full-batch pass as scipy.optimize.minimize runs it: its L-BFGS-B loop on the objective written
    with the one-model kernels (margins_into, residuals_into, scatter_compact, each checked against dense
    numpy in test_losses_kernels.py), the same Jacobi scaling and options."""
    m, n = log.cols.shape[0], x.shape[0] - 1
    z, r = np.empty(log.n_rows), np.empty(log.n_rows)
    v0 = np.append(x[log.cols], x[n])
    scale = 1.0 / np.sqrt(np.maximum(full_batch._diagonal(log, code, l2, v0, z), 1e-12))

    def fg(u):
        v = u * scale
        w = v[:m]
        margins_into(log.indptr, log.slot, log.data, w, float(v[m]), z)
        loss_sum, weight_sum, r_sum = residuals_into(code, log.labels, log.weights, z, r)
        g = np.empty(m + 1)
        scatter_compact(log.indptr, log.slot, log.data, r, 1.0 / weight_sum, g[:m])
        g[:m] += l2 * w
        g[m] = r_sum / weight_sum
        return loss_sum / weight_sum + 0.5 * l2 * dot(w, w), g * scale

    res = scipy.optimize.minimize(fg, v0 / scale, jac=True, method="L-BFGS-B",
                                  options={"maxiter": iterations, "maxcor": 10, "ftol": full_batch.FTOL,
                                           "gtol": full_batch.GTOL, "maxfun": 2 * iterations + 20})
    out = np.zeros_like(x)
    out[log.cols] = res.x[:m] * scale[:m]
    out[n] = res.x[m] * scale[m]
    return out, res


@pytest.mark.parametrize("loss", LOSSES)
@pytest.mark.parametrize("iterations,threads", [(8, 1), (30, 1), (30, 2)])
def test_values_in_lockstep_are_each_scipys_l_bfgs_b_bit_for_bit(loss, iterations, threads):
    # Reference: scipy.optimize.minimize(method="L-BFGS-B") on each value alone ("Algorithm 778:
    # L-BFGS-B", ACM TOMS 23, 1997), with the pass's scaling and options: the same weights bit for bit,
    # iterations, evaluations (minimize's nfev), objective and convergence, whether the values' evaluations
    # run on one thread or are split over two. The strong values converge in a few iterations and leave
    # the lockstep while the others go on.
    rng = np.random.default_rng(17)
    log = _in_memory_log(rng)
    code = loss_code(loss)
    x0 = np.zeros(301)
    x0[rng.integers(0, 300, 40)] = rng.normal(scale=0.3, size=40)
    l2s = [1e-4, 1e-3, 3e-2, 1.0, 1e3]
    xs = [x0.copy() for _ in l2s]
    before = numba.get_num_threads()
    numba.set_num_threads(min(threads, numba.config.NUMBA_NUM_THREADS))
    try:
        fitted = full_batch.minimize(log, code, l2s, xs, iterations=iterations)
    finally:
        numba.set_num_threads(before)
    assert len({f["iterations"] for f in fitted}) > 1
    for l2, x, f in zip(l2s, xs, fitted):
        ref, res = _scipy_pass(log, code, l2, x0, iterations)
        assert np.array_equal(x, ref)  # bit for bit
        assert (f["iterations"], f["evaluations"], f["objective"]) == (res.nit, res.nfev, res.fun)
        assert f["converged"] == (res.success and res.nit < iterations) and not f["stopped"]
        alone = x0.copy()
        one, = full_batch.minimize(log, code, [l2], [alone], iterations=iterations)
        assert one["iterations"] == res.nit
        assert np.array_equal(alone, x)


def test_values_are_split_over_threads_in_groups_of_nearly_equal_size():
    # Reference: the documented rule of groups (min(count, threads) consecutive groups, sizes differing
    # by at most one, larger first), worked by hand.
    assert full_batch.groups(5, 2) == [slice(0, 3), slice(3, 5)]
    assert full_batch.groups(1, 2) == [slice(0, 1)]
    assert full_batch.groups(8, 3) == [slice(0, 3), slice(3, 6), slice(6, 8)]
    assert full_batch.groups(4, 1) == [slice(0, 4)]


def test_a_stop_after_an_iteration_leaves_every_value_unchanged():
    # Reference: the documented contract of minimize's ``stop`` (polled after every iteration).
    log = _in_memory_log(np.random.default_rng(5))
    polls = []
    xs = [np.full(301, 0.1), np.full(301, 0.2)]
    fitted = full_batch.minimize(log, 0, [1e-3, 1e-2], xs, stop=lambda: polls.append(1) or len(polls) == 3)
    assert len(polls) == 3 and all(f["stopped"] for f in fitted)
    assert np.all(xs[0] == 0.1) and np.all(xs[1] == 0.2)
