"""Model object, saving, export/import, tamper checks, schema validation and inspect."""

import hashlib
import json
import math
from pathlib import Path

import jsonschema
import numpy as np
import pyarrow.parquet as pq
import pytest

from trainer.errors import UserError
from trainer.api import export
from trainer.cli import format_inspect
from trainer.model import ExampleTexts, Model, inspect_model, load_model, shared_bucket_share
from trainer.reader import Reader
from trainer.spec import load_spec, parse_spec

from conftest import SMALL_SPEC, batch_csr, make_model

SCHEMA = json.loads((Path(__file__).parent.parent / "schemas" / "model.schema.json").read_text())
SPEC = parse_spec(SMALL_SPEC)
CAL = {"method": "platt", "a": 1.7, "b": -0.4}


def snapshot(folder: Path) -> dict:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def first_batch(small_log):
    root, spec_path = small_log
    return next(Reader(load_spec(spec_path), root, with_labels=False, batch_rows=500).batches())


def test_save_load_round_trip_is_exact(tmp_path):
    # reference: identity of float64 through .npz and of JSON through Python's json (common practice)
    info = {"options": {"l2_strength": 1e-4, "epochs": 3}, "summary": {"rows": 12, "distinct_tokens": 500},
            "holdout": {"log_loss": 0.31, "auc": math.nan}, "examples": {"7": ["shop\x1fshop-1"]},
            "negative_keep_rate": 0.25}
    m = make_model(SPEC, info=info)
    m.save(tmp_path / "m")
    back = load_model(tmp_path / "m")
    assert np.array_equal(back.weights, m.weights) and back.weights.dtype == np.float64
    assert back.intercept == m.intercept and back.loss == "logistic"
    assert back.spec == m.spec
    assert back.info["examples"] == {"7": ["shop\x1fshop-1"]} and back.info["negative_keep_rate"] == 0.25
    assert back.info["holdout"] == {"log_loss": 0.31, "auc": None}  # NaN is stored as null (strict JSON)
    assert not list(tmp_path.glob("m/.*"))  # no temporary files left behind


def test_model_json_holds_the_examples_as_the_json_module_encodes_them(tmp_path):
    # reference: Python's json module encoding the whole document with the examples in place, which
    # Model.save splices in from ExampleTexts' cached text; a spec text holding the slot's own string
    # must stay as it is
    examples = {"7": ["shop=caf\u00e9 & \"x\"", "tags=\x00examples\x00"], "12": []}
    spec = {**SPEC.raw, "label": {"column": "\x00examples\x00"}}
    m = make_model(parse_spec(spec), info={"examples": examples})
    assert isinstance(m.info["examples"], ExampleTexts)
    m.save(tmp_path / "m")
    meta = json.loads((tmp_path / "m" / "model.json").read_text())
    assert meta["info"]["examples"] == examples and meta["spec"] == spec
    assert load_model(tmp_path / "m").info["examples"] == examples
    shared = ExampleTexts(examples)
    assert make_model(SPEC, info={"examples": shared}).info["examples"] is shared


def test_export_round_trip_and_weights_layout(tmp_path):
    cal = {**CAL, "fitted_on": "holdout/"}
    m = make_model(SPEC, loss="squared-hinge", calibration=cal, seed=3, info={"summary": {"data": tmp_path / "logs"}})
    m.save(tmp_path / "m")
    out = export(tmp_path / "m", tmp_path / "export")
    table = pq.read_table(out / "weights.parquet")
    # reference: numpy's flatnonzero of the weights, read back with pyarrow
    assert table.schema.names == ["bucket", "weight"]
    assert str(table.schema.field("bucket").type) == "int64" and str(table.schema.field("weight").type) == "double"
    assert table.column("bucket").to_numpy().tolist() == np.flatnonzero(m.weights).tolist()
    assert np.array_equal(table.column("weight").to_numpy(), m.weights[np.flatnonzero(m.weights)])
    back = load_model(out)
    assert np.array_equal(back.weights, m.weights) and back.intercept == m.intercept
    assert back.loss == "squared-hinge" and back.calibration == cal and back.spec == m.spec
    assert back.info["summary"]["data"] == str(tmp_path / "logs")  # paths are stored as text
    again = export(out, tmp_path / "export2")  # an export re-exports to the same weights
    assert (again / "weights.parquet").read_bytes() == (out / "weights.parquet").read_bytes()


@pytest.mark.parametrize("loss,cal", [("logistic", None), ("squared-hinge", None), ("squared-hinge", CAL)])
def test_model_json_validates_against_schema(tmp_path, loss, cal):
    # reference: the jsonschema library (Draft 2020-12 validator)
    jsonschema.Draft202012Validator.check_schema(SCHEMA)
    m = make_model(SPEC, loss=loss, calibration=cal, info={"holdout": {"auc": math.nan, "rows": 3}})
    m.save(tmp_path / "m")
    doc = json.loads((export(tmp_path / "m", tmp_path / "e") / "model.json").read_text())
    validator = jsonschema.Draft202012Validator(SCHEMA)
    validator.validate(doc)
    assert doc["nonzero"] == int(np.count_nonzero(m.weights)) and doc["n_buckets"] == 4096
    assert doc["hashing"] == SPEC.contract()
    bad = dict(doc, link="logistic" if loss == "squared-hinge" else "identity-margin")
    assert not validator.is_valid(bad)  # link must follow the loss


def test_tampered_export_refused(tmp_path):
    make_model(SPEC).save(tmp_path / "m")
    out = export(tmp_path / "m", tmp_path / "e")
    # reference: SHA-256 from hashlib over the file bytes (model.json's weights_sha256)
    t = pq.read_table(out / "weights.parquet")
    w = t.column("weight").to_numpy().copy()
    w[0] += 1e-9
    pq.write_table(t.set_column(1, "weight", [w]), out / "weights.parquet")
    recorded = json.loads((out / "model.json").read_text())["weights_sha256"]
    assert hashlib.sha256((out / "weights.parquet").read_bytes()).hexdigest() != recorded
    with pytest.raises(UserError, match="weights.parquet: checksum does not match"):
        load_model(out)


def test_tampered_or_broken_training_folder_refused(tmp_path):
    make_model(SPEC).save(tmp_path / "m")
    raw = bytearray((tmp_path / "m" / "model.npz").read_bytes())
    raw[-40] ^= 0xFF
    (tmp_path / "m" / "model.npz").write_bytes(bytes(raw))
    with pytest.raises(UserError, match="model.npz: checksum does not match"):
        load_model(tmp_path / "m")
    with pytest.raises(UserError, match="no such model folder"):
        load_model(tmp_path / "absent")
    (tmp_path / "m" / "model.json").write_text("{not json")
    with pytest.raises(UserError, match="model.json: unreadable or corrupt"):
        load_model(tmp_path / "m")


def test_non_empty_out_dir_needs_force_and_nothing_is_written(tmp_path):
    make_model(SPEC, seed=1).save(tmp_path / "m1")
    make_model(SPEC, seed=2).save(tmp_path / "m2")
    out = export(tmp_path / "m1", tmp_path / "e")
    before = snapshot(out)
    with pytest.raises(UserError, match="--force"):
        export(tmp_path / "m2", out)
    assert snapshot(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["e", "m1", "m2"]  # no temporary sibling left
    export(tmp_path / "m2", out, force=True)
    assert np.array_equal(load_model(out).weights, load_model(tmp_path / "m2").weights)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["e", "m1", "m2"]
    other = tmp_path / "notes"
    other.mkdir()
    (other / "keep.txt").write_text("mine")
    with pytest.raises(UserError, match="other than an export"):
        export(tmp_path / "m1", other, force=True)
    assert (other / "keep.txt").read_text() == "mine"
    with pytest.raises(UserError, match="model folder itself"):
        export(tmp_path / "m1", tmp_path / "m1", force=True)


def test_margin_and_probability_against_scipy(small_log):
    batch = first_batch(small_log)
    m = make_model(SPEC)
    z = batch_csr(batch, SPEC.n_buckets) @ m.weights + m.intercept  # reference: scipy.sparse CSR product
    assert np.allclose(m.margin(batch), z, rtol=0, atol=1e-12)
    assert np.allclose(m.predict(batch), 1.0 / (1.0 + np.exp(-z)), rtol=1e-13, atol=0)  # logistic function


def test_negative_downsampling_correction_matches_published_formula(small_log):
    # reference: p = p' / (p' + (1 - p') / Q), "Practical Lessons from Predicting Clicks on Ads at
    # Facebook" (ADKDD 2014), for a model trained on negatives kept at rate Q
    batch = first_batch(small_log)
    q = 0.1
    m = make_model(SPEC)
    corrected = Model(SPEC, m.weights, m.intercept + math.log(q), "logistic", {"negative_keep_rate": q})
    p_sampled = m.predict(batch)
    assert np.allclose(corrected.predict(batch), p_sampled / (p_sampled + (1 - p_sampled) / q), rtol=1e-12)


def test_squared_hinge_probability_needs_calibration(small_log):
    batch = first_batch(small_log)
    plain = make_model(SPEC, loss="squared-hinge")
    assert not plain.has_probability
    with pytest.raises(UserError, match="no probability calibration"):
        plain.predict(batch)
    cal = make_model(SPEC, loss="squared-hinge", calibration=CAL)
    z = cal.margin(batch)
    # reference: Platt's sigmoid 1/(1+exp(-(a z + b))), "Probabilistic Outputs for Support Vector
    # Machines ...", Advances in Large Margin Classifiers, 1999, written out with numpy
    assert np.allclose(cal.predict(batch), 1.0 / (1.0 + np.exp(-(CAL["a"] * z + CAL["b"]))), rtol=1e-13)
    with pytest.raises(ValueError, match="squared-hinge models only"):
        make_model(SPEC, loss="logistic", calibration=CAL)


@pytest.mark.parametrize("d,m", [(300, 1024), (2000, 4096), (5000, 4096)])
def test_shared_bucket_estimate_against_simulation(d, m):
    # reference: direct simulation with numpy, D tokens thrown uniformly into m buckets
    # (balls in bins, common practice); 4 standard errors of the mean
    rng = np.random.default_rng(11)
    trials = 400
    shares = np.empty(trials)
    for t in range(trials):
        counts = np.bincount(rng.integers(0, m, d), minlength=m)
        shares[t] = np.count_nonzero(counts > 1) / np.count_nonzero(counts)
    se = shares.std(ddof=1) / math.sqrt(trials)
    assert abs(shared_bucket_share(d, m) - shares.mean()) < 4 * se
    assert shared_bucket_share(1, m) == 0.0 and shared_bucket_share(0, m) == 0.0


def test_inspect_reports_size_weights_and_examples(tmp_path):
    w = make_model(SPEC).weights
    top, bottom = int(np.argmax(w)), int(np.argmin(w))
    m = Model(SPEC, w, -0.5, "logistic", {"summary": {"rows": 100, "distinct_tokens": 900}, "options": {"l2_strength": 0.001},
                                          "examples": {top: ["shop=shop-3 & hour=7"], bottom: ["tags=t2"]}})
    m.save(tmp_path / "m")
    export(tmp_path / "m", tmp_path / "e")
    for folder, files in ((tmp_path / "m", ["model.json", "model.npz"]), (tmp_path / "e", ["model.json", "weights.parquet"])):
        d = inspect_model(folder, top=3)
        assert d["bytes"] == sum((folder / f).stat().st_size for f in files)  # reference: os.stat
        assert d["buckets"] == 4096 and d["nonzero"] == int(np.count_nonzero(m.weights))
        assert d["top_positive"][0] == {"bucket": top, "weight": float(m.weights[top]),
                                        "examples": ["shop=shop-3 & hour=7"]}
        assert [r["bucket"] for r in d["top_negative"]] == np.argsort(m.weights)[:3].tolist()  # numpy argsort
        # reference: 1 - D (1-1/m)^(D-1) / (m (1 - (1-1/m)^D)) evaluated directly in float64 (balls in
        # bins, common practice)
        assert d["collision"]["shared_bucket_share"] == pytest.approx(
            1 - 900 * (4095 / 4096) ** 899 / (4096 * (1 - (4095 / 4096) ** 900)), rel=1e-12)
        text = format_inspect(d)
        assert "shop=shop-3 & hour=7" in text and "tags=t2" in text and "l2_strength=0.001" in text
    plain = make_model(SPEC, seed=4)
    plain.save(tmp_path / "p")
    d = inspect_model(tmp_path / "p")
    assert d["distinct_tokens"] is None and d["collision"] is None
    assert "collision rate unknown" in format_inspect(d)
