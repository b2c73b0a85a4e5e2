"""The scikit-learn estimator: scikit-learn's own estimator checks, agreement with the command line
(``hashcurve score`` and the reference scorer on an export, ``hashcurve train`` for partial_fit),
model selection on the demo logs, and the export round trip."""

import importlib.util
import json
import subprocess
import sys
from pathlib import Path

import jsonschema
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sklearn.base import clone
from sklearn.metrics import log_loss
from sklearn.model_selection import GridSearchCV, KFold
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import FunctionTransformer
from sklearn.utils.estimator_checks import parametrize_with_checks

import trainer
from trainer.cli import main
from trainer.errors import UserError
from trainer.estimator import HashedLogisticClassifier, infer_spec
from trainer.model import load_model

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_data"
DAYS = ["2024-05-06", "2024-05-07"]

_loader = importlib.util.spec_from_file_location("score_reference", ROOT / "reference" / "score_reference.py")
ref = importlib.util.module_from_spec(_loader)
_loader.loader.exec_module(ref)

#: Checks of sklearn.utils.estimator_checks expected to fail, with the reason. None fails because
#: the inputs are tables: the estimator also takes 2-d arrays (columns x0, x1, ..., numeric
#: features), so every check runs on the arrays it generates.
EXPECTED_FAILED = {
    "check_sample_weight_equivalence_on_dense_data":
        "online L-BFGS damps its curvature estimate by the rows it has seen (a row count, not a weight "
        "sum), so a row of weight 2 and a repeated row give different steps; the SGD solver passes",
}


@parametrize_with_checks([HashedLogisticClassifier(bits=8, epochs=1)],
                         expected_failed_checks=lambda est: EXPECTED_FAILED)
def test_sklearn_estimator_checks(estimator, check):
    # Reference: scikit-learn's estimator checks (sklearn.utils.estimator_checks).
    check(estimator)


def test_sample_weight_equivalence_holds_for_sgd():
    # Reference: scikit-learn's check_sample_weight_equivalence_on_dense_data; the expected failure
    # above comes from the default solver's row count, not from the estimator's weight handling.
    from sklearn.utils.estimator_checks import check_sample_weight_equivalence_on_dense_data
    check_sample_weight_equivalence_on_dense_data("HashedLogisticClassifier",
                                                  HashedLogisticClassifier(bits=8, epochs=1, solver="sgd"))


def demo_table(days=DAYS) -> pa.Table:
    table = pq.read_table(DEMO / "logs", filters=[("event_day", "in", days)])
    return table.set_column(table.schema.get_field_index("event_day"), "event_day",
                            table.column("event_day").cast(pa.string()).cast(pa.date32()))


def demo_spec() -> dict:
    return json.loads((DEMO / "spec.json").read_text())


@pytest.fixture(scope="module")
def demo_frame():
    df = demo_table().to_pandas()
    return df.drop(columns=["ordered"]), df["ordered"]


def test_predict_proba_equals_cli_score_and_reference_scorer(demo_frame, tmp_path):
    # References: `hashcurve score` on the export of the fitted model (the command line's scoring
    # path), and reference/score_reference.py (the hashing contract in plain Python + mmh3).
    X, y = demo_frame
    clf = HashedLogisticClassifier(spec=demo_spec(), bits=14, epochs=1).fit(X, y)
    rows = tmp_path / "rows.parquet"
    pq.write_table(pa.Table.from_pandas(X, preserve_index=False), rows)
    clf.save(tmp_path / "export")
    assert main(["score", "--model", str(tmp_path / "export"), "--data", str(rows),
                 "--out", str(tmp_path / "s.parquet")]) == 0
    cli = pq.read_table(tmp_path / "s.parquet").column("score").to_numpy()
    proba = clf.predict_proba(X)
    np.testing.assert_allclose(proba[:, 1], cli, rtol=0, atol=1e-12)
    np.testing.assert_allclose(proba.sum(axis=1), 1.0, rtol=0, atol=1e-15)
    head = tmp_path / "head.parquet"
    pq.write_table(pq.read_table(rows).slice(0, 300), head)
    np.testing.assert_allclose(clf.decision_function(X.iloc[:300]), ref.margins(tmp_path / "export", head),
                               rtol=0, atol=1e-12)
    assert set(clf.predict(X)) <= {False, True} and list(clf.classes_) == [False, True]


def test_squared_hinge_probabilities_only_when_calibrated(tmp_path):
    # Reference: `hashcurve score`'s probability column (Platt scaling fitted on the holdout day).
    table = demo_table()
    plain = HashedLogisticClassifier(spec=demo_spec(), loss="squared-hinge", epochs=1)
    assert not hasattr(plain, "predict_proba")
    with pytest.raises(AttributeError) as missing:
        plain.predict_proba
    assert "holdout_start" in str(missing.value.__cause__)
    clf = HashedLogisticClassifier(spec=demo_spec(), loss="squared-hinge", bits=14, epochs=1, end=DAYS[0],
                                   holdout_start=DAYS[1], holdout_end=DAYS[1]).fit(table)
    assert clf.model_.calibration is not None
    rows = tmp_path / "rows.parquet"
    pq.write_table(table, rows)
    clf.save(tmp_path / "export")
    assert main(["score", "--model", str(tmp_path / "export"), "--data", str(rows),
                 "--out", str(tmp_path / "s.parquet")]) == 0
    scored = pq.read_table(tmp_path / "s.parquet")
    np.testing.assert_allclose(clf.decision_function(table), scored.column("score").to_numpy(), rtol=0, atol=1e-12)
    np.testing.assert_allclose(clf.predict_proba(table)[:, 1], scored.column("probability").to_numpy(),
                               rtol=0, atol=1e-12)


def select_features(df):
    """The pipeline's first step: the demo's feature columns (the time column stays out)."""
    return df.drop(columns=["event_day"])


def test_grid_search_in_a_pipeline_on_demo_frame(demo_frame):
    # Reference: scikit-learn's GridSearchCV and Pipeline; each fold's score is checked against
    # sklearn.metrics.log_loss on a fit made by hand. KFold without shuffling keeps the folds in
    # time order (rows are in day order).
    X, y = demo_frame
    X, y = X.iloc[:12000], y.iloc[:12000]
    pipe = Pipeline([("select", FunctionTransformer(select_features)),
                     ("clf", HashedLogisticClassifier(bits=12, epochs=1))])
    grid = {"clf__l2_strength": [1e-5, 1e-4, 1e-3]}
    search = GridSearchCV(pipe, grid, cv=KFold(2), scoring="neg_log_loss", error_score="raise").fit(X, y)
    scores = search.cv_results_["split0_test_score"]
    assert np.all(np.isfinite(scores)) and len(scores) == 3
    train, test = next(KFold(2).split(X))
    by_hand = clone(pipe).set_params(clf__l2_strength=1e-3).fit(X.iloc[train], y.iloc[train])
    assert scores[2] == pytest.approx(-log_loss(y.iloc[test], by_hand.predict_proba(X.iloc[test])[:, 1]),
                                      rel=1e-12)
    best = search.best_estimator_.named_steps["clf"]
    assert best.l2_strength == search.best_params_["clf__l2_strength"]
    assert list(best.feature_names_in_) == list(select_features(X).columns)


def test_save_load_round_trip(demo_frame, tmp_path):
    # Reference: the export format (README "Export format"): two files, no pickle; a loaded
    # estimator predicts bit for bit what the saved one did.
    X, y = demo_frame
    clf = HashedLogisticClassifier(bits=12, epochs=1, l2_strength=3e-4).fit(X, y)
    out = clf.save(tmp_path / "export")
    assert sorted(p.name for p in out.iterdir()) == ["model.json", "weights.parquet"]
    back = HashedLogisticClassifier.load(out)
    assert back.get_params() == clf.get_params()
    assert back.spec_ == clf.spec_ and list(back.classes_) == list(clf.classes_)
    assert list(back.feature_names_in_) == list(clf.feature_names_in_)
    np.testing.assert_array_equal(back.predict_proba(X), clf.predict_proba(X))
    np.testing.assert_array_equal(back.predict(X), clf.predict(X))
    np.testing.assert_array_equal(back.coef_, clf.coef_)
    assert back.score(X, y) == clf.score(X, y)
    with pytest.raises(ValueError, match="fit it again"):
        back.partial_fit(X.iloc[:10], y.iloc[:10])


def test_partial_fit_chunks_equal_one_pass_of_train(tmp_path, capsys):
    # Reference: `hashcurve train --epochs 1` over the same chunks as the files of one folder (its
    # batches run across files, so chunks of whole batches give the same steps): bit-identical.
    table = demo_table().select([f["column"] for f in demo_spec()["features"]] + ["ordered"]).slice(0, 3 * 1536)
    chunks = [table.slice(i * 1536, 1536) for i in range(3)]
    spec = {**demo_spec(), "hashing": {"bits": 14, "seed": 0}}
    spec.pop("time")
    clf = HashedLogisticClassifier(spec=spec, batch_rows=512)
    for chunk in chunks:
        X = chunk.drop_columns(["ordered"])
        clf.partial_fit(X, chunk.column("ordered").to_numpy(), classes=[False, True])
    assert clf.n_iter_ == 3
    folder = tmp_path / "chunks"
    folder.mkdir()
    for i, chunk in enumerate(chunks):
        pq.write_table(chunk, folder / f"part-{i}.parquet")
    (tmp_path / "spec.json").write_text(json.dumps(spec))
    assert main(["train", "--spec", str(tmp_path / "spec.json"), "--data", str(folder), "--out", str(tmp_path / "m"),
                 "--epochs", "1", "--batch-rows", "512", "--full-batch-memory", "0", "--quiet"]) == 0
    one_pass = load_model(tmp_path / "m")
    np.testing.assert_array_equal(clf.coef_[0], one_pass.weights)
    assert clf.intercept_[0] == one_pass.intercept


def test_partial_fit_after_fit_continues_the_run(demo_frame):
    # Reference: `hashcurve train --resume` semantics (common practice for checkpoints): a fit of
    # two epochs followed by partial_fit on the same rows equals a fit of three epochs, bit for bit.
    X, y = demo_frame
    X, y = X.iloc[:4096], y.iloc[:4096]
    two = HashedLogisticClassifier(bits=12, epochs=2, batch_rows=1024).fit(X, y).partial_fit(X, y)
    three = HashedLogisticClassifier(bits=12, epochs=3, batch_rows=1024).fit(X, y)
    np.testing.assert_array_equal(two.coef_, three.coef_)
    assert two.intercept_[0] == three.intercept_[0] and two.n_iter_ == 3


def test_partial_fit_takes_a_chunk_of_one_class():
    # Reference: scikit-learn's partial_fit convention (common practice): `classes` on the first
    # call names both labels, so a chunk may hold only one of them; fit still refuses one class.
    rng = np.random.default_rng(0)
    X = rng.normal(size=(64, 3))
    clf = HashedLogisticClassifier(bits=8).partial_fit(X, np.zeros(64, dtype=int), classes=[0, 1])
    clf.partial_fit(X, (X[:, 0] > 0).astype(int))
    assert clf.n_iter_ == 2 and list(clf.classes_) == [0, 1]
    with pytest.raises(ValueError, match="two classes"):
        HashedLogisticClassifier(bits=8).fit(X, np.zeros(64, dtype=int))


def test_inferred_spec_follows_the_column_types():
    # Reference: schemas/feature-spec.schema.json, checked with jsonschema; the kinds are README
    # "Feature spec" (strings, booleans, dates categorical; lists multi; numbers numeric).
    table = pa.table({"shop": ["a", "b"], "member": [True, False], "day": pa.array([0, 1], pa.date32()),
                      "tags": [["x"], []], "amount": [1.5, 2.0], "visits": [3, 4],
                      "zone": pa.array(["n", "s"]).dictionary_encode()})
    spec = infer_spec(table.schema, "y", "sample_weight", bits=12)
    jsonschema.validate(spec, json.loads((ROOT / "schemas" / "feature-spec.schema.json").read_text()))
    assert {f["column"]: f["kind"] for f in spec["features"]} == {
        "shop": "categorical", "member": "categorical", "day": "categorical", "tags": "multi",
        "amount": "numeric", "visits": "numeric", "zone": "categorical"}
    with pytest.raises(ValueError, match="'stamp'.*timestamp"):
        infer_spec(pa.table({"stamp": pa.array([0], pa.timestamp("s"))}).schema, "y")


def test_columns_are_matched_by_name(demo_frame):
    # Reference: the hashing contract (README): a token is keyed by its column's name, so column
    # order and extra columns do not change a score; a missing feature column is an error naming it.
    # This is why sklearn's check_dataframe_column_names_consistency (not in check_estimator's set)
    # does not apply: it expects positional columns.
    X, y = demo_frame
    X, y = X.iloc[:2000], y.iloc[:2000]
    clf = HashedLogisticClassifier(bits=12, epochs=1).fit(X, y)
    shuffled = X[X.columns[::-1]].assign(row_id=np.arange(len(X)))
    np.testing.assert_array_equal(clf.decision_function(shuffled), clf.decision_function(X))
    with pytest.raises(UserError, match="'campaign'"):
        clf.decision_function(X.drop(columns=["campaign"]))


def test_fit_on_a_parquet_path_reads_the_spec_label(tmp_path):
    # Reference: `hashcurve train` on the same path and options: identical weights.
    assert HashedLogisticClassifier().__sklearn_tags__().classifier_tags.multi_class is False
    spec = {**demo_spec(), "hashing": {"bits": 14, "seed": 0}}
    path = DEMO / "logs" / f"event_day={DAYS[0]}"
    clf = HashedLogisticClassifier(spec=spec, epochs=1).fit(path)
    (tmp_path / "spec.json").write_text(json.dumps(spec))
    assert main(["train", "--spec", str(tmp_path / "spec.json"), "--data", str(path), "--out", str(tmp_path / "m"),
                 "--epochs", "1", "--full-batch-memory", "0", "--quiet"]) == 0
    np.testing.assert_array_equal(clf.coef_[0], load_model(tmp_path / "m").weights)
    assert list(clf.classes_) == [0, 1]
    with pytest.raises(ValueError, match="partial_fit takes rows in memory"):
        clf.partial_fit(path, None)


def test_import_trainer_and_cli_without_scikit_learn():
    # Reference: common practice for optional extras: the core imports and runs without them, and
    # the estimator's import error names the extra to install.
    code = ("import sys; sys.modules['sklearn'] = None\n"
            "import trainer, trainer.cli, trainer.api\n"
            "assert not any(m.startswith(('sklearn', 'pandas')) for m in sys.modules if sys.modules[m])\n"
            "try:\n    trainer.HashedLogisticClassifier\nexcept ImportError as e:\n    print(e)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert 'pip install "hashcurve[sklearn]"' in out
    assert trainer.HashedLogisticClassifier is HashedLogisticClassifier
