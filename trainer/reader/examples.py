"""Readable token values per bucket, for reports: an observer of the featurizer that training attaches
(:meth:`trainer.reader.featurize.Featurizer.watch`) and saves with its checkpoint."""

from __future__ import annotations

from itertools import compress

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numba import njit

from trainer.reader.featurize import TokenTable

_FNV_OFFSET = np.uint64(14695981039346656037)
_FNV_PRIME = np.uint64(1099511628211)


@njit(cache=True, nogil=True)
def fingerprints(prefix, buf, off, ids):
    """64-bit FNV-1a hash of each token ``prefix + buf[off[k]:off[k + 1]]``, k in ``ids``
    ("FNV-1a", IETF draft-eastlake-fnv, from memory: offset basis 14695981039346656037, prime
    1099511628211), for telling a token seen before from a new one without decoding its text."""
    out = np.empty(ids.shape[0], dtype=np.uint64)
    start = _FNV_OFFSET
    for c in prefix:
        start = (start ^ np.uint64(c)) * _FNV_PRIME
    for i in range(ids.shape[0]):
        h = start
        for p in range(off[ids[i]], off[ids[i] + 1]):
            h = (h ^ np.uint64(buf[p])) * _FNV_PRIME
        out[i] = h
    return out


@njit(cache=True, nogil=True)
def _probe(table, keys, insert):
    """Look ``keys`` up in an open-addressing hash set ``table`` (linear probing, size a power of two,
    0 = empty; a key of 0 is taken as 1); with ``insert``, add the keys not found. Returns
    whether each key was there before."""
    mask = np.uint64(table.shape[0] - 1)
    found = np.zeros(keys.shape[0], dtype=np.bool_)
    for i in range(keys.shape[0]):
        key = max(keys[i], np.uint64(1))
        at = (key * np.uint64(0x9E3779B97F4A7C15)) >> np.uint64(40) & mask
        while table[at] != 0 and table[at] != key:
            at = (at + np.uint64(1)) & mask
        if table[at] == key:
            found[i] = True
        elif insert:
            table[at] = key
    return found


class BucketExamples:
    """A few readable token values per bucket, for reports.

    Kept from the first ``max_rows`` rows hashed, so reports can say which field values a weight came
    from: at most ``per_bucket`` values per bucket and ``max_values`` in all (frequent values come first,
    as they fill the first chunks).

    Parameters
    ----------
    n_buckets : int
        The model's 2^bits buckets.
    per_bucket : int, default 2
        Values kept per bucket.
    max_rows : int, default 131072
        Rows observed before recording stops.
    values : dict of str to list of str, optional
        Values recorded before (from a checkpoint), keyed by bucket number as a string.
    max_values : int, default 100000
        Values kept in all.

    Attributes
    ----------
    values : dict of str to list of str
        The recorded values, keyed by bucket number as a string.

    Notes
    -----
    A token met again in a later chunk (or pass) is the common case; it is recognized by the
    :func:`fingerprints` of the tokens recorded in this process (a hash set of at least 2 x
    ``max_values`` slots) without decoding its text. A token whose fingerprint is new is decoded and
    compared with its bucket's texts, so the values are those of comparing every text, unless a new
    token shares its 64-bit fingerprint with a recorded one (then it is skipped): with 100,000 values
    and a million lookups, about 5e-9 a run.
    """

    def __init__(self, n_buckets: int, per_bucket: int = 2, max_rows: int = 131_072,
                 values: dict[str, list[str]] | None = None, max_values: int = 100_000):
        self.per_bucket, self.rows_left, self.max_values = per_bucket, max_rows, max_values
        self.total = 0
        self.values: dict[str, list[str]] = values or {}
        self.count = np.zeros(n_buckets, dtype=np.uint8)
        self._seen = np.zeros(1 << max(int(2 * max_values - 1).bit_length(), 4), dtype=np.uint64)
        for b, v in self.values.items():
            self.count[int(b)] = len(v)
            self.total += len(v)

    def observe(self, tables: list[TokenTable], n_rows: int) -> None:
        """Record values from one hashed chunk (the featurizer's observer protocol).

        Parameters
        ----------
        tables : list of TokenTable
            The chunk's token tables, their ``buckets`` set.
        n_rows : int
            The chunk's rows; nothing is recorded once ``max_rows`` rows were seen.
        """
        if self.rows_left <= 0:
            return
        for tok in tables:
            self.add(tok, tok.buckets)
        self.rows_left -= n_rows

    def add(self, tok: TokenTable, buckets: np.ndarray) -> None:
        """Record values of the tokens of one token table whose buckets have room.

        Parameters
        ----------
        tok : TokenTable
            The token table; only the tokens its rows use (``tok.ids``) count.
        buckets : numpy.ndarray
            Bucket of each token of ``tok``.
        """
        used = np.zeros(tok.off.shape[0] - 1, dtype=bool)
        used[tok.ids] = True
        ids = np.flatnonzero(used)
        b = buckets[ids]
        room = self.count[b] < self.per_bucket
        ids, b = ids[room], b[room]
        _, first = np.unique(b, return_index=True)
        first = first[: max(self.max_values - self.total, 0)]
        ids, b = ids[first], b[first]
        prints = fingerprints(tok.prefix, tok.buf, tok.off, ids)
        fresh = ~_probe(self._seen, prints, False)
        ids, b, prints = ids[fresh], b[fresh], prints[fresh]
        if ids.shape[0] == 0:
            return
        texts = _token_texts(tok, ids)
        keys = list(map(str, b.tolist()))
        kept = self.count[b] == 0
        self.values.update(zip(compress(keys, kept), ([t] for t in compress(texts, kept))))
        for i in np.flatnonzero(~kept).tolist():
            seen = self.values[keys[i]]
            if texts[i] not in seen:
                seen.append(texts[i])
                kept[i] = True
        self.count[b[kept]] += 1
        self.total += int(kept.sum())
        _probe(self._seen, prints[kept], True)


def _readable(text: str) -> str:
    """A token as reports show it: field = value, crossed parts joined by ' & '."""
    return text.replace("\x1f", "=").replace("\x1e", " & ")


def _token_texts(tok: TokenTable, ids: np.ndarray) -> list[str]:
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
