"""``digest.total_bytes`` (the byte counts a ``DigestingIterator`` keeps) equals the sum of the
elements' lengths, counted one by one in Python, for binary and large_binary arrays, sliced or
not, with nulls (whose slots may hold bytes: Arrow's columnar format allows it) and without."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from migrate.digest import DigestingIterator, total_bytes


def _reference(arr: pa.Array) -> int:
    return sum(len(x) for x in arr.to_pylist() if x is not None)


@settings(max_examples=200, deadline=None)
@given(
    values=st.lists(st.one_of(st.none(), st.binary(max_size=40)), max_size=60),
    large=st.booleans(),
    start=st.integers(0, 60),
    length=st.integers(0, 60),
)
def test_equals_the_sum_of_lengths(values, large, start, length):
    arr = pa.array(values, type=pa.large_binary() if large else pa.binary())
    for a in (arr, arr.slice(min(start, len(arr)), length)):
        assert total_bytes(a) == _reference(a)


def test_a_null_whose_slot_holds_bytes_counts_zero():
    # three elements: b"ab", null over the 5 bytes "cdefg", b"h" (validity bits 0b101)
    offsets = pa.py_buffer(np.array([0, 2, 7, 8], dtype=np.int32).tobytes())
    arr = pa.Array.from_buffers(pa.binary(), 3, [pa.py_buffer(bytes([0b101])), offsets, pa.py_buffer(b"abcdefgh")])
    arr.validate(full=True)
    assert total_bytes(arr) == 3 == _reference(arr)
    assert total_bytes(arr.slice(1)) == 1


def test_other_types_count_their_bytes_too():
    arr = pa.array(["é", "ab", None])  # utf8: not a plain binary array, Arrow counts it
    assert total_bytes(arr) == 4


def test_the_iterator_counts_keys_and_values_apart():
    keys = pa.array([b"k1", b"key2", b""], type=pa.binary())
    values = pa.array([b"v" * 10, b"", b"xyz"], type=pa.large_binary())
    batch = pa.RecordBatch.from_arrays([keys, values], names=["key", "value"])
    it = DigestingIterator([batch, batch.slice(1)])
    assert list(it) and it.key_bytes == 6 + 4 and it.value_bytes == 13 + 3


def test_arrow_refuses_the_offsets_the_count_relies_on():
    # total_bytes reads the first and last offsets as they are; Arrow refuses, when an array is
    # built, offsets too few for its length or a first offset beyond the last
    short = pa.py_buffer(np.array([0, 2], dtype=np.int32).tobytes())
    with pytest.raises(pa.ArrowInvalid):
        pa.Array.from_buffers(pa.binary(), 3, [None, short, pa.py_buffer(b"abcd")])
    backwards = pa.py_buffer(np.array([5, 2], dtype=np.int32).tobytes())
    with pytest.raises(pa.ArrowInvalid):
        pa.Array.from_buffers(pa.binary(), 1, [None, backwards, pa.py_buffer(b"abcdefgh")])
