"""Arrow arrays as numpy arrays read straight from their buffers, and numpy indices as Arrow arrays.

The reader converts through these instead of ``Array.to_numpy``, ``fill_null``, ``pa.array`` or
``pa.scalar``: where pandas is installed, pyarrow imports it on the first of those (about 0.3 s and
30 MB of a run's start-up, measured with ``python -X importtime``), so a training run on a log
without string labels or partition keys among its features never loads pandas (those two still
build small Arrow arrays with ``pa.array``). Reading the buffers is also free of copies. Layouts
follow the "Arrow Columnar Format" specification: validity bitmaps and boolean values are bit-packed,
least significant bit first; fixed-width values are plain little-endian arrays; an array's
``offset`` is counted in elements from the start of its buffers.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa


def _bits(arr: pa.Array, buffer: int) -> np.ndarray:
    """Buffer ``buffer`` of ``arr`` (bit-packed) as one bool per element."""
    first, n = arr.offset, len(arr)
    packed = np.frombuffer(arr.buffers()[buffer], dtype=np.uint8)[first // 8: (first + n + 7) // 8]
    return np.unpackbits(packed, bitorder="little")[first % 8: first % 8 + n].view(bool)


def valid_mask(arr: pa.Array) -> np.ndarray:
    """Which elements are not null.

    Parameters
    ----------
    arr : pyarrow.Array
        Any array (a dictionary array's validity is that of its indices).

    Returns
    -------
    numpy.ndarray
        bool, one per element.
    """
    if arr.null_count == 0:
        return np.ones(len(arr), dtype=bool)
    if arr.null_count == len(arr):  # also an array of type null, which has no bitmap
        return np.zeros(len(arr), dtype=bool)
    return _bits(arr, 0)


def values_of(arr: pa.Array) -> np.ndarray:
    """The values of a boolean or fixed-width numeric array (integers, floats, date32), without copying
    numbers; the value under a null is whatever the buffer holds there, so callers mask nulls out.

    Parameters
    ----------
    arr : pyarrow.Array
        The array (not a dictionary array: pass its ``indices``).

    Returns
    -------
    numpy.ndarray
        bool for a boolean array, else the numpy dtype of the Arrow type (date32: int32 days since
        1970-01-01); read-only when it is a view of Arrow memory.
    """
    t = arr.type
    if pa.types.is_boolean(t):
        dtype = np.dtype(bool)
    else:  # to_pandas_dtype names the numpy type (it imports nothing); date32 is stored as int32 days
        dtype = np.dtype(np.int32 if pa.types.is_date32(t) else t.to_pandas_dtype())
    if len(arr) == 0:  # its buffers may be missing
        return np.zeros(0, dtype=dtype)
    if pa.types.is_boolean(t):
        return _bits(arr, 1)
    return np.frombuffer(arr.buffers()[1], dtype=dtype)[arr.offset: arr.offset + len(arr)]


def index_array(rows: np.ndarray) -> pa.Array:
    """Row numbers as an Arrow int64 array over the same memory (for ``Table.take``).

    Parameters
    ----------
    rows : numpy.ndarray
        int64, C-contiguous.

    Returns
    -------
    pyarrow.Array
        int64, no nulls; it keeps ``rows`` alive.
    """
    rows = np.ascontiguousarray(rows, dtype=np.int64)
    return pa.Array.from_buffers(pa.int64(), rows.size, [None, pa.py_buffer(rows)])
