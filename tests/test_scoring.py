"""Streaming Parquet -> Parquet scoring: order, kept columns, score columns, atomic output."""

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from trainer.errors import UserError
from trainer.reader import Reader
from trainer.scoring import score_to_parquet
from trainer.spec import parse_spec

from conftest import SMALL_SPEC, batch_csr, make_model, make_table

SPEC = parse_spec(SMALL_SPEC)
CAL = {"method": "platt", "a": 0.8, "b": -1.1}


def write_log(folder, sizes=(500, 350), seed=2):
    """Files with an ``id`` column numbering the rows in file order."""
    rng = np.random.default_rng(seed)
    folder.mkdir()
    start = 0
    for i, n in enumerate(sizes):
        t = make_table(rng, n).append_column("id", pa.array(np.arange(start, start + n)))
        pq.write_table(t, folder / f"part-{i}.parquet", row_group_size=200)
        start += n
    return folder


def reference_margins(model, data):
    """Margins by a scipy.sparse CSR product over the reader's hashed rows (the hashing itself is
    checked against mmh3 in test_reader.py and test_reference_scorer.py)."""
    out = []
    for b in Reader(model.spec, data, with_labels=False, batch_rows=4096).batches():
        out.append(batch_csr(b, model.spec.n_buckets) @ model.weights + model.intercept)
    return np.concatenate(out)


def test_keeps_order_and_kept_columns(tmp_path):
    data = write_log(tmp_path / "logs")
    model = make_model(SPEC)
    res = score_to_parquet(model, data, tmp_path / "scores.parquet", keep=("id", "shop"), batch_rows=128)
    out = pq.read_table(tmp_path / "scores.parquet")
    # reference: the input files read directly with pyarrow, in sorted file order
    src = pa.concat_tables([pq.read_table(p, columns=["id", "shop"]) for p in sorted(data.iterdir())])
    assert res["rows"] == 850 and out.num_rows == 850
    assert out.column_names == ["id", "shop", "score"]
    assert out.column("id").to_pylist() == list(range(850))
    assert out.column("shop").to_pylist() == src.column("shop").to_pylist()
    z = reference_margins(model, data)
    assert np.allclose(out.column("score").to_numpy(), 1.0 / (1.0 + np.exp(-z)), rtol=1e-13)  # logistic function


def test_squared_hinge_margin_and_probability_columns(tmp_path):
    data = write_log(tmp_path / "logs")
    plain = make_model(SPEC, loss="squared-hinge", seed=1)
    score_to_parquet(plain, data, tmp_path / "m.parquet")
    out = pq.read_table(tmp_path / "m.parquet")
    assert out.column_names == ["score"]
    z = reference_margins(plain, data)  # reference: scipy.sparse CSR product of the hashed rows
    assert np.allclose(out.column("score").to_numpy(), z, rtol=0, atol=1e-12)
    cal = make_model(SPEC, loss="squared-hinge", calibration=CAL, seed=1)
    score_to_parquet(cal, data, tmp_path / "c.parquet", keep=("id",))
    out = pq.read_table(tmp_path / "c.parquet")
    assert out.column_names == ["id", "score", "probability"]
    assert np.allclose(out.column("score").to_numpy(), z, rtol=0, atol=1e-12)
    # reference: Platt's sigmoid 1/(1+exp(-(a z + b))) written out with numpy
    assert np.allclose(out.column("probability").to_numpy(), 1 / (1 + np.exp(-(CAL["a"] * z + CAL["b"]))), rtol=1e-13)


def test_output_absent_after_failure_and_missing_as_null(tmp_path):
    data = write_log(tmp_path / "logs")
    t = pq.read_table(data / "part-1.parquet")
    pq.write_table(t.drop_columns(["tags"]), data / "part-1.parquet")
    model = make_model(SPEC)
    dest = tmp_path / "out"
    dest.mkdir()
    with pytest.raises(UserError, match="column 'tags'"):
        score_to_parquet(model, data, dest / "s.parquet")
    assert list(dest.iterdir()) == []  # neither the output nor a temporary file
    (dest / "s.parquet").write_bytes(b"previous")
    with pytest.raises(UserError, match="column 'tags'"):
        score_to_parquet(model, data, dest / "s.parquet")
    assert (dest / "s.parquet").read_bytes() == b"previous" and len(list(dest.iterdir())) == 1
    score_to_parquet(model, data, dest / "s.parquet", keep=("id",), missing_as_null=True)
    got = pq.read_table(dest / "s.parquet")
    # reference: the same rows with the column present and all null
    nulled = tmp_path / "nulled"
    nulled.mkdir()
    pq.write_table(t.set_column(t.schema.get_field_index("tags"), "tags",
                                pa.nulls(t.num_rows, t.schema.field("tags").type)), nulled / "x.parquet")
    want = reference_margins(model, nulled)
    assert np.allclose(got.column("score").to_numpy()[500:], 1 / (1 + np.exp(-want)), rtol=1e-13)


def test_partition_key_kept_and_date_filter(small_log, tmp_path):
    root, _ = small_log
    model = make_model(SPEC)
    res = score_to_parquet(model, root, tmp_path / "s.parquet", keep=("day",), start="2026-03-02", end="2026-03-02")
    out = pq.read_table(tmp_path / "s.parquet")
    # reference: conftest writes 700 + 800 rows on 2026-03-02
    assert res["rows"] == 1500 and set(out.column("day").to_pylist()) == {"2026-03-02"}


def test_refuses_bad_paths_and_options(tmp_path):
    data = write_log(tmp_path / "logs")
    model = make_model(SPEC)
    first = data / "part-0.parquet"
    before = first.read_bytes()
    with pytest.raises(UserError, match="never overwrites its input"):
        score_to_parquet(model, first, first)
    with pytest.raises(UserError, match="inside the input folder"):
        score_to_parquet(model, data, data / "scores.parquet")
    with pytest.raises(UserError, match="--batch-rows"):
        score_to_parquet(model, data, tmp_path / "s.parquet", batch_rows=0)
    with pytest.raises(UserError, match="--keep"):
        score_to_parquet(model, data, tmp_path / "s.parquet", keep=("score",))
    with pytest.raises(UserError, match="--start"):
        score_to_parquet(model, data, tmp_path / "s.parquet", start="March")
    assert first.read_bytes() == before and not (tmp_path / "s.parquet").exists()
