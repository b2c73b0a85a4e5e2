"""Bad input at the reader: each gives a UserError naming the file, column or count (common practice
for data tools: say what is wrong and where)."""

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from trainer.errors import UserError
from trainer.reader import Reader
from trainer.spec import load_spec

from conftest import make_table


def read_all(spec, path, **kw):
    return list(Reader(spec, path, batch_rows=256, **kw).batches())


def one_file(tmp_path, table, name="x.parquet"):
    path = tmp_path / name
    pq.write_table(table, path)
    return path


def test_missing_path(small_log, tmp_path):
    spec = load_spec(small_log[1])
    with pytest.raises(UserError, match="no such file or folder"):
        read_all(spec, tmp_path / "nowhere")


def test_not_parquet_and_truncated(small_log, tmp_path):
    spec = load_spec(small_log[1])
    junk = tmp_path / "junk.parquet"
    junk.write_text("hello")
    with pytest.raises(UserError, match="junk.parquet: not a readable Parquet file"):
        read_all(spec, junk)
    good = one_file(tmp_path, make_table(np.random.default_rng(0), 100))
    cut = tmp_path / "cut.parquet"
    cut.write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    with pytest.raises(UserError, match="cut.parquet: not a readable Parquet file"):
        read_all(spec, cut)


def test_missing_column_named_with_file(small_log, tmp_path):
    spec = load_spec(small_log[1])
    path = one_file(tmp_path, make_table(np.random.default_rng(0), 50).drop_columns(["tags"]))
    with pytest.raises(UserError, match=r"x.parquet: column 'tags'"):
        read_all(spec, path)
    assert sum(b.n_rows for b in read_all(spec, path, missing_as_null=True)) == 50


def test_label_nulls_and_unaccepted_values(small_log, tmp_path):
    spec = load_spec(small_log[1])
    t = make_table(np.random.default_rng(0), 60)
    labels = [None, 2] + [0, 1] * 29
    t = t.set_column(t.schema.get_field_index("clicked"), "clicked", pa.array(labels, pa.int64()))
    path = one_file(tmp_path, t)
    with pytest.raises(UserError, match=r"'clicked' has 2 null or unaccepted label values"):
        read_all(spec, path)
    r = Reader(spec, path, batch_rows=256, skip_bad_labels=True)
    assert sum(b.n_rows for b in r.batches()) == 58
    assert r.counts.bad_labels == 2


def test_nan_numeric(small_log, tmp_path):
    spec = load_spec(small_log[1])
    t = make_table(np.random.default_rng(0), 30)
    amount = np.ones(30)
    amount[4] = np.nan
    t = t.set_column(t.schema.get_field_index("amount"), "amount", pa.array(amount))
    with pytest.raises(UserError, match=r"'amount' has 1 NaN or infinite"):
        read_all(spec, one_file(tmp_path, t))


def test_conflicting_schemas_in_one_folder(small_log, tmp_path):
    spec = load_spec(small_log[1])
    folder = tmp_path / "mixed"
    folder.mkdir()
    t = make_table(np.random.default_rng(0), 30)
    one_file(folder, t, "a.parquet")
    hour_as_text = pa.array([str(h) for h in t.column("hour").to_pylist()])
    one_file(folder, t.set_column(t.schema.get_field_index("hour"), "hour", hour_as_text), "b.parquet")
    with pytest.raises(UserError, match=r"b.parquet: column 'hour' is string but .*a.parquet has it as int64"):
        read_all(spec, folder)


def test_unsupported_categorical_type(small_log, tmp_path):
    spec = load_spec(small_log[1])
    t = make_table(np.random.default_rng(0), 30)
    t = t.set_column(t.schema.get_field_index("shop"), "shop", pa.array(np.arange(30) * 0.5))
    with pytest.raises(UserError, match=r"column 'shop' is double"):
        read_all(spec, one_file(tmp_path, t))


@pytest.mark.parametrize("column,values,needle", [
    ("shop", pa.array(np.arange(30) * 0.5), "column 'shop' is double"),
    ("tags", pa.array([f"t{i}" for i in range(30)]), "column 'tags' is string; multi features take list"),
    ("amount", pa.array([str(i) for i in range(30)]), "column 'amount' is string; numeric features take"),
])
def test_feature_types_refused_before_any_row_is_read(small_log, tmp_path, column, values, needle):
    # The kind/type rules of the hashing contract (README) are checked on the files' schema when the
    # reader is made, so a training run is refused before it creates its model folder.
    spec = load_spec(small_log[1])
    t = make_table(np.random.default_rng(0), 30)
    path = one_file(tmp_path, t.set_column(t.schema.get_field_index(column), column, values))
    with pytest.raises(UserError, match=needle):
        Reader(spec, path)
