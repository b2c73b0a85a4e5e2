"""The reference scorer (reference/score_reference.py: pyarrow, numpy and mmh3 only) against the
package's scoring, and the hashing contract's token bytes derived by hand against the reader."""

import ast
import datetime as dt
import importlib.util
import math
import re
from pathlib import Path

import mmh3
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from trainer.hashing import hash_bytes
from trainer.api import export
from trainer.reader.featurize import Featurizer
from trainer.scoring import score_to_parquet
from trainer.spec import parse_spec

from conftest import SMALL_SPEC, make_model

REF_DIR = Path(__file__).parent.parent / "reference"
_loader = importlib.util.spec_from_file_location("score_reference", REF_DIR / "score_reference.py")
ref = importlib.util.module_from_spec(_loader)
_loader.loader.exec_module(ref)

SPEC = parse_spec(SMALL_SPEC)


def exported(tmp_path, **kw):
    make_model(SPEC, **kw).save(tmp_path / "m")
    return export(tmp_path / "m", tmp_path / "e")


def test_reference_imports_only_the_allowed_libraries():
    # reference: the brief of the reference scorer (standard library, pyarrow, numpy, mmh3 only)
    tree = ast.parse((REF_DIR / "score_reference.py").read_text())
    names = {a.name.split(".")[0] for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
    names |= {n.module.split(".")[0] for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)}
    assert names <= {"argparse", "datetime", "decimal", "hashlib", "json", "math", "pathlib", "__future__",
                     "mmh3", "numpy", "pyarrow"}


def test_reference_matches_package_scoring(small_log, tmp_path):
    root, _ = small_log
    export = exported(tmp_path, seed=9)
    score_to_parquet(export, root, tmp_path / "s.parquet", batch_rows=333)
    got = pq.read_table(tmp_path / "s.parquet").column("score").to_numpy()
    files = sorted(p for p in root.rglob("*.parquet"))  # the reader's file order: sorted paths
    # reference: reference/score_reference.py, the standalone scorer written from the contract text
    want = np.concatenate([ref.score(export, f) for f in files])
    assert got.size == want.size == 2900  # conftest: 700 + 700 + 800 + 700 rows
    assert np.max(np.abs(got - want)) <= 1e-9
    assert 0.05 < want.std()  # the weights make the scores vary (not a constant comparison)


def test_reference_matches_squared_hinge_with_calibration(small_log, tmp_path):
    root, _ = small_log
    export = exported(tmp_path, loss="squared-hinge", calibration={"method": "platt", "a": 0.6, "b": -2.0}, seed=4)
    files = sorted(root.rglob("*.parquet"))[:2]
    score_to_parquet(export, files[0], tmp_path / "s.parquet")
    out = pq.read_table(tmp_path / "s.parquet")
    # reference: reference/score_reference.py (margins, then Platt's sigmoid)
    assert np.max(np.abs(out.column("score").to_numpy() - ref.score(export, files[0]))) <= 1e-9
    assert np.max(np.abs(out.column("probability").to_numpy() - ref.probability(export, files[0]))) <= 1e-9


def test_hand_derived_buckets_equal_the_readers():
    # reference: tokens written byte by byte from the contract text (reference/README.md steps 3-7),
    # hashed with the mmh3 library; seed 42, bits 12 as in SMALL_SPEC
    table = pa.table({
        "shop": pa.array(["shop-3"]),
        "hour": pa.array([7], pa.int64()),
        "tags": pa.array([["t1", None, "t1"]], pa.list_(pa.string())),
        "amount": pa.array([3.0]),
        "age_days": pa.array([7.0]),  # equal to an edge: bin 2 of edges [1, 7, 30]
    })
    indptr, indices, data = Featurizer(SPEC).transform(table, "hand")
    tokens = [(b"shop\x1fshop-3", 1.0), (b"hour\x1f7", 1.0), (b"tags\x1ft1", 1.0), (b"tags\x1ft1", 1.0),
              (b"amount", math.log1p(3.0)), (b"age_days\x1f#2", 1.0),
              (b"shop\x1fshop-3\x1ehour\x1f7", 1.0),
              (b"tags\x1ft1\x1eage_days\x1f#2", 1.0), (b"tags\x1ft1\x1eage_days\x1f#2", 1.0)]
    want = sorted((mmh3.hash(t, 42, signed=False) % 4096, v) for t, v in tokens)
    assert indptr.tolist() == [0, 9]
    got = sorted(zip(indices.tolist(), data.tolist()))
    assert [b for b, _ in got] == [b for b, _ in want]
    assert np.allclose([v for _, v in got], [v for _, v in want], rtol=1e-15)


def test_canonical_boolean_and_date_tokens_match_readme_table():
    # reference: the table of reference/README.md (hashes computed with mmh3), for the reader's
    # boolean and date canonical forms
    spec = parse_spec({"label": {"column": "y"}, "hashing": {"bits": 20, "seed": 0},
                       "features": [{"column": "active", "kind": "categorical"},
                                    {"column": "day", "kind": "categorical"}]})
    table = pa.table({"active": pa.array([True]), "day": pa.array([dt.date(2026, 3, 1)], pa.date32())})
    _, indices, _ = Featurizer(spec).transform(table, "hand")
    assert indices.tolist() == [330645, 583946]


def test_readme_table_matches_mmh3_and_the_package_hash():
    # reference: the mmh3 library; the package's numba MurmurHash3 must agree with the same rows
    rows = re.findall(r"^\| `(.+?)` \| (\d+) \| (\d+) \| (\d+) \| (\d+) \|$",
                      (REF_DIR / "README.md").read_text(encoding="utf-8"), flags=re.M)
    assert len(rows) == 9
    for expr, seed, bits, h, bucket in rows:
        m = re.fullmatch(r'"(.*)"\.encode\("utf-8"\)', expr)
        token = ast.literal_eval(f'"{m.group(1)}"').encode("utf-8") if m else ast.literal_eval(expr)
        assert mmh3.hash(token, int(seed), signed=False) == int(h) == hash_bytes(token, int(seed))
        assert int(h) % (1 << int(bits)) == int(bucket)


def test_reference_refuses_tampered_export_and_cli_prints_scores(tmp_path, capsys):
    export = exported(tmp_path)
    data = tmp_path / "d.parquet"
    pq.write_table(pa.table({"shop": ["shop-1", None], "hour": pa.array([3, None], pa.int64()),
                             "tags": pa.array([["t0"], None], pa.list_(pa.string())),
                             "amount": [1.5, None], "age_days": [None, 40.0]}), data)
    assert ref.main([str(export), str(data), "--limit", "1"]) == 0
    printed = capsys.readouterr().out.split()
    # reference: the same scorer's Python function on the same file
    assert len(printed) == 1 and float(printed[0]) == ref.score(export, data)[0]
    raw = bytearray((export / "weights.parquet").read_bytes())
    raw[len(raw) // 2] ^= 0x01
    (export / "weights.parquet").write_bytes(bytes(raw))
    with pytest.raises(ValueError, match="checksum"):
        ref.score(export, data)
