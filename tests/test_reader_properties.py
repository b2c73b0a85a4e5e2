"""Property tests of the reader on generated Arrow tables (hypothesis): random column types, nulls,
dictionary and plain encodings (in Arrow and in the Parquet file), empty strings and non-ASCII text.
The reader never raises anything but a one-line UserError naming the column, and when it reads the
table its buckets and values equal the reference computation of the hashing contract
(reference/score_reference.py, which hashes with the mmh3 library), row by row.
"""

import datetime as dt
import importlib.util
import math
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trainer.errors import UserError
from trainer.reader import Reader
from trainer.spec import parse_spec

REF_DIR = Path(__file__).parent.parent / "reference"
_loader = importlib.util.spec_from_file_location("score_reference", REF_DIR / "score_reference.py")
ref = importlib.util.module_from_spec(_loader)
_loader.loader.exec_module(ref)

TEXT = st.text(alphabet=st.sampled_from(["a", "b", "Z", "0", " ", "é", "ß", "☃", "中", "🙂", "\x1f", "\u200b"]),
               max_size=4)
CATEGORICAL_TYPES = {
    "string": (pa.string(), TEXT), "large_string": (pa.large_string(), TEXT),
    "int8": (pa.int8(), st.integers(-128, 127)), "int64": (pa.int64(), st.integers(-2**63, 2**63 - 1)),
    "uint32": (pa.uint32(), st.integers(0, 2**32 - 1)), "bool": (pa.bool_(), st.booleans()),
    "date32": (pa.date32(), st.dates(dt.date(1970, 1, 1), dt.date(2100, 1, 1))),
    # refused for categorical columns by the contract: floats, timestamps, binary
    "float64": (pa.float64(), st.floats(-1e6, 1e6)),
    "timestamp": (pa.timestamp("s"), st.datetimes(dt.datetime(2000, 1, 1), dt.datetime(2030, 1, 1))),
    "binary": (pa.binary(), st.binary(max_size=3)),
}
NUMBERS = st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=64), st.floats(-1e3, 1e3))


@st.composite
def tables(draw):
    n = draw(st.integers(0, 25))
    cat_type, cat_values = CATEGORICAL_TYPES[draw(st.sampled_from(sorted(CATEGORICAL_TYPES)))]
    maybe = lambda s: st.one_of(st.none(), s)  # noqa: E731
    cat = pa.array(draw(st.lists(maybe(cat_values), min_size=n, max_size=n)), cat_type)
    if draw(st.booleans()) and (pa.types.is_string(cat_type) or pa.types.is_integer(cat_type)):
        cat = cat.dictionary_encode()
    elem_type, elem_values = CATEGORICAL_TYPES[draw(st.sampled_from(["string", "int64", "bool"]))]
    multi = pa.array(draw(st.lists(maybe(st.lists(maybe(elem_values), max_size=3)), min_size=n, max_size=n)),
                     pa.list_(elem_type))
    int_numeric = draw(st.booleans())
    num = pa.array(draw(st.lists(maybe(st.integers(-10**6, 10**6) if int_numeric else NUMBERS),
                                 min_size=n, max_size=n)), pa.int64() if int_numeric else pa.float64())
    label = pa.array(draw(st.lists(st.integers(0, 1), min_size=n, max_size=n)), pa.int64())
    numeric = draw(st.sampled_from([{"transform": "identity"}, {"transform": "log1p"}, {"edges": [-1.5, 0, 2]}]))
    spec = parse_spec({"label": {"column": "y"}, "hashing": {"bits": draw(st.integers(1, 20)),
                                                             "seed": draw(st.integers(0, 2**32 - 1))},
                       "features": [{"column": "c", "kind": "categorical"}, {"column": "m", "kind": "multi"},
                                    {"column": "x", "kind": "numeric", **numeric}],
                       "crosses": [["c", "m"]]})
    return pa.table({"c": cat, "m": multi, "x": num, "y": label}), spec


def reference_rows(table, spec):
    """Per row, the sorted (bucket, value) entries of the contract's reference, or the exception the
    reference raises for a value the contract refuses (README "Hashing contract": floats, timestamps
    and binary columns are refused for categorical features)."""
    hashing = spec.contract()
    t = table.schema.field("c").type
    t = t.value_type if pa.types.is_dictionary(t) else t
    if pa.types.is_floating(t) or pa.types.is_timestamp(t) or pa.types.is_binary(t):
        raise TypeError(f"the contract refuses categorical columns of type {t}, even when all null")
    out = []
    for row in table.to_pylist():
        entries = ref.row_entries(hashing, row)
        out.append(sorted((ref.bucket(hashing, tok), v) for tok, v in entries))
    return out


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                 HealthCheck.too_slow])
@given(tables(), st.booleans(), st.booleans(), st.integers(1, 9))
def test_reader_matches_reference_or_refuses_in_one_line(tmp_path, generated, parquet_dictionary, read_dictionary,
                                                         batch_rows):
    table, spec = generated
    path = tmp_path / "t.parquet"
    pq.write_table(table, path, use_dictionary=parquet_dictionary)
    try:
        expected = reference_rows(table, spec)
    except (TypeError, ValueError):
        expected = None  # a value the contract refuses (float, timestamp or binary category; NaN, inf)
    try:
        batches = list(Reader(spec, path, batch_rows=batch_rows, dictionary=read_dictionary).batches())
    except UserError as exc:
        msg = str(exc)
        assert "\n" not in msg
        assert ("column 'c'" in msg or "column 'm'" in msg or "column 'x'" in msg
                or (table.num_rows == 0 and "no rows left" in msg)), msg
        assert expected is None or table.num_rows == 0, msg
        return
    assert expected is not None, "the reader accepted a value the hashing contract refuses"
    got = []
    for b in batches:
        for r in range(b.n_rows):
            lo, hi = b.indptr[r], b.indptr[r + 1]
            got.append(sorted(zip(b.indices[lo:hi].tolist(), b.data[lo:hi].tolist())))
    assert len(got) == len(expected)
    for g, e in zip(got, expected):
        assert [bk for bk, _ in g] == [bk for bk, _ in e]
        assert all(math.isclose(gv, ev, rel_tol=1e-15, abs_tol=0.0) for (_, gv), (_, ev) in zip(g, e))


def test_generated_tables_cover_every_outcome():
    # The strategy reaches both outcomes: readable tables and refused ones (a sanity check that the
    # property above is not vacuous).
    seen = set()

    @settings(max_examples=60, deadline=None, database=None)
    @given(tables())
    def probe(generated):
        table, spec = generated
        try:
            reference_rows(table, spec)
            seen.add("accepted")
        except (TypeError, ValueError):
            seen.add("refused")

    probe()
    assert seen == {"accepted", "refused"}
