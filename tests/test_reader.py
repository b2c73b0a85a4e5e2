"""The reader's batches against a row-by-row reference written from the README's hashing contract
with the mmh3 library, plus streaming, resume, shuffling and bad-input behaviour."""

import datetime as dt
import json
import math

import mmh3
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp

from trainer.errors import UserError
from trainer.reader import Reader
from trainer.reader.examples import BucketExamples, _token_texts, fingerprints
from trainer.reader.featurize import TokenTable
from trainer.spec import load_spec

from conftest import SMALL_SPEC, batch_csr, make_table


def canonical(v):
    # the contract's canonical strings (README): ints in decimal, booleans true/false, dates ISO
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, dt.date):
        return v.isoformat()
    return str(v)


def reference_row(row: dict, spec: dict) -> dict[int, float]:
    """Contract, row by row, with mmh3 (the reference implementation of MurmurHash3_x86_32)."""
    seed, mask = spec["hashing"]["seed"], (1 << spec["hashing"]["bits"]) - 1
    out: dict[int, float] = {}

    def add(token: bytes, value: float):
        b = mmh3.hash(token, seed, signed=False) & mask
        out[b] = out.get(b, 0.0) + value

    toks = {}
    for f in spec["features"]:
        c, v = f["column"], row[f["column"]]
        if f["kind"] == "categorical":
            toks[c] = [] if v is None else [c.encode() + b"\x1f" + canonical(v).encode()]
        elif f["kind"] == "multi":
            toks[c] = [] if v is None else [c.encode() + b"\x1f" + canonical(e).encode() for e in v if e is not None]
        elif "edges" in f:
            toks[c] = [] if v is None else [c.encode() + b"\x1f#" + str(sum(e <= v for e in f["edges"])).encode()]
        else:
            toks[c] = []
            if v is not None:
                x = math.copysign(math.log1p(abs(v)), v) if f.get("transform") == "log1p" else v
                add(c.encode(), x)
        for t in toks[c]:
            add(t, 1.0)
    for cross in spec["crosses"]:
        combos = [b""]
        for i, c in enumerate(cross):
            combos = [a + (b"\x1e" if i else b"") + t for a in combos for t in toks[c]]
        for t in combos:
            add(t, 1.0)
    return out


def to_dense_rows(batches, n_buckets):
    mats = [batch_csr(b, n_buckets) for b in batches]
    return sp.vstack(mats).toarray()


def all_rows(root):
    tables = [pq.read_table(p) for p in sorted(root.rglob("*.parquet"))]
    return pa.concat_tables(tables).to_pylist()


@pytest.mark.parametrize("dictionary", [True, False])
def test_batches_match_contract_reference(small_log, dictionary):
    root, spec_path = small_log
    spec = load_spec(spec_path)
    reader = Reader(spec, root, batch_rows=500, dictionary=dictionary)
    batches = list(reader.batches())
    got = to_dense_rows(batches, spec.n_buckets)
    rows = all_rows(root)
    assert got.shape[0] == len(rows) == sum(b.n_rows for b in batches)
    want = np.zeros_like(got)
    for i, r in enumerate(rows):
        for b, v in reference_row(r, SMALL_SPEC).items():
            want[i, b] = v
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12)
    labels = np.concatenate([b.labels for b in batches])
    np.testing.assert_array_equal(labels, [r["clicked"] for r in rows])
    np.testing.assert_allclose(np.concatenate([b.weights for b in batches]), [r["w"] for r in rows])
    assert all(b.n_rows == 500 for b in batches[:-1])


@pytest.mark.parametrize("dictionary", [True, False])
def test_bucket_examples_are_tokens_of_their_bucket(small_log, dictionary):
    # Reference: the README's hashing contract with mmh3 (token bytes -> bucket), and the tokens that
    # reference_row builds from the rows themselves.
    root, spec_path = small_log
    spec = load_spec(spec_path)
    examples = BucketExamples(spec.n_buckets)
    reader = Reader(spec, root, batch_rows=500, dictionary=dictionary)
    reader.watch(examples)
    list(reader.batches())
    seed, mask = SMALL_SPEC["hashing"]["seed"], (1 << SMALL_SPEC["hashing"]["bits"]) - 1
    assert examples.total == sum(len(v) for v in examples.values.values()) > 100
    for bucket, texts in examples.values.items():
        assert 1 <= len(texts) <= 2 and len(set(texts)) == len(texts)
        for text in texts:
            token = text.replace(" & ", "\x1e").replace("=", "\x1f").encode("utf-8")
            assert mmh3.hash(token, seed, signed=False) & mask == int(bucket), text
    assert "shop=é-ß-☃" in sum(examples.values.values(), [])
    np.testing.assert_array_equal(np.flatnonzero(examples.count), sorted(int(b) for b in examples.values))


def test_fingerprints_match_fnv1a_vectors():
    # Reference: FNV-1a 64-bit test vectors (IETF draft-eastlake-fnv; from memory): "" -> cbf29ce484222325,
    # "a" -> af63dc4c8601ec8c, "foobar" -> 85944171f73967e8; the prefix is hashed before each token.
    buf = np.frombuffer(b"afoobar", dtype=np.uint8)
    off = np.array([0, 0, 1, 7])
    got = fingerprints(np.zeros(0, np.uint8), buf, off, np.array([0, 1, 2]))
    assert [int(h) for h in got] == [0xcbf29ce484222325, 0xaf63dc4c8601ec8c, 0x85944171f73967e8]
    prefix, rest = np.frombuffer(b"foo", np.uint8), np.frombuffer(b"bar", np.uint8)
    prefixed = fingerprints(prefix, rest, np.array([0, 3]), np.array([0]))
    assert int(prefixed[0]) == 0x85944171f73967e8


def test_examples_seen_again_add_nothing(small_log):
    # Reference: the values of one read (a token met again adds nothing), also for values restored from a
    # checkpoint, whose tokens are only known by their text.
    root, spec_path = small_log
    spec = load_spec(spec_path)
    once = BucketExamples(spec.n_buckets)
    reader = Reader(spec, root, batch_rows=500)
    reader.watch(once)
    list(reader.batches())
    first = {k: list(v) for k, v in once.values.items()}
    list(reader.batches())
    assert once.values == first
    restored = BucketExamples(spec.n_buckets, values={k: list(v) for k, v in first.items()})
    again = Reader(spec, root, batch_rows=500)
    again.watch(restored)
    list(again.batches())
    assert restored.values == first and restored.total == once.total


def test_example_texts_replace_bytes_that_are_not_utf8():
    # Reference: Python's bytes.decode(errors="replace") (from memory: U+FFFD for each bad byte).
    buf = np.frombuffer(b"ok\xffx\x1eb\x1fz", dtype=np.uint8)
    tok = TokenTable(ptr=np.array([0, 2]), ids=np.array([0, 1]), prefix=np.frombuffer(b"c\x1f", dtype=np.uint8),
                     buf=buf, off=np.array([0, 2, 8]))
    assert _token_texts(tok, np.array([1, 0])) == ["c=\ufffdx & b=z", "c=ok"]


def test_dictionary_and_plain_paths_identical(small_log):
    # Reference: the plain path, itself checked against the mmh3 contract reference above.
    root, spec_path = small_log
    spec = load_spec(spec_path)
    a = list(Reader(spec, root, batch_rows=333, dictionary=True).batches())
    b = list(Reader(spec, root, batch_rows=333, dictionary=False).batches())
    assert len(a) == len(b)
    for x, y in zip(a, b):
        for k in ("indptr", "indices", "data", "labels", "weights"):
            np.testing.assert_array_equal(getattr(x, k), getattr(y, k))


def test_date_filter_on_partition_key(small_log):
    # Reference: the row counts the fixture wrote per day (700 + 800 on the second day).
    root, spec_path = small_log
    spec = load_spec(spec_path)
    reader = Reader(spec, root, start=dt.date(2026, 3, 2), end=dt.date(2026, 3, 2), batch_rows=10_000)
    assert len(reader.files) == 2  # only the second day's two files are opened
    assert sum(b.n_rows for b in reader.batches()) == 700 + 800


def test_date_filter_on_column(tmp_path):
    # Reference: 200 rows written per day; inclusive bounds (common practice for date ranges).
    rng = np.random.default_rng(1)
    parts = [make_table(rng, 200, dt.date(2026, 3, d)) for d in (1, 2, 3)]
    pq.write_table(pa.concat_tables(parts), tmp_path / "one.parquet", row_group_size=200)
    spec_path = tmp_path / "spec.json"
    spec_path.write_text(json.dumps(SMALL_SPEC))
    spec = load_spec(spec_path)
    r = Reader(spec, tmp_path / "one.parquet", start=dt.date(2026, 3, 2), batch_rows=1000)
    assert sum(b.n_rows for b in r.batches()) == 400
    with pytest.raises(UserError, match="no rows left"):
        list(Reader(spec, tmp_path / "one.parquet", start=dt.date(2027, 1, 1), batch_rows=100).batches())


@pytest.mark.parametrize("shuffle", [0, 450])
def test_resume_from_any_batch_gives_same_stream(small_log, shuffle):
    # Reference: the uninterrupted stream of the same reader.
    root, spec_path = small_log
    spec = load_spec(spec_path)
    reader = Reader(spec, root, batch_rows=128, shuffle_rows=shuffle, seed=3, negative_keep_rate=0.5)
    full = list(reader.batches(pass_index=1))
    for k in (0, 3, 7, len(full) - 2):
        resumed = list(reader.batches(pass_index=1, start=full[k].position))
        assert len(resumed) == len(full) - k - 1
        for x, y in zip(full[k + 1:], resumed):
            np.testing.assert_array_equal(x.indices, y.indices)
            np.testing.assert_array_equal(x.labels, y.labels)


def test_shuffle_is_a_seeded_permutation(small_log):
    # Reference: the unshuffled rows (same multiset of row weights, numpy.sort).
    root, spec_path = small_log
    spec = load_spec(spec_path)
    plain = list(Reader(spec, root, batch_rows=10_000).batches())
    mixed = list(Reader(spec, root, batch_rows=10_000, shuffle_rows=1000, seed=9).batches())
    again = list(Reader(spec, root, batch_rows=10_000, shuffle_rows=1000, seed=9).batches())
    w0, w1 = np.concatenate([b.weights for b in plain]), np.concatenate([b.weights for b in mixed])
    assert not np.array_equal(w0, w1)
    np.testing.assert_array_equal(np.sort(w0), np.sort(w1))
    np.testing.assert_array_equal(w1, np.concatenate([b.weights for b in again]))


def test_negative_sampling_keeps_positives(small_log):
    root, spec_path = small_log
    spec = load_spec(spec_path)
    full = np.concatenate([b.labels for b in Reader(spec, root, batch_rows=5000).batches()])
    r = Reader(spec, root, batch_rows=5000, negative_keep_rate=0.25, seed=1)
    kept = np.concatenate([b.labels for b in r.batches()])
    assert kept.sum() == full.sum()
    n_neg = (full == 0).sum()
    # binomial(n_neg, 0.25): within 5 standard deviations (common practice)
    assert abs((kept == 0).sum() - 0.25 * n_neg) < 5 * math.sqrt(n_neg * 0.25 * 0.75)
    assert r.counts.sampled_out == n_neg - (kept == 0).sum()


def test_keep_columns_follow_rows(small_log):
    # Reference: the batch's own weights, which travel with each row.
    root, spec_path = small_log
    spec = load_spec(spec_path)
    r = Reader(spec, root, batch_rows=256, shuffle_rows=600, seed=2, keep=("w",))
    for b in r.batches():
        np.testing.assert_array_equal(b.columns.column("w").to_numpy(), b.weights)


def test_readme_worked_example(tmp_path):
    # The README's worked example, by hand: hash values computed with mmh3 when the README was written.
    table = pa.table({"campaign": ["spring-sale"], "hour": pa.array([9], pa.int32()), "y": [1]})
    pq.write_table(table, tmp_path / "one.parquet")
    (tmp_path / "spec.json").write_text(json.dumps({
        "label": {"column": "y"}, "hashing": {"bits": 18, "seed": 0},
        "features": [{"column": "campaign", "kind": "categorical"}, {"column": "hour", "kind": "categorical"}],
        "crosses": [["campaign", "hour"]]}))
    spec = load_spec(tmp_path / "spec.json")
    (batch,) = Reader(spec, tmp_path / "one.parquet").batches()
    assert mmh3.hash(b"campaign\x1fspring-sale", 0, signed=False) == 0xF121FF00
    assert batch.indices[0] == 0xF121FF00 & 0x3FFFF == 130816
    assert batch.indices[2] == 0xA8078C35 & 0x3FFFF == 232501
