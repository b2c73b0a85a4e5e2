"""The reader's Arrow buffer reads (trainer.reader.buffers) against pyarrow's own conversions, on
sliced arrays with nulls (offsets that do not fall on a byte of the bitmaps)."""

import datetime as dt

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

from trainer.reader.buffers import index_array, valid_mask, values_of


def _with_nulls(rng, n, make):
    return [None if rng.random() < 0.3 else make() for _ in range(n)]


@pytest.mark.parametrize("offset", [0, 1, 7, 8, 13])
def test_valid_mask_and_values_match_pyarrow(offset):
    # reference: pyarrow's Array.is_valid and Array.to_pylist of the same slices
    rng = np.random.default_rng(offset)
    arrays = [pa.array(_with_nulls(rng, 300, lambda: bool(rng.random() < 0.5)), pa.bool_()),
              pa.array(_with_nulls(rng, 300, lambda: int(rng.integers(-9, 9))), pa.int16()),
              pa.array(_with_nulls(rng, 300, lambda: int(rng.integers(0, 9))), pa.uint8()),
              pa.array(_with_nulls(rng, 300, lambda: float(rng.normal())), pa.float32()),
              pa.array(_with_nulls(rng, 300, lambda: dt.date(2026, 1, 1) + dt.timedelta(int(rng.integers(0, 99)))),
                       pa.date32())]
    for full in arrays:
        arr = full.slice(offset, 250)
        valid = valid_mask(arr)
        assert np.array_equal(valid, arr.is_valid().to_numpy(zero_copy_only=False))
        expected = arr.to_pylist()
        got = values_of(arr)
        if pa.types.is_date32(arr.type):  # date32 reads as days since 1970-01-01
            expected = [None if d is None else (d - dt.date(1970, 1, 1)).days for d in expected]
        assert [g for g, v in zip(got.tolist(), valid) if v] == [e for e in expected if e is not None]
    codes = pc.dictionary_encode(arrays[1]).slice(offset, 250)  # dictionary codes: the indices' values
    valid = valid_mask(codes)
    assert np.array_equal(valid, codes.is_valid().to_numpy(zero_copy_only=False))
    assert values_of(codes.indices)[valid].tolist() == [c for c in codes.indices.to_pylist() if c is not None]


def test_all_null_and_null_typed_arrays():
    # reference: pyarrow's Array.is_valid (an array of type null has no bitmap at all)
    for arr in (pa.nulls(5), pa.nulls(5, pa.string()), pa.array([None, None], pa.int64())):
        assert np.array_equal(valid_mask(arr), arr.is_valid().to_numpy(zero_copy_only=False))
    assert valid_mask(pa.array([], pa.string())).shape == (0,)
    assert values_of(pa.Array.from_buffers(pa.int64(), 0, [None, None])).shape == (0,)  # no buffers at all


def test_index_array_takes_like_a_pyarrow_array():
    # reference: Table.take with the indices as pa.array
    table = pa.table({"x": pa.array(range(10)), "s": pa.array(list("abcdefghij"))})
    rows = np.array([9, 0, 3, 3], dtype=np.int64)
    assert table.take(index_array(rows)).equals(table.take(pa.array(rows)))
