"""The reader's numba kernels: scattering token buckets into CSR rows, gathering CSR rows, and the
per-row uniform numbers of negative sampling."""

from __future__ import annotations

import numba as nb
import numpy as np


@nb.njit(cache=True)
def scatter_rows(ptr, ids, buckets, values, cursor, out_idx, out_val):
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
def take_rows(indptr, indices, data, rows):
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
def keep_uniform(file_idx, raw, seed, pass_index):
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
