"""`hashcurve demo` end to end on the shipped logs, and the quality of its default model against the
full-batch optimum of the same objective found by scipy.optimize (L-BFGS-B)."""

import json

import numpy as np
import pyarrow.parquet as pq
import pytest

from trainer.api import demo
from trainer.cli import main


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    return demo(tmp_path_factory.mktemp("demo"))


def test_demo_writes_every_output(result):
    for key in ("model", "export", "scores", "metrics", "report"):
        assert result[key].exists(), key
    scores = pq.read_table(result["scores"]).column("score").to_numpy()
    # reference: demo_data/README.md, 25000 rows on the holdout day 2024-05-13; probabilities lie in (0, 1)
    assert scores.size == result["summary"]["rows"] == 25_000
    assert ((scores > 0) & (scores < 1)).all()
    saved = json.loads(result["metrics"].read_text())
    assert saved["rows"] == 25_000 and 0 < saved["log_loss"] < 1


def test_demo_model_close_to_full_batch_optimum(result, demo_optimum):
    # Reference: the same objective (mean log-loss + l2/2 ||w||^2, intercept free) on the same hashed
    # rows, minimized over the whole training set by scipy.optimize L-BFGS-B; holdout log-loss by
    # sklearn.metrics.log_loss (conftest.demo_optimum).
    assert (result["train_days"], result["holdout_day"]) == (demo_optimum["train_days"], demo_optimum["holdout_day"])
    # the one-pass quality target of the README's Performance table: within 1% of LL*
    assert result["summary"]["log_loss"] <= 1.01 * demo_optimum["ll_star"]


def test_demo_command_line(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "d"), "--quiet"]) == 0
    printed = capsys.readouterr().out
    for word in ("HTML report", "holdout scores", "export"):
        assert word in printed


def test_demo_reliability_bins_and_report(result):
    saved = json.loads(result["metrics"].read_text())
    scores = np.sort(pq.read_table(result["scores"]).column("score").to_numpy())
    bins = saved["bins"]
    # Reference: numpy.quantile(method="inverted_cdf") of the scored holdout day: 20 bins of
    # 1,250 rows, each ending at its quantile (within one rank-histogram cell, 2^-12 of p).
    assert len(bins) == 20 and all(abs(b["count"] - 1250) <= 10 for b in bins)
    q = np.quantile(scores, np.arange(1, 20) / 20, method="inverted_cdf")
    for b, qj in zip(bins[:-1], q):
        assert b["hi"] * (1 - 2.0 ** -12) - 1e-12 <= qj <= b["hi"] * (1 + 2.0 ** -12) + 1e-12
    page = result["report"].read_text()
    options = page[page.index("Training options"):]
    # Reference: the solver's default initial step (trainer/solvers/olbfgs.py docstring, 0.3).
    assert "0.3 (default: the solver&#x27;s own)" in options and "None" not in options
    assert page.count('<p class="verdict">') == 1 and "log-scaled axes" in page
