"""Streaming Parquet reader: files, folders and hive partitions -> hashed CSR minibatches.

Data flows one way: files are discovered and checked (footers only), days outside the date filter are
pruned by partition path and by row-group statistics, each chunk of rows is filtered (dates, labels,
negative sampling), hashed into the spec's feature space (``trainer.hashing``), optionally shuffled
in bounded windows, and cut into ``Batch`` objects of a fixed row count. Memory is bounded by the
chunk and window sizes, never by the log.

Every batch carries the ``Position`` from which reading resumes exactly: rows are hashed one by one,
so the stream of rows, and hence every batch, is the same whatever the chunking.
"""

from __future__ import annotations

import datetime as dt
import urllib.parse
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

import numba as nb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from trainer.errors import UserError
from trainer.hashing import cross_tokens, hash_tokens
from trainer.spec import Feature, Spec

CHUNK_ROWS = 32768
PARQUET_SUFFIXES = (".parquet", ".parq")
_EMPTY_BYTES = np.zeros(0, dtype=np.uint8)


@dataclass(frozen=True)
class Position:
    """Where reading resumes: re-read from row ``row`` of file number ``file``, rebuild shuffle window
    number ``window`` from there, and drop its first ``skip`` rows (0 without shuffling)."""

    file: int = 0
    row: int = 0
    skip: int = 0
    window: int = 0


@dataclass
class Batch:
    """One minibatch in CSR form.

    ``indptr`` (int64, n_rows + 1), ``indices`` (int32 bucket ids), ``data`` (float64 feature values),
    ``labels`` (float64 in {0, 1}; NaN when read without labels), ``weights`` (float64 row weights > 0),
    ``n_rows``; ``position``, where reading resumes after this batch; ``columns``, the kept columns
    of these rows (a pyarrow Table) when asked for. Tokens that collide inside a row stay separate
    entries; their contributions add up.
    """

    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray
    labels: np.ndarray
    weights: np.ndarray
    n_rows: int
    position: Position | None = None
    columns: pa.Table | None = None


@dataclass
class DataFile:
    """One Parquet file of the input with its hive partition values (key -> string)."""

    path: Path
    partitions: dict[str, str]
    num_rows: int
    schema: pa.Schema


@dataclass
class ReadCounts:
    """What the reader dropped on its way, for the user: rows with bad labels, negatives sampled out."""

    bad_labels: int = 0
    sampled_out: int = 0
    rows: int = 0


def parse_day(text: str | dt.date | None, what: str) -> dt.date | None:
    """Parse ``YYYY-MM-DD`` (a date or None passes through); raises UserError naming ``what`` (an
    option or a path)."""
    if text is None or isinstance(text, dt.date):
        return text
    try:
        return dt.date.fromisoformat(str(text))
    except (TypeError, ValueError):
        raise UserError(f"{what}: expected a date YYYY-MM-DD, got '{text}'") from None


def _base_type(t: pa.DataType) -> pa.DataType:
    if pa.types.is_dictionary(t):
        t = t.value_type
    if pa.types.is_large_string(t):
        return pa.string()
    if pa.types.is_large_list(t) or pa.types.is_list(t):
        return pa.list_(_base_type(t.value_type))
    return t


def discover(path: str | Path, spec: Spec | None, start: dt.date | None = None,
             end: dt.date | None = None, *, need: list[str] | None = None,
             missing_ok: tuple[str, ...] = (), named_by: dict[str, str] | None = None) -> list[DataFile]:
    """Find the Parquet files under ``path`` (a file, a folder, or a hive-partitioned folder).

    In a folder, files ending in .parquet or .parq count, except hidden ones (a path part starting
    with "." or "_"); other files are ignored.
    Files outside ``[start, end]`` by a partition key named as the spec's time column are pruned.
    Every file's footer is read to check that it is Parquet, that it has the columns in ``need``
    (default: all the spec's columns; ones in ``missing_ok`` may be absent) and that all files agree
    on their types. Raises UserError naming the file and column, and what named the column
    (``named_by[column]``, e.g. "--by"; default "the spec").
    """
    root = Path(path)
    if not root.exists():
        raise UserError(f"{root}: no such file or folder")
    if root.is_file():
        candidates = [root]
    else:
        candidates = sorted(p for p in root.rglob("*") if p.is_file() and p.suffix in PARQUET_SUFFIXES
                            and not any(part.startswith((".", "_")) for part in p.relative_to(root).parts))
        if not candidates:
            raise UserError(f"{root}: folder holds no Parquet files")
    need = spec.data_columns() if need is None else need
    time_col = spec.time_column if spec else None
    files: list[DataFile] = []
    seen_types: dict[str, tuple[pa.DataType, Path]] = {}
    for p in candidates:
        parts = {}
        if p != root:
            for seg in p.relative_to(root).parts[:-1]:
                if "=" in seg:
                    k, v = seg.split("=", 1)
                    parts[k] = urllib.parse.unquote(v)
        if time_col and time_col in parts and (start or end):
            day = parse_day(parts[time_col], f"{p}: partition key '{time_col}'")
            if (start and day < start) or (end and day > end):
                continue
        try:
            pf = pq.ParquetFile(p)
            schema = pf.schema_arrow
            num_rows = pf.metadata.num_rows
        except (pa.ArrowException, OSError) as exc:
            raise UserError(f"{p}: not a readable Parquet file ({str(exc).splitlines()[0]})") from None
        for col in need:
            if col in parts:
                continue
            if schema.get_field_index(col) < 0:
                if col in missing_ok:
                    continue
                raise UserError(f"{p}: column '{col}' named by {(named_by or {}).get(col, 'the spec')} is not in the file "
                                f"(columns: {', '.join(schema.names[:12])})")
            t = _base_type(schema.field(col).type)
            if col in seen_types and seen_types[col][0] != t:
                other_t, other_p = seen_types[col]
                raise UserError(f"{p}: column '{col}' is {t} but {other_p} has it as {other_t}; "
                                "all files of one input must share a schema")
            seen_types.setdefault(col, (t, p))
        files.append(DataFile(p, parts, num_rows, schema))
    if not files:
        raise UserError(f"{root}: the date filter {start or '...'} to {end or '...'} selects no files")
    return files


# ----------------------------------------------------------------------------------------------
# hashing one chunk of rows into CSR


@dataclass
class _Tokens:
    """A feature's tokens for one chunk: row r owns ids[ptr[r]:ptr[r+1]] into a token table whose
    token k is prefix + buf[off[k]:off[k+1]] and hashes to buckets[k]; ``values`` per entry or None
    (all 1.0); ``dictionary``, the Arrow dictionary the table came from, if any."""

    ptr: np.ndarray
    ids: np.ndarray
    prefix: np.ndarray
    buf: np.ndarray
    off: np.ndarray
    buckets: np.ndarray | None = None
    values: np.ndarray | None = None
    dictionary: pa.Array | None = None


def _valid_mask(arr: pa.Array) -> np.ndarray:
    if arr.null_count == 0:
        return np.ones(len(arr), dtype=bool)
    return arr.is_valid().to_numpy(zero_copy_only=False)


def _string_table(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(bytes, int64 offsets) of a plain string array, without copying the bytes."""
    bufs = arr.buffers()
    odt = np.int64 if pa.types.is_large_string(arr.type) else np.int32
    off = np.frombuffer(bufs[1], dtype=odt)[arr.offset: arr.offset + len(arr) + 1].astype(np.int64)
    data = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None else _EMPTY_BYTES
    return data, off


def _canonical_strings(arr: pa.Array, where: str) -> pa.Array:
    """Values as canonical strings (the hashing contract): strings as they are, integers in decimal,
    booleans true/false, dates YYYY-MM-DD. Other types raise UserError."""
    t = arr.type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return arr
    if pa.types.is_integer(t) or pa.types.is_boolean(t) or pa.types.is_date32(t):
        return pc.cast(arr, pa.string())
    if pa.types.is_date64(t):
        return pc.cast(pc.cast(arr, pa.date32()), pa.string())
    raise UserError(f"{where} is {t}; categorical and multi columns take strings, integers, booleans "
                    "or dates (cast floats or timestamps before hashing)")


def _token_source(values: pa.Array, where: str):
    """(buf, off, codes, dictionary): a token table of canonical strings, and per-element codes into it
    when the column is dictionary-encoded or not made of strings (each distinct value hashed once),
    else None (one token per element); ``dictionary`` is the column's own Arrow dictionary or None."""
    t = values.type
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        buf, off = _string_table(values)
        return buf, off, None, None
    encoded = values if pa.types.is_dictionary(t) else pc.dictionary_encode(values)
    if encoded is values:
        codes = pc.min_max(values.indices).as_py()
        if codes["min"] is not None and (codes["min"] < 0 or codes["max"] >= len(values.dictionary)):
            raise UserError(f"{where} holds dictionary codes outside its dictionary; the file is damaged")
    buf, off = _string_table(_canonical_strings(encoded.dictionary, where))
    codes = encoded.indices.fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64, copy=False)
    return buf, off, codes, encoded.dictionary if encoded is values else None


def _categorical_tokens(arr: pa.Array, prefix: np.ndarray, where: str) -> _Tokens:
    valid = _valid_mask(arr)
    buf, off, codes, dictionary = _token_source(arr, where)
    rows = np.flatnonzero(valid)
    ids = rows if codes is None else codes[rows]
    ptr = np.zeros(len(arr) + 1, dtype=np.int64)
    np.cumsum(valid, out=ptr[1:])
    return _Tokens(ptr, ids.astype(np.int64, copy=False), prefix, buf, off, dictionary=dictionary)


def _multi_tokens(arr: pa.Array, prefix: np.ndarray, where: str) -> _Tokens:
    if not (pa.types.is_list(arr.type) or pa.types.is_large_list(arr.type)):
        raise UserError(f"{where} is {arr.type}; multi features take list columns")
    loff = arr.offsets.to_numpy(zero_copy_only=False).astype(np.int64)
    lengths = np.diff(loff)
    row_valid = _valid_mask(arr)
    lengths = np.where(row_valid, lengths, 0) if arr.null_count else lengths
    child = arr.values
    lo, hi = int(loff[0]), int(loff[-1])
    elem_valid = _valid_mask(child)[lo:hi]
    if arr.null_count:
        in_valid_row = np.repeat(row_valid, np.diff(loff))
        elem_valid = elem_valid & in_valid_row
    buf, off, codes, dictionary = _token_source(child, where)
    elems = lo + np.flatnonzero(elem_valid)
    ids = elems if codes is None else codes[elems]
    cv = np.zeros(hi - lo + 1, dtype=np.int64)
    np.cumsum(elem_valid, out=cv[1:])
    ptr = cv[loff - lo]
    return _Tokens(ptr, ids.astype(np.int64, copy=False), prefix, buf, off, dictionary=dictionary)


def _numeric_values(arr: pa.Array, where: str) -> tuple[np.ndarray, np.ndarray]:
    """(valid mask, float64 values of the valid rows); NaN or infinite values raise UserError."""
    t = arr.type
    if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)):
        raise UserError(f"{where} is {t}; numeric features take integer or floating columns")
    valid = _valid_mask(arr)
    x = pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False)[valid]
    bad = ~np.isfinite(x)
    if bad.any():
        raise UserError(f"{where} has {int(bad.sum())} NaN or infinite values (e.g. {x[bad][0]}); "
                        "numeric features must be finite or null")
    return valid, x


def _numeric_tokens(arr: pa.Array, feat: Feature, prefix: np.ndarray, where: str) -> _Tokens:
    valid, x = _numeric_values(arr, where)
    ptr = np.zeros(len(arr) + 1, dtype=np.int64)
    np.cumsum(valid, out=ptr[1:])
    if feat.edges is not None:
        labels = [f"#{i}".encode() for i in range(len(feat.edges) + 1)]
        buf = np.frombuffer(b"".join(labels), dtype=np.uint8)
        off = np.zeros(len(labels) + 1, dtype=np.int64)
        np.cumsum([len(s) for s in labels], out=off[1:])
        ids = np.searchsorted(np.asarray(feat.edges), x, side="right").astype(np.int64)
        return _Tokens(ptr, ids, prefix, buf, off)
    values = np.sign(x) * np.log1p(np.abs(x)) if feat.transform == "log1p" else x
    name = prefix[:-1]
    return _Tokens(ptr, np.zeros(x.size, dtype=np.int64), name, _EMPTY_BYTES,
                   np.zeros(2, dtype=np.int64), values=values)


@nb.njit(cache=True)
def _scatter(ptr, ids, buckets, values, cursor, out_idx, out_val):
    """Append each row's entries (bucket, value) at that row's cursor in the output CSR."""
    has_values = values.size > 0
    for r in range(ptr.size - 1):
        c = cursor[r]
        for p in range(ptr[r], ptr[r + 1]):
            out_idx[c] = buckets[ids[p]]
            out_val[c] = values[p] if has_values else 1.0
            c += 1
        cursor[r] = c


@nb.njit(cache=True)
def _take_rows(indptr, indices, data, rows):
    """Gather CSR rows ``rows`` (int64) into a new CSR (indptr, indices, data)."""
    n = rows.size
    out_ptr = np.zeros(n + 1, dtype=np.int64)
    for i in range(n):
        r = rows[i]
        out_ptr[i + 1] = out_ptr[i] + indptr[r + 1] - indptr[r]
    out_idx = np.empty(out_ptr[n], dtype=np.int32)
    out_val = np.empty(out_ptr[n], dtype=np.float64)
    for i in range(n):
        r = rows[i]
        a = indptr[r]
        o = out_ptr[i]
        for k in range(indptr[r + 1] - a):
            out_idx[o + k] = indices[a + k]
            out_val[o + k] = data[a + k]
    return out_ptr, out_idx, out_val


@nb.njit(cache=True)
def _keep_uniform(file_idx, raw, seed, pass_index):
    """A uniform number in [0, 1) per row from (seed, pass, file, row) by the SplitMix64 finalizer
    ("Fast splittable pseudorandom number generators", OOPSLA 2014): the same row always draws the
    same number, however the log is chunked or resumed."""
    out = np.empty(raw.size, dtype=np.float64)
    for i in range(raw.size):
        z = (np.uint64(seed) * np.uint64(0x9E3779B97F4A7C15) + np.uint64(pass_index) * np.uint64(0xBF58476D1CE4E5B9)
             + np.uint64(file_idx) * np.uint64(0x94D049BB133111EB) + np.uint64(raw[i]))
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        z = z ^ (z >> np.uint64(31))
        out[i] = np.float64(z >> np.uint64(11)) * (1.0 / 9007199254740992.0)
    return out


class BucketExamples:
    """A few readable token values per bucket, from the first ``max_rows`` rows hashed, so reports can
    say which field values a weight came from: at most ``per_bucket`` values per bucket and
    ``max_values`` in all (frequent values come first, as they fill the first chunks)."""

    def __init__(self, n_buckets: int, per_bucket: int = 2, max_rows: int = 131_072,
                 values: dict[str, list[str]] | None = None, max_values: int = 100_000):
        self.per_bucket, self.rows_left, self.max_values = per_bucket, max_rows, max_values
        self.total = 0
        self.values: dict[str, list[str]] = values or {}
        self.count = np.zeros(n_buckets, dtype=np.uint8)
        for b, v in self.values.items():
            self.count[int(b)] = len(v)
            self.total += len(v)

    def add(self, tok: "_Tokens", buckets: np.ndarray) -> None:
        """Record values of the tokens ``tok`` uses whose buckets have room."""
        used = np.zeros(tok.off.shape[0] - 1, dtype=bool)
        used[tok.ids] = True
        ids = np.flatnonzero(used)
        b = buckets[ids]
        room = self.count[b] < self.per_bucket
        ids, b = ids[room], b[room]
        _, first = np.unique(b, return_index=True)
        first = first[: max(self.max_values - self.total, 0)]
        ids, b = ids[first], b[first]
        added = []
        values = self.values
        for text, bucket in zip(_token_texts(tok, ids), b.tolist()):
            key = str(bucket)
            seen = values.get(key)
            if seen is None:
                values[key] = [text]
            elif text not in seen:
                seen.append(text)
            else:
                continue
            added.append(bucket)
        self.count[np.asarray(added, dtype=np.int64)] += 1
        self.total += len(added)


def _readable(text: str) -> str:
    """A token as reports show it: field = value, crossed parts joined by ' & '."""
    return text.replace("\x1f", "=").replace("\x1e", " & ")


def _token_texts(tok: "_Tokens", ids: np.ndarray) -> list[str]:
    """Readable texts of tokens ``ids`` of a token table (prefix + bytes), decoded in one Arrow call;
    bytes that are not UTF-8 are decoded one by one with replacement characters."""
    starts, lengths = tok.off[ids], tok.off[ids + 1] - tok.off[ids]
    offsets = np.zeros(len(ids) + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    gather = np.repeat(starts - offsets[:-1], lengths) + np.arange(offsets[-1])
    data = tok.buf[gather]
    prefix = _readable(tok.prefix.tobytes().decode("utf-8", errors="replace"))
    arr = pa.LargeStringArray.from_buffers(len(ids), pa.py_buffer(offsets), pa.py_buffer(data))
    try:
        arr.validate(full=True)
    except pa.ArrowInvalid:
        return [prefix + _readable(data[offsets[i]:offsets[i + 1]].tobytes().decode("utf-8", errors="replace"))
                for i in range(len(ids))]
    arr = pc.replace_substring(pc.replace_substring(arr, "\x1f", "="), "\x1e", " & ")
    return [prefix + t for t in arr.to_pylist()]


class Featurizer:
    """Hashes the spec's features of a chunk of rows into CSR (``trainer.hashing`` contract); with
    ``examples``, also records a few readable values per bucket."""

    def __init__(self, spec: Spec, examples: BucketExamples | None = None):
        self.spec = spec
        self.examples = examples
        self._last_dictionary: dict[str, tuple[pa.Array, np.ndarray]] = {}
        self.seed = np.uint32(spec.seed)
        self.mask = np.uint32(spec.n_buckets - 1)
        self.prefixes = {f.column: np.frombuffer(f.column.encode("utf-8") + b"\x1f", dtype=np.uint8)
                         for f in spec.features}

    def _feature_tokens(self, feat: Feature, arr: pa.Array, where: str) -> _Tokens:
        prefix = self.prefixes[feat.column]
        if feat.kind == "categorical":
            if pa.types.is_list(arr.type) or pa.types.is_large_list(arr.type):
                raise UserError(f"{where} is a list column; declare it as kind 'multi'")
            return _categorical_tokens(arr, prefix, where)
        if feat.kind == "multi":
            return _multi_tokens(arr, prefix, where)
        return _numeric_tokens(arr, feat, prefix, where)

    def _hash(self, tok: _Tokens, column: str | None) -> np.ndarray:
        """Buckets of the token table; a column's dictionary equal to the one of the previous chunk
        (Parquet repeats a row group's dictionary in every batch read from it) is not hashed again."""
        if tok.buckets is None:
            last = self._last_dictionary.get(column)
            if tok.dictionary is not None and last is not None and last[0].equals(tok.dictionary):
                tok.buckets = last[1]
            else:
                tok.buckets = hash_tokens(tok.prefix, tok.buf, tok.off, self.seed, self.mask)
                if tok.dictionary is not None:
                    self._last_dictionary[column] = (tok.dictionary, tok.buckets)
        return tok.buckets

    def transform(self, table: pa.Table | pa.RecordBatch, source: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Hash the rows of ``table`` into CSR ``(indptr int64, indices int32, data float64)``.

        Row r holds the features in spec order, then the crosses. ``source`` (the file) names the
        place in error messages. Raises UserError for a column of the wrong type or bad numerics.
        """
        n = table.num_rows
        toks: dict[str, _Tokens] = {}
        for feat in self.spec.features:
            col = table.column(feat.column)
            arr = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
            toks[feat.column] = self._feature_tokens(feat, arr, f"{source}: column '{feat.column}'")
        parts = [toks[f.column] for f in self.spec.features]
        names = [f.column for f in self.spec.features] + [None] * len(self.spec.crosses)
        for cross in self.spec.crosses:
            acc = toks[cross[0]]
            for name in cross[1:]:
                b = toks[name]
                ptr, buf, off = cross_tokens(acc.ptr, acc.ids, acc.prefix, acc.buf, acc.off,
                                             b.ptr, b.ids, b.prefix, b.buf, b.off)
                acc = _Tokens(ptr, np.arange(ptr[-1], dtype=np.int64), _EMPTY_BYTES, buf, off)
            parts.append(acc)
        counts = np.zeros(n, dtype=np.int64)
        for t in parts:
            counts += np.diff(t.ptr)
        indptr = np.zeros(n + 1, dtype=np.int64)
        np.cumsum(counts, out=indptr[1:])
        indices = np.empty(indptr[-1], dtype=np.int32)
        data = np.empty(indptr[-1], dtype=np.float64)
        cursor = indptr[:-1].copy()
        empty = np.zeros(0, dtype=np.float64)
        sample = self.examples is not None and self.examples.rows_left > 0
        for name, t in zip(names, parts):
            _scatter(t.ptr, t.ids, self._hash(t, name), empty if t.values is None else t.values,
                     cursor, indices, data)
            if sample:
                self.examples.add(t, t.buckets)
        if sample:
            self.examples.rows_left -= n
        return indptr, indices, data


# ----------------------------------------------------------------------------------------------
# labels, weights and dates of a chunk


def _labels(arr: pa.Array, spec: Spec, where: str) -> tuple[np.ndarray, np.ndarray]:
    """(y float64 in {0,1}, ok mask): nulls and values outside the accepted set are not ok."""
    t = arr.type
    if pa.types.is_dictionary(t):
        arr = arr.cast(t.value_type)
        t = arr.type
    valid = _valid_mask(arr)
    if pa.types.is_boolean(t):
        y = arr.fill_null(False).to_numpy(zero_copy_only=False).astype(np.float64)
        return y, valid
    if pa.types.is_integer(t) or pa.types.is_floating(t):
        x = pc.cast(arr, pa.float64()).fill_null(0.0).to_numpy(zero_copy_only=False)
        ok = valid & ((x == 0) | (x == 1) | (x == -1))
        return (x == 1).astype(np.float64), ok
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        if spec.positive is None:
            raise UserError(f"{where} holds strings; list the positive values in spec key 'label.positive'")
        y = pc.is_in(arr, value_set=pa.array(spec.positive)).fill_null(False).to_numpy(zero_copy_only=False)
        ok = valid
        if spec.negative is not None:
            known = pc.is_in(arr, value_set=pa.array(spec.positive + spec.negative)).fill_null(False)
            ok = valid & known.to_numpy(zero_copy_only=False)
        return y.astype(np.float64), ok
    raise UserError(f"{where} is {t}; labels must be 0/1, -1/1, booleans or strings")


def _accepted(spec: Spec) -> str:
    if spec.positive is None:
        return "0/1, -1/1 or true/false"
    neg = ", ".join(spec.negative) if spec.negative else "any other string"
    return f"positive {', '.join(spec.positive)}; negative {neg}"


def _weights(arr: pa.Array, where: str) -> np.ndarray:
    if not (pa.types.is_integer(arr.type) or pa.types.is_floating(arr.type)):
        raise UserError(f"{where} is {arr.type}; row weights must be numbers")
    w = pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False)
    bad = ~(np.isfinite(w) & (w > 0)) | ~_valid_mask(arr)
    if bad.any():
        raise UserError(f"{where} has {int(bad.sum())} null, non-finite or non-positive row weights "
                        f"(e.g. {arr[int(np.flatnonzero(bad)[0])]}); weights must be finite and > 0")
    return w


def _days(arr: pa.Array, where: str) -> pa.Array:
    t = arr.type
    if pa.types.is_date32(t):
        return arr
    if pa.types.is_date64(t) or pa.types.is_timestamp(t):
        return pc.cast(arr, pa.date32())
    raise UserError(f"{where} is {t}; the time column must be a date or a timestamp")


def _stat_day(value) -> dt.date | None:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    return None


# ----------------------------------------------------------------------------------------------
# the row stream


@dataclass
class _Rows:
    """Hashed rows on their way to a batch: CSR, labels, weights, origin (file, raw row), the position
    from which reading resumes after each row (n x 4: file, row, skip, window) and kept columns."""

    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray
    labels: np.ndarray
    weights: np.ndarray
    file: np.ndarray
    raw: np.ndarray
    after: np.ndarray
    columns: pa.Table | None = None

    @property
    def n(self) -> int:
        return self.labels.size

    def take(self, rows: np.ndarray) -> "_Rows":
        ptr, idx, val = _take_rows(self.indptr, self.indices, self.data, rows)
        cols = self.columns.take(pa.array(rows)) if self.columns is not None else None
        return _Rows(ptr, idx, val, self.labels[rows], self.weights[rows], self.file[rows], self.raw[rows],
                     self.after[rows], cols)

    def slice(self, a: int, b: int) -> "_Rows":
        lo, hi = self.indptr[a], self.indptr[b]
        cols = self.columns.slice(a, b - a) if self.columns is not None else None
        return _Rows(self.indptr[a:b + 1] - lo, self.indices[lo:hi], self.data[lo:hi], self.labels[a:b],
                     self.weights[a:b], self.file[a:b], self.raw[a:b], self.after[a:b], cols)

    @staticmethod
    def concat(parts: list["_Rows"]) -> "_Rows":
        if len(parts) == 1:
            return parts[0]
        offsets = np.cumsum([0] + [p.indptr[-1] for p in parts[:-1]])
        indptr = np.concatenate([parts[0].indptr[:1]] + [p.indptr[1:] + o for p, o in zip(parts, offsets)])
        cols = pa.concat_tables([p.columns for p in parts]) if parts[0].columns is not None else None
        return _Rows(indptr, *(np.concatenate([getattr(p, k) for p in parts])
                               for k in ("indices", "data", "labels", "weights", "file", "raw", "after")), cols)


@dataclass
class Reader:
    """Streams a Parquet log as hashed minibatches.

    ``path``: a file, folder or hive-partitioned folder. ``start``/``end``: inclusive date filter on
    the spec's time column (partition key or column). ``batch_rows``: rows per batch (the last one of
    a pass may be shorter). ``shuffle_rows``: 0 for file order, else rows are shuffled within
    consecutive windows of that many rows, seeded by (``seed``, pass, window). ``negative_keep_rate``:
    keep each negative row with this probability (seeded per row). ``with_labels``: False reads no
    label (scoring). ``skip_bad_labels``: drop rows with null or unaccepted labels and count them
    instead of raising. ``keep``: columns to carry along in ``Batch.columns``. ``missing_as_null``:
    a feature column absent from a file reads as all null. ``dictionary``: read string columns
    dictionary-encoded (each distinct value hashed once per chunk); both ways give the same batches.
    ``examples``: a BucketExamples that records readable values per bucket as rows are hashed.
    ``keep_option``: the option that named ``keep`` (for error messages).
    """

    spec: Spec
    path: str | Path
    start: dt.date | None = None
    end: dt.date | None = None
    batch_rows: int = 4096
    shuffle_rows: int = 0
    seed: int = 0
    negative_keep_rate: float = 1.0
    with_labels: bool = True
    skip_bad_labels: bool = False
    keep: tuple[str, ...] = ()
    keep_option: str = "--keep"
    missing_as_null: bool = False
    dictionary: bool = True
    chunk_rows: int = CHUNK_ROWS
    examples: BucketExamples | None = None
    counts: ReadCounts = field(default_factory=ReadCounts)

    def __post_init__(self):
        if self.start and self.end and self.start > self.end:
            raise UserError(f"date filter: start {self.start} is after end {self.end}")
        need = [c for c in self.spec.data_columns() if self.with_labels or c not in
                (self.spec.label_column, self.spec.weight_column)]
        if not (self.start or self.end):
            need = [c for c in need if c != self.spec.time_column]
        self._need = list(dict.fromkeys(need + list(self.keep)))
        missing_ok = tuple(f.column for f in self.spec.features) if self.missing_as_null else ()
        self.files = discover(self.path, self.spec, self.start, self.end, need=self._need, missing_ok=missing_ok,
                              named_by={c: self.keep_option for c in self.keep if c not in need})
        self.featurizer = Featurizer(self.spec, self.examples)
        self._check_types()

    def _check_types(self) -> None:
        """Refuse a feature column whose type its kind does not take before any row is read: the
        featurizer's own checks run on an empty table of the first file's schema (discover has made
        every file's types agree). Files whose features come partly from partition keys or absent
        columns are checked when read."""
        f = self.files[0]
        cols = [feat.column for feat in self.spec.features]
        if all(f.schema.get_field_index(c) >= 0 for c in cols):
            Featurizer(self.spec).transform(pa.schema([f.schema.field(c) for c in cols]).empty_table(), str(f.path))

    @property
    def total_rows(self) -> int:
        """Rows in the selected files before row filters (an upper bound for progress bars)."""
        return sum(f.num_rows for f in self.files)

    def batches(self, pass_index: int = 0, start: Position | None = None) -> Iterator[Batch]:
        """Yield the batches of one pass, resuming at ``start`` if given. Raises UserError when the
        filters leave no rows (at the end of a pass that started at the beginning)."""
        start = start or Position()
        pending: list[_Rows] = []
        have = 0
        emitted = 0
        for rows in self._stream(pass_index, start):
            pending.append(rows)
            have += rows.n
            while have >= self.batch_rows:
                merged = _Rows.concat(pending)
                out, rest = merged.slice(0, self.batch_rows), merged.slice(self.batch_rows, merged.n)
                pending, have = ([rest] if rest.n else []), rest.n
                emitted += out.n
                yield self._batch(out)
        if have:
            emitted += have
            yield self._batch(_Rows.concat(pending))
        if emitted == 0 and start == Position():
            raise UserError(f"{self.path}: no rows left after the filters (dates {self.start or '...'} to "
                            f"{self.end or '...'})")

    @staticmethod
    def _batch(rows: _Rows) -> Batch:
        position = Position(*(int(v) for v in rows.after[-1]))
        return Batch(rows.indptr, rows.indices, rows.data, rows.labels, rows.weights, rows.n, position, rows.columns)

    def _stream(self, pass_index: int, start: Position) -> Iterator[_Rows]:
        """Rows in file order, or shuffled within windows of ``shuffle_rows`` rows. A window is the
        next ``shuffle_rows`` rows from its origin (file, row), permuted by (seed, pass, window)."""
        chunks = self._chunks(pass_index, start.file, start.row)
        if self.shuffle_rows <= 0:
            yield from chunks
            return
        size, window, skip = self.shuffle_rows, start.window, start.skip
        buf: list[_Rows] = []
        have = 0
        while True:
            for nxt in chunks:
                buf.append(nxt)
                have += nxt.n
                if have >= size:
                    break
            if have == 0:
                return
            merged = _Rows.concat(buf)
            cut = min(size, merged.n)
            win, rest = merged.slice(0, cut), merged.slice(cut, merged.n)
            buf, have = ([rest] if rest.n else []), rest.n
            rng = np.random.Generator(np.random.PCG64([self.seed, pass_index, window]))
            shuffled = win.take(rng.permutation(win.n))
            shuffled.after = np.empty((win.n, 4), dtype=np.int64)
            shuffled.after[:, 0] = win.file[0]
            shuffled.after[:, 1] = win.raw[0]
            shuffled.after[:, 2] = np.arange(1, win.n + 1)
            shuffled.after[:, 3] = window
            shuffled.after[-1] = win.after[-1, :2].tolist() + [0, window + 1]
            if skip < shuffled.n:
                yield shuffled.slice(skip, shuffled.n)
            skip = 0
            window += 1

    def _chunks(self, pass_index: int, first_file: int, first_row: int) -> Iterator[_Rows]:
        """Filtered, hashed chunks of rows in file order from (first_file, first_row)."""
        for fi in range(first_file, len(self.files)):
            f = self.files[fi]
            skip_to = first_row if fi == first_file else 0
            try:
                pf = pq.ParquetFile(f.path, read_dictionary=self._dict_columns(f) if self.dictionary else None)
                columns_read = [c for c in self._need if c not in f.partitions and f.schema.get_field_index(c) >= 0]
                base = 0
                for g in range(pf.metadata.num_row_groups):
                    rg_rows = pf.metadata.row_group(g).num_rows
                    if base + rg_rows <= skip_to or self._pruned(pf, g):
                        base += rg_rows
                        continue
                    pos = base
                    for rb in pf.iter_batches(batch_size=self.chunk_rows, row_groups=[g], columns=columns_read,
                                              use_threads=False):
                        lo = max(skip_to - pos, 0)
                        if lo >= rb.num_rows:
                            pos += rb.num_rows
                            continue
                        rows = self._prepare(rb.slice(lo), f, fi, pos + lo, pass_index)
                        pos += rb.num_rows
                        if rows is not None:
                            yield rows
                    base += rg_rows
            except (pa.ArrowException, OSError) as exc:
                raise UserError(f"{f.path}: cannot read Parquet data ({str(exc).splitlines()[0]})") from None

    def _dict_columns(self, f: DataFile) -> list[str]:
        cols = []
        for feat in self.spec.features:
            i = f.schema.get_field_index(feat.column)
            if i < 0:
                continue
            t = f.schema.field(i).type
            if feat.kind == "categorical" and (pa.types.is_string(t) or pa.types.is_large_string(t)):
                cols.append(feat.column)
            elif feat.kind == "multi" and (pa.types.is_list(t) or pa.types.is_large_list(t)) and (
                    pa.types.is_string(t.value_type) or pa.types.is_large_string(t.value_type)):
                cols.append(f"{feat.column}.list.element")
        return cols

    def _pruned(self, pf: pq.ParquetFile, g: int) -> bool:
        """True when row group ``g``'s statistics put all its days outside the date filter."""
        col = self.spec.time_column
        if not col or not (self.start or self.end):
            return False
        meta = pf.metadata
        idx = next((i for i in range(meta.num_columns) if meta.schema.column(i).path == col), None)
        if idx is None:
            return False
        stats = meta.row_group(g).column(idx).statistics
        if stats is None or not stats.has_min_max:
            return False
        lo, hi = _stat_day(stats.min), _stat_day(stats.max)
        if lo is None or hi is None:
            return False
        return bool((self.end and lo > self.end) or (self.start and hi < self.start))

    def _prepare(self, rb: pa.RecordBatch, f: DataFile, fi: int, first_raw: int, pass_index: int) -> _Rows | None:
        spec = self.spec
        n = rb.num_rows
        table = pa.Table.from_batches([rb])
        for key, value in f.partitions.items():
            if key in self._need and table.schema.get_field_index(key) < 0:
                table = table.append_column(key, pa.DictionaryArray.from_arrays(
                    pa.array(np.zeros(n, dtype=np.int32)), pa.array([value])))
        if self.missing_as_null:
            for feat in spec.features:
                if table.schema.get_field_index(feat.column) < 0:
                    kind_type = {"categorical": pa.string(), "multi": pa.list_(pa.string()),
                                 "numeric": pa.float64()}[feat.kind]
                    table = table.append_column(feat.column, pa.nulls(n, kind_type))
        keep = np.ones(n, dtype=bool)
        where = f"{f.path}: column"
        if spec.time_column and (self.start or self.end) and spec.time_column not in f.partitions:
            days = _days(table.column(spec.time_column).combine_chunks(), f"{where} '{spec.time_column}'")
            m = pc.is_valid(days)
            if self.start:
                m = pc.and_(m, pc.greater_equal(days, pa.scalar(self.start, pa.date32())))
            if self.end:
                m = pc.and_(m, pc.less_equal(days, pa.scalar(self.end, pa.date32())))
            keep &= m.fill_null(False).to_numpy(zero_copy_only=False)
        if self.with_labels:
            y, ok = _labels(table.column(spec.label_column).combine_chunks(), spec, f"{where} '{spec.label_column}'")
            bad = keep & ~ok
            if bad.any():
                if not self.skip_bad_labels:
                    i = int(np.flatnonzero(bad)[0])
                    raise UserError(f"{where} '{spec.label_column}' has {int(bad.sum())} null or unaccepted "
                                    f"label values in rows {first_raw}..{first_raw + n - 1} (e.g. row {first_raw + i}: "
                                    f"{table.column(spec.label_column)[i]}); accepted: {_accepted(spec)}; "
                                    "--skip-bad-labels drops such rows")
                self.counts.bad_labels += int(bad.sum())
                keep &= ok
            w = (_weights(table.column(spec.weight_column).combine_chunks(), f"{where} '{spec.weight_column}'")
                 if spec.weight_column else np.ones(n))
            if self.negative_keep_rate < 1.0:
                u = _keep_uniform(fi, np.arange(first_raw, first_raw + n, dtype=np.int64), self.seed, pass_index)
                sampled = keep & (y == 0) & (u >= self.negative_keep_rate)
                self.counts.sampled_out += int(sampled.sum())
                keep &= ~sampled
        else:
            y = np.full(n, np.nan)
            w = np.ones(n)
        raw = np.arange(first_raw, first_raw + n, dtype=np.int64)
        if not keep.all():
            idx = np.flatnonzero(keep)
            if idx.size == 0:
                return None
            table = table.take(pa.array(idx))
            y, w, raw = y[idx], w[idx], raw[idx]
        indptr, indices, data = self.featurizer.transform(table, str(f.path))
        self.counts.rows += raw.size
        cols = table.select(list(self.keep)) if self.keep else None
        after = np.zeros((raw.size, 4), dtype=np.int64)
        after[:, 0] = fi
        after[:, 1] = raw + 1
        return _Rows(indptr, indices, data, y, w, np.full(raw.size, fi, dtype=np.int64), raw, after, cols)
