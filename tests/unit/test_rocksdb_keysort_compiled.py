"""The compiled byte-wise key order (``migrate.providers._keysort``) sorts exactly as RocksDB's
default comparator orders keys.

References outside the extension: Python's ``sorted`` of the keys as ``bytes`` (byte-wise: unsigned
bytes in turn, a prefix first, the same order as RocksDB's BytewiseComparator; common practice) and
Arrow's ``pc.sort_indices`` (the fallback). Inputs: hypothesis lists built to hit the radix sort's
corners (zero bytes, keys that are prefixes of others, long shared prefixes, lengths around the
8-byte steps, repeated keys, groups above and below the 32-key insertion sort, keys over one shared
template with a few varying bytes for the first level), seeded random keys shaped like the engine's
(a RocksDB version byte, UnsafeRow null bits, field offsets, a little-endian long and a string),
sliced arrays, large_binary, unaligned offset buffers, and offsets that do not describe an array
(refused before any sort).

Outside CI a missing extension skips these tests; under ``CI=true`` it fails them (as in
test_hdfs_framing_compiled.py).
"""

from __future__ import annotations

import random
import struct
from types import ModuleType

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from compiled_extensions import REFUSED_ARRAYS, load
from migrate.providers import rocksdb_db
from migrate.providers.rocksdb_db import byte_order


@pytest.fixture(scope="module")
def keysort() -> ModuleType:
    return load("migrate.providers._keysort", "the compiled key sort")


def assert_byte_order(keys: list[bytes], binary: pa.DataType = pa.binary()) -> None:
    arr = pa.array(keys, binary)
    order = byte_order(arr)
    assert pa.types.is_integer(order.type) and len(order) == len(keys)
    assert sorted(order.to_pylist()) == list(range(len(keys)))  # a permutation
    assert arr.take(order).to_pylist() == sorted(keys)  # Python's bytes order (byte-wise)
    assert arr.take(order).equals(arr.take(pc.sort_indices(arr)))  # Arrow's sort


def test_extension_is_built_and_used(keysort: ModuleType) -> None:
    assert rocksdb_db._keysort is keysort


_pieces = st.sampled_from([b"", b"\x00", b"\x00" * 7, b"\x00" * 8, b"\x00" * 9, b"a", b"ab" * 4, b"\xff", b"\xff" * 8, b"\x7f\x80"])
_key = st.one_of(
    st.binary(max_size=40),
    st.lists(_pieces, max_size=5).map(b"".join),
    st.tuples(st.sampled_from([b"", b"P" * 8, b"P" * 13, b"\x00" * 24]), st.binary(max_size=18)).map(b"".join),
)


@settings(max_examples=300, deadline=None)
@given(st.lists(_key, max_size=200))
def test_matches_pythons_order_on_generated_keys(keysort: ModuleType, keys: list[bytes]) -> None:
    assert_byte_order(keys)
    assert_byte_order(keys, pa.large_binary())


@settings(max_examples=50, deadline=None)
@given(st.lists(_key, min_size=1, max_size=60), st.integers(1, 30))
def test_repeated_keys_are_adjacent(keysort: ModuleType, keys: list[bytes], times: int) -> None:
    assert_byte_order(keys * times)


def _engine_like(rng: random.Random, count: int) -> list[bytes]:
    out = []
    for _ in range(count):
        text = rng.choice(["depot", "route", "bay", "crate-"]) + str(rng.randrange(0, 5000))
        data = text.encode()
        padded = data + b"\x00" * (-len(data) % 8)
        # version byte, null bits, (offset << 32 | size) and a long, all little-endian words
        out.append(b"\x00" + bytes(8) + struct.pack("<II", len(data), 24) + struct.pack("<q", rng.randrange(-(2**40), 2**40)) + padded)
    return out


@pytest.mark.parametrize("count", [0, 1, 31, 32, 33, 1000, 20000])
def test_matches_pythons_order_on_engine_shaped_keys(keysort: ModuleType, count: int) -> None:
    keys = _engine_like(random.Random(count), count)
    assert_byte_order(keys)


def test_long_shared_prefixes_and_a_comb_of_prefixes(keysort: ModuleType) -> None:
    rng = random.Random(7)
    shared = [b"S" * 5000 + rng.randbytes(rng.randrange(0, 12)) for _ in range(300)]
    comb = [b"\x00" * i for i in range(400)] + [b"a" * i for i in range(400)]
    rng.shuffle(comb)
    assert_byte_order(shared)
    assert_byte_order(comb)


def test_sliced_arrays_sort_their_own_slice(keysort: ModuleType) -> None:
    keys = _engine_like(random.Random(3), 500)
    for binary in (pa.binary(), pa.large_binary()):
        arr = pa.array(keys, binary).slice(37, 400)
        order = byte_order(arr)
        assert arr.take(order).to_pylist() == sorted(keys[37:437])


def test_unaligned_offsets_are_read_right(keysort: ModuleType) -> None:
    keys = _engine_like(random.Random(5), 300)
    arr = pa.array(keys, pa.binary())
    _, offsets, data = arr.buffers()
    shifted = bytearray(b"\x01") + bytearray(offsets.to_pybytes())
    raw = keysort.byte_order(memoryview(shifted)[1:], data, 0, len(keys), False)
    order = np.frombuffer(raw, dtype=np.int64)
    assert [keys[i] for i in order] == sorted(keys)


@pytest.mark.parametrize(
    ("offsets", "data", "offset", "count", "message"),
    REFUSED_ARRAYS
    + [
        (np.array([0, 2], np.int32), b"abcd", 1, 1, "shorter"),  # slice past the offsets
        (np.array([0, 2], np.int32), b"abcd", 2**62, 2**62, "shorter"),  # offset + count would overflow int64
        (np.array([0, 2], np.int32), b"abcd", 0, 2**63 - 1, "shorter"),
    ],
)
def test_offsets_that_describe_no_array_are_refused(keysort: ModuleType, offsets, data, offset, count, message) -> None:
    for function in (keysort.byte_order, keysort.last_of_each):
        with pytest.raises(ValueError, match=message):
            function(offsets.tobytes(), data, offset, count, False)


def assert_last_of_each(keysort: ModuleType, keys: list[bytes]) -> None:
    """``last_of_each`` against a dict built in order (a later position overwrites an earlier one),
    in byte-wise order of the keys."""
    arr = pa.array(keys, pa.binary())
    _, offsets, data = arr.buffers()
    got = np.frombuffer(keysort.last_of_each(offsets, data, 0, len(arr), False), np.int64).tolist()
    last = {k: i for i, k in enumerate(keys)}
    assert got == [last[k] for k in sorted(last)]


@st.composite
def _templated_keys(draw: st.DrawFn) -> list[bytes]:
    """Keys over one shared template (as the engine's keys share their null bits and offsets):
    a few byte positions vary over a small alphabet (so keys tie on the first level's 8 varying
    positions, and repeat), every key at least the template's length, then a tail. More than 32
    keys, so the first level (a pass over the bytes where keys differ) runs."""
    template = draw(st.binary(min_size=0, max_size=70))
    spots = draw(st.lists(st.integers(0, max(len(template) - 1, 0)), max_size=14)) if template else []
    alphabet = st.sampled_from([0, 1, 0x7F, 0x80, 0xFF])
    keys = []
    for _ in range(draw(st.integers(33, 150))):
        key = bytearray(template)
        for spot in spots:
            key[spot] = draw(alphabet)
        keys.append(bytes(key) + draw(st.sampled_from([b"", b"\x00", b"a", b"\xff" * 9, b"ab" * 7])))
    return keys


@settings(max_examples=200, deadline=None)
@given(_templated_keys())
def test_keys_over_a_shared_template_sort_and_replay_right(keysort: ModuleType, keys: list[bytes]) -> None:
    assert_byte_order(keys)
    assert_last_of_each(keysort, keys)


def test_the_byte_after_the_first_levels_eight_positions_still_decides(keysort: ModuleType) -> None:
    """Nine varying positions in a row: keys that tie on the first eight differ on the ninth, and
    on the bytes after it; with repeats, for the replay too."""
    rng = random.Random(11)
    keys = [bytes([rng.randrange(2)] * 8 + [rng.randrange(3), rng.randrange(3)]) + rng.choice([b"", b"z"]) for _ in range(300)]
    assert_byte_order(keys)
    assert_last_of_each(keysort, keys)


@settings(max_examples=200, deadline=None)
@given(st.lists(_key, max_size=120), st.booleans())
def test_last_of_each_keeps_every_distinct_keys_last_position(keysort: ModuleType, keys: list[bytes], sliced: bool) -> None:
    """Against a dict built in order (a later position overwrites an earlier one), in byte-wise
    order of the keys. The replay that uses it is tested in
    test_hdfs_vectorised_reader_matches_replay.py."""
    arr = pa.array([b"pad"] + keys, pa.binary()).slice(1) if sliced else pa.array(keys, pa.binary())
    _, offsets, data = arr.buffers()
    got = np.frombuffer(keysort.last_of_each(offsets, data, arr.offset, len(arr), False), np.int64).tolist()
    last = {k: i for i, k in enumerate(keys)}
    assert got == [last[k] for k in sorted(last)]


@settings(max_examples=200, deadline=None)
@given(st.lists(_key, max_size=120), st.sampled_from(["increasing", "sorted with repeats", "last pair swapped", "last key repeated"]), st.booleans())
def test_keys_already_in_order_and_nearly_so(keysort: ModuleType, keys: list[bytes], shape: str, sliced: bool) -> None:
    """Keys already strictly increasing (a heap-map file this tool wrote in key order, read back)
    skip the sort; keys that are sorted but repeat one, or strictly increasing but for the last
    pair, must still be sorted and replayed in full. Against Python's order and a dict built in
    order, as above."""
    distinct = sorted(set(keys))
    if shape == "increasing":
        keys = distinct
    elif shape == "sorted with repeats":
        keys = sorted(keys + keys[:3])
    elif shape == "last pair swapped":
        keys = distinct[:-2] + distinct[-2:][::-1]
    else:
        keys = distinct + distinct[-1:]
    assert_byte_order(keys)
    arr = pa.array([b"pad"] + keys, pa.binary()).slice(1) if sliced else pa.array(keys, pa.binary())
    _, offsets, data = arr.buffers()
    got = np.frombuffer(keysort.last_of_each(offsets, data, arr.offset, len(arr), False), np.int64).tolist()
    last = {k: i for i, k in enumerate(keys)}
    assert got == [last[k] for k in sorted(last)]


def test_large_offsets_are_checked_too(keysort: ModuleType) -> None:
    with pytest.raises(ValueError, match="not those of a binary array"):
        keysort.byte_order(np.array([0, 3, 2**40], np.int64).tobytes(), b"abcd", 0, 2, True)
    assert np.frombuffer(keysort.byte_order(np.array([0, 3, 4], np.int64).tobytes(), b"bcda", 0, 2, True), np.int64).tolist() == [1, 0]


def test_without_the_extension_arrow_sorts(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(rocksdb_db, "_keysort", None)
    assert_byte_order(_engine_like(random.Random(9), 2000))


def test_keys_with_nulls_or_other_types_go_to_arrow(keysort: ModuleType) -> None:
    with_null = pa.array([b"b", None, b"a"], pa.binary())
    assert byte_order(with_null).equals(pc.sort_indices(with_null))
    strings = pa.array(["b", "a", "c"])
    assert byte_order(strings).to_pylist() == [1, 0, 2]
