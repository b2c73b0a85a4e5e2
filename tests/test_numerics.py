"""Numerics at the edges: identity numerics of 1e300, all-positive and all-negative labels, a single
row. Each run ends with finite weights or a one-line error, and no output file (model.json,
metrics.jsonl, progress.json, an evaluation's JSON, scores) holds NaN or infinity.

Reference: the README's promise (one-line errors, nothing partial) and strict JSON (RFC 8259 has no
NaN or Infinity literal); the logistic loss of a one-class sample has no finite minimizer in the
intercept (common practice), so only finiteness after finitely many steps is asserted there.
"""

import json
import math

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from trainer.cli import main

from conftest import assert_one_line

SPEC = {"label": {"column": "y"}, "hashing": {"bits": 10},
        "features": [{"column": "shop", "kind": "categorical"}, {"column": "amount", "kind": "numeric"}]}


def strict_json(text: str):
    """Parse JSON refusing NaN and Infinity (Python's json accepts them by default)."""
    def refuse(name):
        raise AssertionError(f"non-finite number {name} in JSON output")
    return json.loads(text, parse_constant=refuse)


def write(tmp_path, n, labels, amount):
    rng = np.random.default_rng(2)
    t = pa.table({"shop": pa.array([f"s{i}" for i in rng.integers(0, 5, n)]), "amount": pa.array(amount, pa.float64()),
                  "y": pa.array(labels, pa.int64())})
    pq.write_table(t, tmp_path / "log.parquet")
    (tmp_path / "spec.json").write_text(json.dumps(SPEC))
    return tmp_path / "log.parquet", tmp_path / "spec.json"


def check_outputs(tmp_path, data, out):
    """Every output of the model folder and of evaluate / score is finite."""
    for name in ("model.json", "metrics.jsonl", "progress.json"):
        text = (out / name).read_text()
        for line in (text.splitlines() if name.endswith(".jsonl") else [text]):
            strict_json(line)
    with np.load(out / "model.npz") as z:
        assert np.all(np.isfinite(z["weights"])) and math.isfinite(float(z["intercept"]))
    assert main(["evaluate", "--model", str(out), "--data", str(data), "--json", str(tmp_path / "e.json")]) == 0
    strict_json((tmp_path / "e.json").read_text())
    assert main(["score", "--model", str(out), "--data", str(data), "--out", str(tmp_path / "s.parquet")]) == 0
    scores = pq.read_table(tmp_path / "s.parquet").column("score").to_numpy()
    assert np.all(np.isfinite(scores)) and np.all((scores >= 0) & (scores <= 1))


def train(data, spec, out, *extra):
    return main(["train", "--spec", str(spec), "--data", str(data), "--out", str(out), "--quiet",
                 "--batch-rows", "100", "--epochs", "2", "--holdout", str(data), *extra])


def test_identity_numerics_of_1e300_give_one_line_and_no_file(tmp_path, capsys):
    n = 400
    data, spec = write(tmp_path, n, np.arange(n) % 2, np.full(n, 1e300))
    # online passes only: a log this small is otherwise trained full-batch, where L-BFGS-B fits a tiny
    # finite weight to the 1e300 column instead of diverging
    assert train(data, spec, tmp_path / "m", "--full-batch-memory", "0") == 2
    assert_one_line(2, capsys.readouterr().err.strip(), "\"transform\": \"log1p\"")
    assert not (tmp_path / "m").exists()


def test_huge_values_with_log1p_train_finite(tmp_path):
    # sign(x) ln(1 + |x|) of 1e300 is 690.8: the same column trains once transformed.
    n = 400
    data, spec = write(tmp_path, n, np.arange(n) % 2, np.where(np.arange(n) % 3 == 0, 1e300, 1.0))
    s = json.loads(spec.read_text())
    s["features"][1]["transform"] = "log1p"
    spec.write_text(json.dumps(s))
    assert train(data, spec, tmp_path / "m") == 0
    check_outputs(tmp_path, data, tmp_path / "m")


@pytest.mark.parametrize("label", [0, 1])
def test_one_class_is_refused_or_trains_finite(tmp_path, capsys, label):
    n = 300
    data, spec = write(tmp_path, n, np.full(n, label), np.linspace(0, 1, n))
    assert train(data, spec, tmp_path / "m") == 2
    assert_one_line(2, capsys.readouterr().err.strip(), "--allow-one-class")
    assert train(data, spec, tmp_path / "m", "--allow-one-class") == 0
    check_outputs(tmp_path, data, tmp_path / "m")
    holdout = strict_json((tmp_path / "m" / "metrics.jsonl").read_text().splitlines()[-1])["holdout"]
    assert holdout["auc"] is None  # undefined with one class: null, not NaN


def test_single_row(tmp_path, capsys):
    data, spec = write(tmp_path, 1, [1], [3.0])
    assert train(data, spec, tmp_path / "m") == 2
    assert_one_line(2, capsys.readouterr().err.strip(), "0 negative and 1 positive labels")
    assert train(data, spec, tmp_path / "m", "--allow-one-class") == 0
    check_outputs(tmp_path, data, tmp_path / "m")
