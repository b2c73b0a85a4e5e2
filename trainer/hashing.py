"""MurmurHash3 x86 32-bit in numba, token building and bucket mapping.

MurmurHash3 is a public-domain hash ("MurmurHash3", SMHasher project, 2011); this is
the x86 32-bit variant, byte-for-byte equal to the reference ``MurmurHash3_x86_32``. Tokens follow the
hashing contract in README.md: ``utf8(column) 0x1F utf8(value)`` for categorical values,
``token(a) 0x1E token(b)`` for crosses; bucket = hash mod 2^bits.
"""

from __future__ import annotations

import numba as nb
import numpy as np

FIELD_SEP = 0x1F
CROSS_SEP = 0x1E

@nb.njit(cache=True, inline="always")
def _rotl(x, r):
    return np.uint32((x << np.uint32(r)) | (x >> np.uint32(32 - r)))


@nb.njit(cache=True)
def murmur3_32(buf, start, end, seed):
    """MurmurHash3_x86_32 of a slice of bytes.

    Parameters
    ----------
    buf : numpy.ndarray
        uint8 bytes.
    start, end : int
        The slice ``buf[start:end]`` hashed.
    seed : numpy.uint32
        The seed.

    Returns
    -------
    numpy.uint32
        The hash.

    References
    ----------
    "MurmurHash3", SMHasher project, 2011 (the reference ``MurmurHash3_x86_32``).
    """
    h = np.uint32(seed)
    n = end - start
    nblocks = n // 4
    c1 = np.uint32(0xCC9E2D51)
    c2 = np.uint32(0x1B873593)
    for i in range(nblocks):
        p = start + 4 * i
        k = (np.uint32(buf[p]) | (np.uint32(buf[p + 1]) << np.uint32(8))
             | (np.uint32(buf[p + 2]) << np.uint32(16)) | (np.uint32(buf[p + 3]) << np.uint32(24)))
        k = np.uint32(k * c1)
        k = _rotl(k, 15)
        k = np.uint32(k * c2)
        h = np.uint32(h ^ k)
        h = _rotl(h, 13)
        h = np.uint32(h * np.uint32(5) + np.uint32(0xE6546B64))
    tail = start + 4 * nblocks
    rem = n & 3
    k = np.uint32(0)
    if rem == 3:
        k = np.uint32(k ^ (np.uint32(buf[tail + 2]) << np.uint32(16)))
    if rem >= 2:
        k = np.uint32(k ^ (np.uint32(buf[tail + 1]) << np.uint32(8)))
    if rem >= 1:
        k = np.uint32(k ^ np.uint32(buf[tail]))
        k = np.uint32(k * c1)
        k = _rotl(k, 15)
        k = np.uint32(k * c2)
        h = np.uint32(h ^ k)
    h = np.uint32(h ^ np.uint32(n))
    h = np.uint32(h ^ (h >> np.uint32(16)))
    h = np.uint32(h * np.uint32(0x85EBCA6B))
    h = np.uint32(h ^ (h >> np.uint32(13)))
    h = np.uint32(h * np.uint32(0xC2B2AE35))
    h = np.uint32(h ^ (h >> np.uint32(16)))
    return h


def hash_bytes(data: bytes, seed: int = 0) -> int:
    """MurmurHash3_x86_32 of a byte string.

    Parameters
    ----------
    data : bytes
        The bytes.
    seed : int, default 0
        The seed, 0..2^32-1.

    Returns
    -------
    int
        The hash as a Python int.

    References
    ----------
    "MurmurHash3", SMHasher project, 2011.
    """
    buf = np.frombuffer(bytes(data), dtype=np.uint8)
    return int(murmur3_32(buf, 0, buf.size, np.uint32(seed)))


@nb.njit(cache=True)
def hash_tokens(prefix, buf, offsets, seed, mask):
    """Bucket of every token ``prefix + buf[offsets[i]:offsets[i+1]]``.

    One scratch buffer, no per-token allocation.

    Parameters
    ----------
    prefix : numpy.ndarray
        uint8 bytes every token starts with.
    buf : numpy.ndarray
        uint8 bytes of the tokens' values.
    offsets : numpy.ndarray
        int64 (n + 1) offsets of each token in ``buf``.
    seed : numpy.uint32
        The hash seed.
    mask : numpy.uint32
        2^bits - 1.

    Returns
    -------
    numpy.ndarray
        int32 buckets (n,): the MurmurHash3_x86_32 of each token, masked.

    References
    ----------
    "MurmurHash3", SMHasher project, 2011. "Feature Hashing for Large Scale Multitask Learning", ICML,
    2009.
    """
    n = offsets.size - 1
    plen = prefix.size
    longest = 0
    for i in range(n):
        longest = max(longest, offsets[i + 1] - offsets[i])
    scratch = np.empty(plen + longest, dtype=np.uint8)
    scratch[:plen] = prefix
    out = np.empty(n, dtype=np.int32)
    for i in range(n):
        a = offsets[i]
        m = offsets[i + 1] - a
        for j in range(m):
            scratch[plen + j] = buf[a + j]
        out[i] = np.int32(murmur3_32(scratch, 0, plen + m, seed) & mask)
    return out


@nb.njit(cache=True, nogil=True)
def cross_pairs(a_ptr, a_ids, b_ptr, b_ids, b_tokens):
    """Join two token streams row by row into the pairs of a cross, each as the key ``a * b_tokens + b``.

    Each side is a row structure (``ptr`` int64 n + 1 over ``ids`` int64) into its own token table;
    the table of the second side holds ``b_tokens`` tokens, so a key names one (a-token, b-token) pair.

    Parameters
    ----------
    a_ptr, a_ids : numpy.ndarray
        The first side's rows.
    b_ptr, b_ids : numpy.ndarray
        The second side's.
    b_tokens : int
        Tokens in the second side's token table.

    Returns
    -------
    tuple of numpy.ndarray
        ``(ptr, keys)``: for row r the Cartesian product of its a-tokens and b-tokens, in a-major order,
        ``keys[ptr[r]:ptr[r+1]]`` (int64).
    """
    n = a_ptr.size - 1
    ptr = np.zeros(n + 1, dtype=np.int64)
    for r in range(n):
        ptr[r + 1] = ptr[r] + (a_ptr[r + 1] - a_ptr[r]) * (b_ptr[r + 1] - b_ptr[r])
    keys = np.empty(ptr[n], dtype=np.int64)
    t = 0
    for r in range(n):
        for p in range(a_ptr[r], a_ptr[r + 1]):
            base = a_ids[p] * b_tokens
            for q in range(b_ptr[r], b_ptr[r + 1]):
                keys[t] = base + b_ids[q]
                t += 1
    return ptr, keys


@nb.njit(cache=True, nogil=True)
def cross_tokens(a_ids, a_prefix, a_buf, a_off, b_ids, b_prefix, b_buf, b_off):
    """The cross tokens ``token(a) 0x1E token(b)`` of pairs of tokens, as a new token table.

    Each side's token k is ``prefix + buf[off[k]:off[k+1]]``; pair i joins token ``a_ids[i]`` of the
    first side's table and token ``b_ids[i]`` of the second's.

    Parameters
    ----------
    a_ids, a_prefix, a_buf, a_off : numpy.ndarray
        The first tokens of the pairs (int64) and the first side's token table.
    b_ids, b_prefix, b_buf, b_off : numpy.ndarray
        The second tokens and the second side's token table.

    Returns
    -------
    tuple of numpy.ndarray
        ``(buf, off)``: token i is ``buf[off[i]:off[i+1]]`` (empty prefix).
    """
    m = a_ids.size
    total_bytes = m * (a_prefix.size + 1 + b_prefix.size)
    for i in range(m):
        total_bytes += a_off[a_ids[i] + 1] - a_off[a_ids[i]] + b_off[b_ids[i] + 1] - b_off[b_ids[i]]
    out = np.empty(total_bytes, dtype=np.uint8)
    off = np.empty(m + 1, dtype=np.int64)
    off[0] = 0
    pos = 0
    for i in range(m):
        ka, kb = a_ids[i], b_ids[i]
        for j in range(a_prefix.size):
            out[pos] = a_prefix[j]
            pos += 1
        for j in range(a_off[ka], a_off[ka + 1]):
            out[pos] = a_buf[j]
            pos += 1
        out[pos] = CROSS_SEP
        pos += 1
        for j in range(b_prefix.size):
            out[pos] = b_prefix[j]
            pos += 1
        for j in range(b_off[kb], b_off[kb + 1]):
            out[pos] = b_buf[j]
            pos += 1
        off[i + 1] = pos
    return out, off
