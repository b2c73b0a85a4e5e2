"""The reader's numba kernels: scattering token buckets into CSR rows, gathering CSR rows, and the
per-row uniform numbers of negative sampling."""

from __future__ import annotations

import numba as nb
import numpy as np


@nb.njit(cache=True, nogil=True)
def scatter_rows(ptr, ids, buckets, values, cursor, out_idx, out_val):
    """Append each row's entries (bucket, value) at that row's cursor in the output CSR.

    A table without values (one-hot entries) writes buckets only: ``out_val`` is made all 1.0 once,
    so each table's pass writes 4 bytes per entry instead of 12 (the passes stride through the
    whole chunk's output, one entry per row each).

    Parameters
    ----------
    ptr : numpy.ndarray
        int64 row offsets into ``ids`` (a :class:`~trainer.reader.featurize.TokenTable`'s ``ptr``).
    ids : numpy.ndarray
        Token ids of the entries.
    buckets : numpy.ndarray
        Bucket of each token id.
    values : numpy.ndarray
        float64 value per entry, or an empty array for entries of value 1.0 (left as ``out_val`` holds them).
    cursor : numpy.ndarray
        int64 next free slot of each row in the output; advanced in place.
    out_idx, out_val : numpy.ndarray
        The output CSR's int32 indices and float64 data, written in place.
    """
    has_values = values.size > 0
    for r in range(ptr.size - 1):
        c = cursor[r]
        for p in range(ptr[r], ptr[r + 1]):
            out_idx[c] = buckets[ids[p]]
            if has_values:
                out_val[c] = values[p]
            c += 1
        cursor[r] = c


@nb.njit(cache=True)
def take_rows(indptr, indices, data, rows):
    """Gather CSR rows into a new CSR.

    Parameters
    ----------
    indptr, indices, data : numpy.ndarray
        The CSR (int64 offsets, int32 buckets, float64 values).
    rows : numpy.ndarray
        int64 numbers of the rows to take, in the order wanted (repeats allowed).

    Returns
    -------
    tuple of numpy.ndarray
        ``(indptr int64, indices int32, data float64)`` of the taken rows.
    """
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
def keep_uniform(file_idx, raw, seed, pass_index):
    """A uniform number in [0, 1) per row from (seed, pass, file, row).

    The same row always draws the same number, however the log is chunked or resumed.

    Parameters
    ----------
    file_idx : int
        The file's number in the input.
    raw : numpy.ndarray
        int64 row numbers within the file.
    seed, pass_index : int
        The run's seed and the pass.

    Returns
    -------
    numpy.ndarray
        float64 numbers in [0, 1), one per row of ``raw``.

    References
    ----------
    The SplitMix64 finalizer: "Fast Splittable Pseudorandom Number Generators", OOPSLA, 2014.
    """
    out = np.empty(raw.size, dtype=np.float64)
    for i in range(raw.size):
        z = (np.uint64(seed) * np.uint64(0x9E3779B97F4A7C15) + np.uint64(pass_index) * np.uint64(0xBF58476D1CE4E5B9)
             + np.uint64(file_idx) * np.uint64(0x94D049BB133111EB) + np.uint64(raw[i]))
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
        z = z ^ (z >> np.uint64(31))
        out[i] = np.float64(z >> np.uint64(11)) * (1.0 / 9007199254740992.0)
    return out
