"""The heap-map replay in file order by hash table (``_keysort.last_in_file_order``): the position
of every distinct key's last record, in increasing order of position.

References outside the function: a Python dict built in order (a later position overwrites an
earlier one; the last write of a key wins, common practice for a snapshot and its deltas) and the
compiled sort's ``last_of_each``, its positions sorted back into file order. Inputs: hypothesis
lists with repeated keys, empty keys, keys that are prefixes of others, sliced arrays,
large_binary, unaligned offset buffers; engine-shaped keys by the ten thousand (the table's linear
probing over long clusters); keys already strictly increasing (the check that skips the table);
offsets that describe no array (refused before any lookup).

The hash comes from the system's libxxhash: CI installs it (``.ci/run``) and then the function
must be there; elsewhere a machine without it skips these tests (the replay then sorts).
"""

from __future__ import annotations

import os
import random
import struct
from types import ModuleType

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from compiled_extensions import REFUSED_ARRAYS, load
from migrate.providers import hdfs


@pytest.fixture(scope="module")
def keysort() -> ModuleType:
    module = load("migrate.providers._keysort", "the compiled key sort")
    if not hasattr(module, "last_in_file_order"):
        reason = "the system's libxxhash (libxxhash.so.0) did not load, so _keysort has no last_in_file_order"
        if os.environ.get("CI") == "true":
            pytest.fail(f"{reason}, and CI=true", pytrace=False)
        pytest.skip(reason)
    return module


def last_positions(keysort: ModuleType, arr: pa.Array, offsets=None) -> list[int]:
    _, offs, data = arr.buffers()
    large = pa.types.is_large_binary(arr.type)
    raw = keysort.last_in_file_order(offs if offsets is None else offsets, data, arr.offset, len(arr), large)
    return np.frombuffer(raw, np.int64).tolist()


def expected(keys: list[bytes]) -> list[int]:
    last = {k: i for i, k in enumerate(keys)}
    return sorted(last.values())


def by_sort(keysort: ModuleType, arr: pa.Array) -> list[int]:
    _, offs, data = arr.buffers()
    raw = keysort.last_of_each(offs, data, arr.offset, len(arr), pa.types.is_large_binary(arr.type))
    return sorted(np.frombuffer(raw, np.int64).tolist())


def test_the_file_order_replay_uses_it(keysort: ModuleType, monkeypatch: pytest.MonkeyPatch) -> None:
    assert hdfs._keysort is keysort and hdfs._HASHED
    calls = []
    real = hdfs._last_writes_hashed
    monkeypatch.setattr(hdfs, "_last_writes_hashed", lambda keys: calls.append(len(keys)) or real(keys))
    files = [hdfs_arrays([(b"b", b"1"), (b"a", b"2")]), hdfs_arrays([(b"b", b"3")])]
    keys, values = hdfs.resolve_versions(files)
    assert calls == [3] and keys.to_pylist() == [b"a", b"b"] and values.to_pylist() == [b"2", b"3"]
    keys, values = hdfs.resolve_versions(files, key_order=True)  # key order: the sort, not the table
    assert calls == [3] and keys.to_pylist() == [b"a", b"b"]


def hdfs_arrays(records: list[tuple[bytes, bytes]]):
    return (pa.array([k for k, _ in records], pa.binary()), pa.array([v for _, v in records], pa.binary()),
            np.zeros(len(records), dtype=bool))


_pieces = st.sampled_from([b"", b"\x00", b"\x00" * 8, b"a", b"ab" * 4, b"\xff" * 8])
_key = st.one_of(st.binary(max_size=12), st.lists(_pieces, max_size=4).map(b"".join))


@settings(max_examples=300, deadline=None)
@given(st.lists(_key, max_size=200), st.booleans(), st.booleans())
def test_matches_a_dict_replay_and_the_sort(keysort: ModuleType, keys: list[bytes], large: bool, sliced: bool) -> None:
    binary = pa.large_binary() if large else pa.binary()
    arr = pa.array([b"pad"] + keys, binary).slice(1) if sliced else pa.array(keys, binary)
    got = last_positions(keysort, arr)
    assert got == expected(keys)
    assert got == by_sort(keysort, arr)


def _engine_like(rng: random.Random, count: int, pool: int) -> list[bytes]:
    names = [rng.choice(["dock", "lane", "shelf-"]) + str(i) for i in range(pool)]
    out = []
    for _ in range(count):
        data = rng.choice(names).encode()
        padded = data + b"\x00" * (-len(data) % 8)
        out.append(bytes(8) + struct.pack("<II", len(data), 16) + padded)
    return out


@pytest.mark.parametrize(("count", "pool"), [(1, 1), (7, 3), (8, 8), (9, 2), (40000, 30000), (40000, 50), (20000, 20000)])
def test_engine_shaped_keys_by_the_ten_thousand(keysort: ModuleType, count: int, pool: int) -> None:
    """Around the lookahead of 8 records and well past it; many repeats of few keys (long probe
    clusters of equal tags) and nearly all keys distinct (a table half full)."""
    keys = _engine_like(random.Random(count + pool), count, pool)
    arr = pa.array(keys, pa.binary())
    got = last_positions(keysort, arr)
    assert got == expected(keys)


@settings(max_examples=100, deadline=None)
@given(st.lists(_key, max_size=80), st.sampled_from(["increasing", "last pair swapped", "last key repeated"]))
def test_keys_already_in_order_and_nearly_so(keysort: ModuleType, keys: list[bytes], shape: str) -> None:
    """Strictly increasing keys (a snapshot this tool wrote, read back) are all kept without a
    lookup; a swap or a repeat at the very end must still be looked up in full."""
    distinct = sorted(set(keys))
    if shape == "increasing":
        keys = distinct
    elif shape == "last pair swapped":
        keys = distinct[:-2] + distinct[-2:][::-1]
    else:
        keys = distinct + distinct[-1:]
    assert last_positions(keysort, pa.array(keys, pa.binary())) == expected(keys)


def test_unaligned_offsets_are_read_right(keysort: ModuleType) -> None:
    keys = _engine_like(random.Random(5), 300, 40)
    arr = pa.array(keys, pa.binary())
    shifted = bytearray(b"\x01") + bytearray(arr.buffers()[1].to_pybytes())
    assert last_positions(keysort, arr, memoryview(shifted)[1:]) == expected(keys)


@pytest.mark.parametrize(
    ("offsets", "data", "offset", "count", "message"),
    REFUSED_ARRAYS
    + [
        (np.array([0, 2], np.int32), b"abcd", 0, -1, "count must be"),
        (np.array([0, 2], np.int32), b"abcd", 0, 2**32 - 1, "count must be"),  # positions are 32-bit
    ],
)
def test_offsets_that_describe_no_array_are_refused(keysort: ModuleType, offsets, data, offset, count, message) -> None:
    with pytest.raises(ValueError, match=message):
        keysort.last_in_file_order(offsets.tobytes(), data, offset, count, False)


def test_without_libxxhash_the_sort_replays_in_file_order(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(hdfs, "_HASHED", False)
    files = [hdfs_arrays([(b"b", b"1"), (b"a", b"2"), (b"c", b"0")]), hdfs_arrays([(b"b", b"3")])]
    keys, values = hdfs.resolve_versions(files)
    assert keys.to_pylist() == [b"a", b"c", b"b"] and values.to_pylist() == [b"2", b"0", b"3"]
