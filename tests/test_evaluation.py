"""`evaluate` with segments against per-segment figures computed directly with scikit-learn, and the
squared-hinge path (margin metrics, Platt-calibrated probabilities) end to end."""

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from sklearn.metrics import log_loss, roc_auc_score

from trainer import api
from trainer.evaluation import OTHER, evaluate
from trainer.reader import Reader
from trainer.spec import load_spec

from conftest import make_model


def test_segments_match_sklearn_per_group(small_log):
    root, spec_path = small_log
    spec = load_spec(spec_path)
    model = make_model(spec, seed=3)
    out = evaluate(model, Reader(spec, root, batch_rows=700, keep=("shop",)), by="shop", segments=5)
    # reference: the same rows scored in one go, grouped with numpy, log-loss by sklearn (weighted)
    batches = list(Reader(spec, root, batch_rows=10_000, keep=("shop",)).batches())
    p = np.concatenate([model.predict(b) for b in batches])
    y = np.concatenate([b.labels for b in batches])
    w = np.concatenate([b.weights for b in batches])
    shop = np.concatenate([np.array(b.columns.column("shop").to_pylist(), dtype=object) for b in batches])
    shop = np.where(shop == None, "(null)", shop)  # noqa: E711 (element-wise comparison)
    values, counts = np.unique(shop.astype(str), return_counts=True)
    order = np.lexsort((values, -counts))
    rows = out["segments"]
    assert [r["value"] for r in rows[:5]] == list(values[order][:5])
    for r in rows[:5]:
        m = shop == r["value"]
        assert r["rows"] == m.sum()
        np.testing.assert_allclose(r["observed_rate"], np.average(y[m], weights=w[m]), rtol=1e-12)
        np.testing.assert_allclose(r["mean_prediction"], np.average(p[m], weights=w[m]), rtol=1e-12)
        np.testing.assert_allclose(r["log_loss"], log_loss(y[m], p[m], sample_weight=w[m], labels=[0, 1]),
                                   rtol=1e-9)
    assert rows[-1]["value"] == OTHER and sum(r["rows"] for r in rows) == y.size
    np.testing.assert_allclose(out["log_loss"], log_loss(y, p, sample_weight=w), rtol=1e-9)


def test_json_summary_has_stable_keys(small_log, tmp_path):
    root, spec_path = small_log
    model_dir = tmp_path / "m"
    make_model(load_spec(spec_path), seed=1).save(model_dir)
    api.evaluate(model_dir, root, json_out=tmp_path / "s.json")
    saved = json.loads((tmp_path / "s.json").read_text())
    for key in ("rows", "positives", "log_loss", "normalized_entropy", "auc", "brier", "calibration_ratio",
                "ece", "error_rate", "bins"):
        assert key in saved


def test_squared_hinge_training_gets_platt_probabilities(tmp_path):
    # An invented one-field log; AUC on margins checked with sklearn.metrics.roc_auc_score.
    rng = np.random.default_rng(8)
    n = 40_000
    shop = rng.integers(0, 30, n)
    y = rng.random(n) < 1 / (1 + np.exp(-rng.normal(-1.5, 1.0, 30)[shop]))
    pq.write_table(pa.table({"shop": shop[:30_000], "y": y[:30_000]}), tmp_path / "train.parquet")
    pq.write_table(pa.table({"shop": shop[30_000:], "y": y[30_000:]}), tmp_path / "hold.parquet")
    (tmp_path / "spec.json").write_text(json.dumps({"label": {"column": "y"}, "hashing": {"bits": 8},
                                                    "features": [{"column": "shop", "kind": "categorical"}]}))
    model = api.train(tmp_path / "spec.json", tmp_path / "train.parquet", tmp_path / "m", loss="squared-hinge",
                      holdout=tmp_path / "hold.parquet", epochs=2).model
    assert model.has_probability and model.calibration["method"] == "platt"
    api.score(tmp_path / "m", tmp_path / "hold.parquet", tmp_path / "s.parquet")
    scored = pq.read_table(tmp_path / "s.parquet")
    assert scored.column_names == ["score", "probability"]
    summary = api.evaluate(tmp_path / "m", tmp_path / "hold.parquet")
    margins = scored.column("score").to_numpy()
    np.testing.assert_allclose(summary["margin"]["auc"], roc_auc_score(y[30_000:], margins),
                               atol=summary["margin"]["auc_error_bound"] + 1e-12)
    # Platt scaling was fitted on this slice: the likelihood equation of its offset b makes the mean
    # probability equal the mean (smoothed) target there ("Probabilistic Outputs for Support Vector
    # Machines and Comparisons to Regularized Likelihood Methods", 1999; from memory)
    assert abs(summary["calibration_ratio"] - 1) < 0.05
