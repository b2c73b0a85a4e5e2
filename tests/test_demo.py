"""`hashcurve demo` end to end on the shipped logs, and the quality of its default model against the
full-batch optimum of the same objective found by scikit-learn's LogisticRegression."""

import datetime as dt
import json

import numpy as np
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp
from scipy.optimize import minimize
from scipy.special import expit
from sklearn.metrics import log_loss

from trainer.api import demo, demo_data_dir
from trainer.cli import main
from trainer.reader import Reader
from trainer.spec import load_spec
from trainer.training import TrainOptions


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    return out, demo(out)


def hashed(spec, day_from, day_to):
    reader = Reader(spec, demo_data_dir() / "logs", dt.date.fromisoformat(day_from), dt.date.fromisoformat(day_to),
                    batch_rows=1 << 20)
    parts, labels = [], []
    for b in reader.batches():
        parts.append(sp.csr_matrix((b.data, b.indices, b.indptr), shape=(b.n_rows, spec.n_buckets)))
        labels.append(b.labels)
    return sp.vstack(parts).tocsr(), np.concatenate(labels)


def test_demo_writes_every_output(demo_out):
    out, result = demo_out
    for key in ("model", "export", "scores", "metrics", "report"):
        assert result[key].exists(), key
    scores = pq.read_table(result["scores"]).column("score").to_numpy()
    assert scores.size == result["summary"]["rows"] == 25_000
    assert ((scores > 0) & (scores < 1)).all()
    saved = json.loads(result["metrics"].read_text())
    assert saved["rows"] == 25_000 and 0 < saved["log_loss"] < 1


def test_demo_model_close_to_full_batch_optimum(demo_out):
    # Reference: the same objective (mean log-loss + l2/2 ||w||^2, intercept free) on the same hashed
    # rows, minimized over the whole training set by scipy.optimize L-BFGS-B; holdout log-loss by
    # sklearn.metrics.log_loss.
    out, result = demo_out
    spec = load_spec(demo_data_dir() / "spec.json")
    X, y = hashed(spec, "2024-05-06", "2024-05-12")
    Xh, yh = hashed(spec, "2024-05-13", "2024-05-13")
    l2, (rows, n) = TrainOptions().l2, X.shape
    Xt = X.T.tocsr()

    def objective(v):
        z = X @ v[:n] + v[n]
        f = np.mean(np.logaddexp(0, z) - y * z) + 0.5 * l2 * v[:n] @ v[:n]
        r = (expit(z) - y) / rows
        return f, np.append(Xt @ r + l2 * v[:n], r.sum())

    opt = minimize(objective, np.zeros(n + 1), jac=True, method="L-BFGS-B",
                   options={"maxiter": 5000, "ftol": 1e-14, "gtol": 1e-9})
    ll_star = log_loss(yh, expit(Xh @ opt.x[:n] + opt.x[n]))
    assert result["summary"]["log_loss"] <= 1.01 * ll_star


def test_demo_command_line(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "d"), "--quiet"]) == 0
    printed = capsys.readouterr().out
    for word in ("HTML report", "holdout scores", "export"):
        assert word in printed
