"""The compiled framing of heap-map records (``_framing.frame_records``, called by
``hdfs._frame_batch``) writes the same bytes as the numpy reference (``hdfs._frame_batch_py``),
and the compiled walk and gather read them back to the same rows.

Inputs: hypothesis batches (empty keys and values, zero bytes, long values), sliced batches, keys
and values of ``binary`` and ``large_binary`` in every combination, batches from the engine-written
heap-map files under ``tests/fixtures``, and buffers that describe no array (refused with
ValueError before anything is written). The record layout itself (int32 big-endian lengths) is
checked against ``struct`` from the standard library, independently of both implementations.

Outside CI a missing extension skips these tests; under ``CI=true`` it fails them (as in
test_hdfs_framing_compiled.py).
"""

from __future__ import annotations

import mmap
import struct
import sys
from pathlib import Path
from types import ModuleType

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from compiled_extensions import load
from migrate.codecs import codec_of_stream
from migrate.providers import hdfs
from migrate.providers.base import ROW_SCHEMA
from migrate.providers.hdfs import _frame_batch, _frame_batch_py, frame_records, record_arrays

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures"


@pytest.fixture(scope="module")
def framing() -> ModuleType:
    return load("migrate.providers._framing", "the compiled framing")


def _batch(rows: list[tuple[bytes, bytes]], key_type: pa.DataType = pa.binary(), value_type: pa.DataType = pa.binary()) -> pa.RecordBatch:
    return pa.RecordBatch.from_arrays(
        [pa.array([k for k, _ in rows], key_type), pa.array([v for _, v in rows], value_type)], names=["key", "value"]
    )


def _by_struct(rows: list[tuple[bytes, bytes]]) -> bytes:
    """The records as the layout says: int32 big-endian length, bytes, for the key then the value."""
    return b"".join(struct.pack(">i", len(k)) + k + struct.pack(">i", len(v)) + v for k, v in rows)


def assert_frames_agree(batch: pa.RecordBatch, rows: list[tuple[bytes, bytes]]) -> None:
    ours = _frame_batch(batch)
    assert ours == _by_struct(rows)
    if batch.num_rows:  # the reference is never called with an empty batch (frame_records skips those)
        assert ours == _frame_batch_py(batch)
    data = ours + struct.pack(">i", -1)
    keys, values, removed = record_arrays(data, "f", False)
    assert list(zip(keys.to_pylist(), values.to_pylist())) == rows and not removed.any()


_rows = st.lists(st.tuples(st.binary(max_size=24), st.one_of(st.binary(max_size=24), st.binary(min_size=200, max_size=600))), max_size=60)
_types = st.sampled_from([pa.binary(), pa.large_binary()])


@settings(max_examples=300, deadline=None)
@given(rows=_rows, key_type=_types, value_type=_types)
def test_compiled_framing_matches_the_reference(framing: ModuleType, rows, key_type, value_type) -> None:
    assert hdfs._framing is framing
    assert_frames_agree(_batch(rows, key_type, value_type), rows)


@settings(max_examples=100, deadline=None)
@given(rows=_rows, cut=st.data())
def test_sliced_batches_frame_their_own_rows(framing: ModuleType, rows, cut) -> None:
    start = cut.draw(st.integers(0, len(rows)))
    stop = cut.draw(st.integers(start, len(rows)))
    assert_frames_agree(_batch(rows).slice(start, stop - start), rows[start:stop])


def test_engine_written_files_frame_back_to_themselves(framing: ModuleType) -> None:
    """A snapshot the engine wrote, walked into arrays and framed again, gives its own bytes."""
    checked = 0
    for path in sorted(FIXTURES.rglob("*.snapshot")):
        raw = path.read_bytes()
        data = codec_of_stream(raw, str(path)).decompress(raw, str(path))
        keys, values, removed = record_arrays(data, str(path), False)
        batch = pa.RecordBatch.from_arrays([keys, values], schema=ROW_SCHEMA)
        assert frame_records([batch]) == data
        checked += 1
    assert checked > 0


def _args(keys: pa.Array, values: pa.Array) -> list:
    out = []
    for arr in (keys, values):
        _, offsets, data = arr.buffers()
        out += [offsets, data, arr.offset, pa.types.is_large_binary(arr.type)]
    return out


@pytest.mark.parametrize(
    ("key_offsets", "count", "message"),
    [
        ([0, 3, 1], 2, "key offsets are not those of a binary array"),  # decreasing
        ([-1, 2], 1, "key offsets are not those of a binary array"),  # negative
        ([0, 2, 9], 2, "key offsets are not those of a binary array"),  # past the data
        ([0, 2], 2, "key offsets buffer is shorter"),
        ([0, 2], -1, "count must not be negative"),
    ],
)
def test_offsets_that_describe_no_array_are_refused(framing: ModuleType, key_offsets, count, message) -> None:
    values = pa.array([b"x", b"y"], pa.binary())
    _, voffsets, vdata = values.buffers()
    with pytest.raises(ValueError, match=message):
        framing.frame_records(np.array(key_offsets, np.int32).tobytes(), b"abcd", 0, False, voffsets, vdata, 0, False, count)
    with pytest.raises(ValueError, match="value offset must not be negative"):
        framing.frame_records(np.array([0, 1, 2], np.int32).tobytes(), b"ab", 0, False, voffsets, vdata, -1, False, 2)
    for offset, huge in ((2**62, 2**62), (0, 2**63 - 1)):  # offset + count would overflow int64
        with pytest.raises(ValueError, match="key offsets buffer is shorter"):
            framing.frame_records(np.array([0, 1, 2], np.int32).tobytes(), b"ab", offset, False, voffsets, vdata, 0, False, huge)


def test_an_element_of_2_gib_is_refused_without_touching_it(framing: ModuleType) -> None:
    """A record's lengths are int32: an element of 2**31 bytes cannot be framed. The data is an
    anonymous mapping that is never touched (mmap(2) on Linux: pages get memory when first
    touched), so this needs no 2 GiB of memory."""
    if sys.maxsize < 2**32:
        pytest.skip("a 32-bit Python cannot address a buffer of 2 GiB")
    size = 2**31
    try:
        buf = mmap.mmap(-1, size)
    except (OSError, OverflowError, MemoryError) as exc:
        pytest.skip(f"cannot map {size} bytes here: {exc}")
    with buf:
        values = pa.array([b"v"], pa.binary())
        _, voffsets, vdata = values.buffers()
        with pytest.raises(ValueError, match="shorter than 2\\*\\*31"):
            framing.frame_records(np.array([0, size], np.int64).tobytes(), buf, 0, True, voffsets, vdata, 0, False, 1)


def test_without_the_extension_or_with_nulls_the_reference_frames(monkeypatch: pytest.MonkeyPatch) -> None:
    rows = [(b"k", b"v"), (b"", b""), (b"key" * 9, b"\x00" * 70)]
    monkeypatch.setattr(hdfs, "_framing", None)
    assert _frame_batch(_batch(rows)) == _by_struct(rows)
    monkeypatch.undo()
    calls = []
    monkeypatch.setattr(hdfs, "_frame_batch_py", lambda batch: calls.append(batch) or b"")
    with_null = pa.RecordBatch.from_arrays([pa.array([b"k", None]), pa.array([b"v", b"w"])], names=["key", "value"])
    _frame_batch(with_null)
    assert calls == [with_null]  # nulls go to the reference, which frames as before
