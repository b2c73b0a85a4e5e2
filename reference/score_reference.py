"""Reference scorer for a hashcurve export: the hashing contract as plain, executable Python.

It reads only the two files of an export folder (``model.json`` and ``weights.parquet``) and a
Parquet file of events, and uses nothing but the Python standard library, pyarrow (to read Parquet),
numpy (for the result array) and mmh3 (MurmurHash3_x86_32). It verifies both checksums of
``model.json`` first: ``weights_sha256`` over the weights file and ``scoring_sha256`` over the
fields that decide a score, in the canonical JSON form of RFC 8785 (a JCS library does that step in
other languages). Every rule below is taken from the
``hashing`` section of ``model.json``; nothing comes from the hashcurve package. It is written for
reading, one row at a time, not for speed: see README.md beside it for how to port it.

Usage:
    python score_reference.py EXPORT_DIR EVENTS.parquet [--limit N]
prints one score per row (and the calibrated probability for a calibrated squared-hinge model).
"""

from __future__ import annotations

import argparse
import datetime
import hashlib
import json
import math
from decimal import Decimal
from pathlib import Path

import mmh3
import numpy as np
import pyarrow.parquet as pq

FIELD_SEP = b"\x1f"  # between a column name and a value (hashing.field_separator)
CROSS_SEP = b"\x1e"  # between the parts of a cross (hashing.cross_separator)
SCORING_KEYS = ("format", "version", "loss", "link", "score", "calibration", "intercept", "hashing", "spec",
                "n_buckets", "weights_file", "weights_columns", "absent_bucket_weight", "weights_sha256")


# ----------------------------------------------------------------------------------------------
# 1. Load the export


def jcs_number(x):
    """A number as RFC 8785 writes it (ECMAScript Number-to-String of the double)."""
    x = float(x)
    if x == 0.0:
        return "0"
    _, digits, exp = Decimal(repr(abs(x))).normalize().as_tuple()
    s = "".join(map(str, digits))
    k, n = len(s), exp + len(s)  # |x| = 0.s * 10^n
    if k <= n <= 21:
        body = s + "0" * (n - k)
    elif 0 < n <= 21:
        body = s[:n] + "." + s[n:]
    elif -6 < n <= 0:
        body = "0." + "0" * -n + s
    else:
        body = s[0] + ("." + s[1:] if k > 1 else "") + ("e+" if n > 0 else "e-") + str(abs(n - 1))
    return ("-" if x < 0 else "") + body


def jcs(value):
    """RFC 8785 canonical JSON text: no whitespace, keys sorted by UTF-16 code units, strings escaped
    like JSON.stringify, numbers by jcs_number."""
    if value is None or isinstance(value, bool):
        return json.dumps(value)
    if isinstance(value, (int, float)):
        return jcs_number(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list):
        return "[" + ",".join(jcs(v) for v in value) + "]"
    keys = sorted(value, key=lambda k: k.encode("utf-16-be"))
    return "{" + ",".join(json.dumps(k, ensure_ascii=False) + ":" + jcs(value[k]) for k in keys) + "}"


def load_export(export_dir):
    """Read model.json and weights.parquet; check scoring_sha256 and the weights file's SHA-256;
    return (meta, weights) where weights maps bucket -> weight (absent buckets weigh 0.0)."""
    folder = Path(export_dir)
    meta = json.loads((folder / "model.json").read_text(encoding="utf-8"))
    if meta.get("format") != "hashcurve-export" or meta.get("version") != 2:
        raise ValueError("model.json is not a version 2 hashcurve export")
    scoring = jcs({k: meta.get(k) for k in SCORING_KEYS}).encode("utf-8")
    if hashlib.sha256(scoring).hexdigest() != meta.get("scoring_sha256"):
        raise ValueError("model.json: the fields that decide a score do not match scoring_sha256")
    if meta["hashing"]["algorithm"] != "murmur3_x86_32":
        raise ValueError(f"unknown hash algorithm {meta['hashing']['algorithm']!r}")
    raw = (folder / meta["weights_file"]).read_bytes()
    if hashlib.sha256(raw).hexdigest() != meta["weights_sha256"]:
        raise ValueError("weights.parquet does not match the checksum in model.json")
    table = pq.read_table(folder / meta["weights_file"])
    weights = dict(zip(table.column("bucket").to_pylist(), table.column("weight").to_pylist()))
    return meta, weights


# ----------------------------------------------------------------------------------------------
# 2. Tokens of one row (hashing.rules)


def canonical(value):
    """The canonical text of a categorical value: strings as they are, integers in decimal,
    booleans true/false, dates YYYY-MM-DD. Other types are refused."""
    if isinstance(value, bool):  # test bool first: in Python a bool is also an int
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, str):
        return value
    if isinstance(value, datetime.date) and not isinstance(value, datetime.datetime):
        return value.isoformat()
    raise TypeError(f"categorical values must be strings, integers, booleans or dates, got {type(value).__name__}")


def value_token(column, value):
    """utf8(column) 0x1F utf8(canonical(value))."""
    return column.encode("utf-8") + FIELD_SEP + canonical(value).encode("utf-8")


def feature_entries(feature, value):
    """The (token, value) entries one feature adds for one cell, in order, and the one-hot tokens it
    offers to crosses (plain numerics offer none: they cannot be crossed)."""
    column, kind = feature["column"], feature["kind"]
    if value is None:  # a null adds nothing
        return [], []
    if kind == "categorical":
        tokens = [value_token(column, value)]
        return [(t, 1.0) for t in tokens], tokens
    if kind == "multi":  # one token per non-null element; repeats stay separate and add up
        tokens = [value_token(column, v) for v in value if v is not None]
        return [(t, 1.0) for t in tokens], tokens
    x = float(value)  # numeric (integers and decimals too)
    if not math.isfinite(x):
        raise ValueError(f"column {column}: NaN or infinite numeric value")
    if "edges" in feature:  # bin i = number of edges <= x; token column 0x1F '#' i
        i = sum(1 for e in feature["edges"] if e <= x)
        tokens = [column.encode("utf-8") + FIELD_SEP + b"#" + str(i).encode("ascii")]
        return [(t, 1.0) for t in tokens], tokens
    if feature.get("transform", "identity") == "log1p":  # sign(x) * ln(1 + |x|)
        x = math.copysign(math.log1p(abs(x)), x)
    return [(column.encode("utf-8"), x)], []  # token: the column name alone, no separator


def row_entries(hashing, row):
    """All (token, value) entries of one row: features in order, then crosses."""
    entries, offered = [], {}
    for feature in hashing["features"]:
        e, t = feature_entries(feature, row[feature["column"]])
        entries += e
        offered[feature["column"]] = t
    for cross in hashing["crosses"]:
        combos = [b""]  # Cartesian product over the parts' tokens, joined by 0x1E
        for k, column in enumerate(cross):
            combos = [c + (CROSS_SEP if k else b"") + t for c in combos for t in offered[column]]
        entries += [(c, 1.0) for c in combos]  # a part with no token (null) leaves no combination
    return entries


# ----------------------------------------------------------------------------------------------
# 3. Buckets, margin, score


def bucket(hashing, token):
    """murmur3_x86_32(token, seed) read as unsigned 32-bit, modulo 2^bits."""
    h = mmh3.hash(token, hashing["seed"], signed=False)
    return h % (1 << hashing["bits"])


def margin(meta, weights, row):
    """intercept + sum(value * weight[bucket]); entries in one bucket simply add up."""
    hashing = meta["hashing"]
    z = meta["intercept"]
    for token, value in row_entries(hashing, row):
        z += value * weights.get(bucket(hashing, token), 0.0)
    return z


def sigmoid(z):
    """1 / (1 + exp(-z)) without overflow."""
    if z >= 0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


def score_margin(meta, z):
    """The "score" column: the probability for link "logistic", the margin for "identity-margin"."""
    if meta["link"] == "logistic":
        return sigmoid(z)
    if meta["link"] == "identity-margin":
        return z
    raise ValueError(f"unknown link {meta['link']!r}")


def rows_of(parquet_path, columns):
    """The rows of a Parquet file as dicts of Python values (dates, ints, strings, lists, None)."""
    table = pq.read_table(parquet_path, columns=columns)
    return table.to_pylist()


def _margins(meta, weights, parquet_path):
    columns = [f["column"] for f in meta["hashing"]["features"]]
    return np.array([margin(meta, weights, row) for row in rows_of(parquet_path, columns)], dtype=np.float64)


def margins(export_dir, parquet_path):
    """Margins of every row of one Parquet file, as a float64 array."""
    meta, weights = load_export(export_dir)
    return _margins(meta, weights, parquet_path)


def score(export_dir, parquet_path):
    """Scores of every row of one Parquet file (the "score" column of hashcurve's scoring), float64."""
    meta, weights = load_export(export_dir)
    return np.array([score_margin(meta, z) for z in _margins(meta, weights, parquet_path)], dtype=np.float64)


def probability(export_dir, parquet_path):
    """Probabilities of every row: sigmoid(margin) for link "logistic"; Platt sigmoid(a*margin + b)
    for a calibrated squared-hinge model. Raises ValueError for an uncalibrated one."""
    meta, weights = load_export(export_dir)
    zs = _margins(meta, weights, parquet_path)
    if meta["link"] == "logistic":
        return np.array([sigmoid(z) for z in zs], dtype=np.float64)
    cal = meta["calibration"]
    if cal is None:
        raise ValueError("this squared-hinge model has no probability calibration")
    return np.array([sigmoid(cal["a"] * z + cal["b"]) for z in zs], dtype=np.float64)


def main(argv=None):
    """Command line: print one score per row (and the probability when the model has a calibration)."""
    ap = argparse.ArgumentParser(description="Score a Parquet file with a hashcurve export, row by row.")
    ap.add_argument("export_dir")
    ap.add_argument("parquet_path")
    ap.add_argument("--limit", type=int, default=None, help="print only the first N rows")
    args = ap.parse_args(argv)
    meta, _ = load_export(args.export_dir)
    scores = score(args.export_dir, args.parquet_path)
    probs = None
    if meta["link"] != "logistic" and meta["calibration"] is not None:
        probs = probability(args.export_dir, args.parquet_path)
    n = len(scores) if args.limit is None else min(args.limit, len(scores))
    for i in range(n):
        print(f"{scores[i]:.17g}" + ("" if probs is None else f"\t{probs[i]:.17g}"))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
