"""Arrow columns -> tokens -> buckets: one chunk of rows hashed into CSR, and its labels and weights.

Each feature's column becomes a token table (dictionary-aware: each distinct value of a dictionary
or non-string column is hashed once), crosses combine token tables, and the tables' buckets
(``trainer.hashing``) are scattered into the rows' CSR entries. Observers attached with
:meth:`Featurizer.watch` see every hashed token table (``trainer.reader.examples`` records readable
values per bucket that way).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from trainer.errors import UserError
from trainer.hashing import cross_pairs, cross_tokens, hash_bytes, hash_tokens
from trainer.reader._kernels import scatter_rows
from trainer.reader.buffers import index_array, valid_mask, values_of
from trainer.spec import Feature, Spec

_EMPTY_BYTES = np.zeros(0, dtype=np.uint8)


@dataclass
class TokenTable:
    """A feature's tokens for one chunk.

    Row r owns ``ids[ptr[r]:ptr[r+1]]`` into a token table whose token k is
    ``prefix + buf[off[k]:off[k+1]]`` and hashes to ``buckets[k]``.

    Attributes
    ----------
    ptr : numpy.ndarray
        int64 row offsets into ``ids``.
    ids : numpy.ndarray
        Token id of each entry.
    prefix : numpy.ndarray
        uint8 bytes every token starts with (the column name and a separator).
    buf : numpy.ndarray
        uint8 bytes of the tokens' values.
    off : numpy.ndarray
        int64 offsets of each token's bytes in ``buf``.
    buckets : numpy.ndarray or None
        Bucket of each token, once hashed.
    values : numpy.ndarray or None
        float64 value per entry, or None (all 1.0).
    dictionary : pyarrow.Array or None
        The Arrow dictionary the table came from, if any.
    """

    ptr: np.ndarray
    ids: np.ndarray
    prefix: np.ndarray
    buf: np.ndarray
    off: np.ndarray
    buckets: np.ndarray | None = None
    values: np.ndarray | None = None
    dictionary: pa.Array | None = None


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
    codes = values_of(encoded.indices).astype(np.int64)  # under a null: any code; callers skip nulls
    return buf, off, codes, encoded.dictionary if encoded is values else None


def _categorical_tokens(arr: pa.Array, prefix: np.ndarray, where: str) -> TokenTable:
    buf, off, codes, dictionary = _token_source(arr, where)
    n = len(arr)
    if arr.null_count == 0:  # a token in every row
        return TokenTable(np.arange(n + 1), np.arange(n) if codes is None else codes, prefix, buf, off,
                          dictionary=dictionary)
    valid = valid_mask(arr)
    rows = np.flatnonzero(valid)
    ids = rows if codes is None else codes[rows]
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(valid, out=ptr[1:])
    return TokenTable(ptr, ids.astype(np.int64, copy=False), prefix, buf, off, dictionary=dictionary)


def _multi_tokens(arr: pa.Array, prefix: np.ndarray, where: str) -> TokenTable:
    if not (pa.types.is_list(arr.type) or pa.types.is_large_list(arr.type)):
        raise UserError(f"{where} is {arr.type}; multi features take list columns")
    loff = values_of(arr.offsets).astype(np.int64)
    lengths = np.diff(loff)
    row_valid = valid_mask(arr)
    lengths = np.where(row_valid, lengths, 0) if arr.null_count else lengths
    child = arr.values
    lo, hi = int(loff[0]), int(loff[-1])
    elem_valid = valid_mask(child)[lo:hi]
    if arr.null_count:
        in_valid_row = np.repeat(row_valid, np.diff(loff))
        elem_valid = elem_valid & in_valid_row
    buf, off, codes, dictionary = _token_source(child, where)
    elems = lo + np.flatnonzero(elem_valid)
    ids = elems if codes is None else codes[elems]
    cv = np.zeros(hi - lo + 1, dtype=np.int64)
    np.cumsum(elem_valid, out=cv[1:])
    ptr = cv[loff - lo]
    return TokenTable(ptr, ids.astype(np.int64, copy=False), prefix, buf, off, dictionary=dictionary)


def _numeric_values(arr: pa.Array, where: str) -> tuple[np.ndarray, np.ndarray]:
    """(valid mask, float64 values of the valid rows); NaN or infinite values raise UserError."""
    t = arr.type
    if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)):
        raise UserError(f"{where} is {t}; numeric features take integer or floating columns")
    valid = valid_mask(arr)
    x = values_of(pc.cast(arr, pa.float64()))[valid]
    bad = ~np.isfinite(x)
    if bad.any():
        raise UserError(f"{where} has {int(bad.sum())} NaN or infinite values (e.g. {x[bad][0]}); "
                        "numeric features must be finite or null")
    return valid, x


def _numeric_tokens(arr: pa.Array, feat: Feature, prefix: np.ndarray, where: str) -> TokenTable:
    valid, x = _numeric_values(arr, where)
    ptr = np.zeros(len(arr) + 1, dtype=np.int64)
    np.cumsum(valid, out=ptr[1:])
    if feat.edges is not None:
        labels = [f"#{i}".encode() for i in range(len(feat.edges) + 1)]
        buf = np.frombuffer(b"".join(labels), dtype=np.uint8)
        off = np.zeros(len(labels) + 1, dtype=np.int64)
        np.cumsum([len(s) for s in labels], out=off[1:])
        ids = np.searchsorted(np.asarray(feat.edges), x, side="right").astype(np.int64)
        return TokenTable(ptr, ids, prefix, buf, off)
    values = np.sign(x) * np.log1p(np.abs(x)) if feat.transform == "log1p" else x
    name = prefix[:-1]
    return TokenTable(ptr, np.zeros(x.size, dtype=np.int64), name, _EMPTY_BYTES,
                   np.zeros(2, dtype=np.int64), values=values)


def _cross(a: TokenTable, b: TokenTable) -> TokenTable:
    """The cross of two token tables: a table of the distinct pairs' tokens ``token(a) 0x1E token(b)``,
    in order of first appearance, each built and hashed once per chunk (a chunk of 32,768 rows of
    two dictionary columns holds a few thousand distinct pairs)."""
    b_tokens = b.off.shape[0] - 1
    ptr, keys = cross_pairs(a.ptr, a.ids, b.ptr, b.ids, b_tokens)
    encoded = pc.dictionary_encode(index_array(keys))
    a_ids, b_ids = np.divmod(values_of(encoded.dictionary), max(b_tokens, 1))
    buf, off = cross_tokens(a_ids, a.prefix, a.buf, a.off, b_ids, b.prefix, b.buf, b.off)
    return TokenTable(ptr, values_of(encoded.indices).astype(np.int64), _EMPTY_BYTES, buf, off)


class Featurizer:
    """Hashes the spec's features of a chunk of rows into CSR (``trainer.hashing`` contract).

    Observers attached with :meth:`watch` are shown every chunk's hashed token tables.

    Parameters
    ----------
    spec : Spec
        The feature spec: features, crosses, hash bits and seed.

    References
    ----------
    MurmurHash3 x86 32-bit: "MurmurHash3", SMHasher project, 2011. Feature hashing: "Feature Hashing
    for Large Scale Multitask Learning", ICML, 2009.
    """

    def __init__(self, spec: Spec):
        self.spec = spec
        self.observers: list = []
        self._last_dictionary: dict[str, tuple[pa.Array, np.ndarray]] = {}
        self.seed = np.uint32(spec.seed)
        self.mask = np.uint32(spec.n_buckets - 1)
        # writable like the crosses' empty prefix: numba compiles (and loads from its cache) one
        # specialization per array type, and a read-only array is another type
        self.prefixes = {f.column: np.array(bytearray(f.column.encode("utf-8") + b"\x1f"), dtype=np.uint8)
                         for f in spec.features}

    def value_buckets(self) -> dict[str, int]:
        """The bucket of each numeric feature without edges, whose one token is its column name and
        whose entry is the (transformed) value itself.

        Returns
        -------
        dict of str to int
            Column name to bucket, by the hashing contract.
        """
        return {f.column: int(hash_bytes(self.prefixes[f.column][:-1].tobytes(), int(self.seed)) & int(self.mask))
                for f in self.spec.features if f.kind == "numeric" and f.edges is None}

    def watch(self, observer) -> None:
        """Show an observer every chunk hashed from now on.

        Parameters
        ----------
        observer : object
            Has ``observe(tables, n_rows)``, called with each chunk's token tables
            (:class:`TokenTable`, their ``buckets`` set) and its row count.
        """
        self.observers.append(observer)

    def _feature_tokens(self, feat: Feature, arr: pa.Array, where: str) -> TokenTable:
        prefix = self.prefixes[feat.column]
        if feat.kind == "categorical":
            if pa.types.is_list(arr.type) or pa.types.is_large_list(arr.type):
                raise UserError(f"{where} is a list column; declare it as kind 'multi'")
            return _categorical_tokens(arr, prefix, where)
        if feat.kind == "multi":
            return _multi_tokens(arr, prefix, where)
        return _numeric_tokens(arr, feat, prefix, where)

    def _hash(self, tok: TokenTable, column: str | None) -> np.ndarray:
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
        """Hash a chunk of rows into CSR, by the hashing contract (MurmurHash3 x86 32-bit).

        Row r holds the features in spec order, then the crosses.

        Parameters
        ----------
        table : pyarrow.Table or pyarrow.RecordBatch
            The rows, with the spec's feature columns.
        source : str
            The file, named in error messages.

        Returns
        -------
        tuple of numpy.ndarray
            ``(indptr int64, indices int32, data float64)``.

        Raises
        ------
        UserError
            For a column of the wrong type (a list column not declared 'multi' included), NaN or
            infinite numerics, or dictionary codes outside their dictionary.
        """
        n = table.num_rows
        toks: dict[str, TokenTable] = {}
        for feat in self.spec.features:
            col = table.column(feat.column)
            arr = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
            toks[feat.column] = self._feature_tokens(feat, arr, f"{source}: column '{feat.column}'")
        parts = [toks[f.column] for f in self.spec.features]
        names = [f.column for f in self.spec.features] + [None] * len(self.spec.crosses)
        for cross in self.spec.crosses:
            acc = toks[cross[0]]
            for name in cross[1:]:
                acc = _cross(acc, toks[name])
            parts.append(acc)
        indptr = np.zeros(n + 1, dtype=np.int64)
        for t in parts:  # a row's entries before row r: those of every table
            indptr += t.ptr
        indices = np.empty(indptr[-1], dtype=np.int32)
        data = np.ones(indptr[-1], dtype=np.float64)  # one-hot entries; scatter_rows writes the other values
        cursor = indptr[:-1].copy()
        empty = np.zeros(0, dtype=np.float64)
        for name, t in zip(names, parts):
            scatter_rows(t.ptr, t.ids, self._hash(t, name), empty if t.values is None else t.values,
                         cursor, indices, data)
        for observer in self.observers:
            observer.observe(parts, n)
        return indptr, indices, data


def parse_labels(arr: pa.Array, spec: Spec, where: str) -> tuple[np.ndarray, np.ndarray]:
    """Parse a label column.

    Parameters
    ----------
    arr : pyarrow.Array
        The labels: booleans, numbers 0/1 or -1/1, or strings (dictionary-encoded or not).
    spec : Spec
        The spec, whose ``label.positive`` and ``label.negative`` classify strings.
    where : str
        The file and column, named in the error.

    Returns
    -------
    tuple of numpy.ndarray
        ``(y, ok)``: float64 labels in {0, 1}, and a mask that is False for nulls and values outside the
        accepted set.

    Raises
    ------
    UserError
        For strings without ``label.positive`` in the spec, or a column of another type.
    """
    t = arr.type
    if pa.types.is_dictionary(t):
        arr = arr.cast(t.value_type)
        t = arr.type
    valid = valid_mask(arr)
    if pa.types.is_boolean(t):
        return (values_of(arr) & valid).astype(np.float64), valid
    if pa.types.is_integer(t) or pa.types.is_floating(t):
        x = values_of(pc.cast(arr, pa.float64()))
        ok = valid & ((x == 0) | (x == 1) | (x == -1))
        return ((x == 1) & valid).astype(np.float64), ok
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        if spec.positive is None:
            raise UserError(f"{where} holds strings; list the positive values in spec key 'label.positive'")
        y = values_of(pc.is_in(arr, value_set=pa.array(spec.positive)))  # is_in gives no nulls
        ok = valid
        if spec.negative is not None:
            ok = valid & values_of(pc.is_in(arr, value_set=pa.array(spec.positive + spec.negative)))
        return y.astype(np.float64), ok
    raise UserError(f"{where} is {t}; labels must be 0/1, -1/1, booleans or strings")


def accepted_labels(spec: Spec) -> str:
    """The label values a spec accepts, for messages.

    Parameters
    ----------
    spec : Spec
        The spec.

    Returns
    -------
    str
        E.g. ``"0/1, -1/1 or true/false"``, or the positive and negative strings.
    """
    if spec.positive is None:
        return "0/1, -1/1 or true/false"
    neg = ", ".join(spec.negative) if spec.negative else "any other string"
    return f"positive {', '.join(spec.positive)}; negative {neg}"


def parse_weights(arr: pa.Array, where: str) -> np.ndarray:
    """Parse a row weight column.

    Parameters
    ----------
    arr : pyarrow.Array
        The weights (integers or floats).
    where : str
        The file and column, named in the error.

    Returns
    -------
    numpy.ndarray
        float64 weights.

    Raises
    ------
    UserError
        For a column that is not numeric, or any null, non-finite or non-positive weight.
    """
    if not (pa.types.is_integer(arr.type) or pa.types.is_floating(arr.type)):
        raise UserError(f"{where} is {arr.type}; row weights must be numbers")
    w = values_of(pc.cast(arr, pa.float64()))
    bad = ~(np.isfinite(w) & (w > 0)) | ~valid_mask(arr)
    if bad.any():
        raise UserError(f"{where} has {int(bad.sum())} null, non-finite or non-positive row weights "
                        f"(e.g. {arr[int(np.flatnonzero(bad)[0])]}); weights must be finite and > 0")
    return w
