"""The compiled gather of a replay's survivors (``_framing.take_binary``, called by ``hdfs.take``)
gives the array Arrow's ``take`` gives (the reference): on hypothesis arrays of ``binary`` and
``large_binary``, sliced or not, with empty elements, positions repeated, reversed or none at all,
and on a whole replay of generated heap-map files, in key order and in file order. Positions out
of range and buffers that describe no array are refused with ValueError before anything is copied.

Outside CI a missing extension skips these tests; under ``CI=true`` it fails them (as in
test_hdfs_framing_compiled.py).
"""

from __future__ import annotations

import random
from types import ModuleType

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from compiled_extensions import load
from migrate.buffers import binary_args
from migrate.providers import hdfs


@pytest.fixture(scope="module")
def framing() -> ModuleType:
    return load("migrate.providers._framing", "the compiled framing")


def compiled_take(framing: ModuleType, arr: pa.Array, positions: np.ndarray) -> pa.Array:
    offsets, data = framing.take_binary(*binary_args(arr), len(arr), np.asarray(positions, np.int64))
    out = pa.Array.from_buffers(arr.type, len(positions), [None, pa.py_buffer(offsets), pa.py_buffer(data)])
    out.validate(full=True)
    return out


@settings(max_examples=300, deadline=None)
@given(
    elements=st.lists(st.binary(max_size=70), max_size=50),
    cut=st.tuples(st.integers(0, 50), st.integers(0, 50)),
    large=st.booleans(),
    data=st.data(),
)
def test_same_array_as_arrows_take(framing: ModuleType, elements, cut, large: bool, data) -> None:
    arr = pa.array(elements, pa.large_binary() if large else pa.binary())
    start = min(cut[0], len(elements))
    arr = arr.slice(start, min(cut[1], len(elements) - start))  # a slice: a non-zero offset
    n = len(arr)
    positions = np.array(data.draw(st.lists(st.integers(0, n - 1), max_size=80)) if n else [], np.int64)
    ours = compiled_take(framing, arr, positions)
    reference = arr.take(pa.array(positions, pa.int64()))
    assert ours.type == reference.type and ours.equals(reference)
    assert ours.to_pylist() == [elements[start + int(p)] for p in positions]


def test_orders_that_matter(framing: ModuleType) -> None:
    arr = pa.array([b"a", b"", b"ccc", b"dd"], pa.binary())
    assert compiled_take(framing, arr, np.array([3, 2, 1, 0])).to_pylist() == [b"dd", b"ccc", b"", b"a"]
    assert compiled_take(framing, arr, np.array([2, 2, 2])).to_pylist() == [b"ccc"] * 3
    assert compiled_take(framing, arr, np.array([], np.int64)).to_pylist() == []
    # more rows ahead than the loop looks ahead: every prefetch lands inside the array
    many = pa.array([b"%d" % i for i in range(1000)], pa.binary())
    order = np.array(random.Random(7).sample(range(1000), 1000), np.int64)
    assert compiled_take(framing, many, order).to_pylist() == [b"%d" % i for i in order]


def test_refuses_bad_input_before_copying(framing: ModuleType) -> None:
    arr = pa.array([b"ab", b"cd"], pa.binary())
    args = binary_args(arr)
    with pytest.raises(ValueError, match="position 2 is outside the 2 elements"):
        framing.take_binary(*args, 2, np.array([0, 2], np.int64))
    with pytest.raises(ValueError, match="position -1 is outside"):
        framing.take_binary(*args, 2, np.array([-1], np.int64))
    with pytest.raises(ValueError, match="buffer of int64"):
        framing.take_binary(*args, 2, b"\x00" * 7)
    with pytest.raises(ValueError, match="shorter than the slice"):
        framing.take_binary(*args, 3, np.array([0], np.int64))  # three elements over two
    offsets = args[0]
    with pytest.raises(ValueError, match="not those of a binary array"):
        framing.take_binary(offsets, b"a", 0, False, 2, np.array([0], np.int64))  # offsets past the data
    with pytest.raises(ValueError, match="negative"):
        framing.take_binary(*args, -1, np.array([], np.int64))


@pytest.mark.parametrize("key_order", [True, False])
def test_a_replay_gives_the_rows_of_the_reference(framing: ModuleType, monkeypatch: pytest.MonkeyPatch, key_order: bool) -> None:
    """resolve_versions over generated snapshot-and-delta records, once with the compiled gather
    and once with Arrow's take: the same survivors, in the same order."""
    rng = random.Random(20261203)
    files = []
    for f in range(4):
        keys = [b"k-%05d" % rng.randrange(3000) for _ in range(2000)]
        values = [b"v%d-" % f + bytes(rng.randrange(40)) for _ in keys]
        removed = np.array([f > 0 and rng.random() < 0.1 for _ in keys])
        values = [b"" if r else v for v, r in zip(values, removed)]
        files.append((pa.array(keys, pa.binary()), pa.array(values, pa.binary()), removed))

    def replay() -> tuple[list, list]:
        keys, values = hdfs.resolve_versions(list(files), key_order)
        return keys.to_pylist(), values.to_pylist()

    monkeypatch.setattr(hdfs, "_framing", framing)
    ours = replay()
    monkeypatch.setattr(hdfs, "_framing", None)
    reference = replay()
    assert ours == reference
    # and by hand: the last write of every key that was not removed last
    last: dict[bytes, bytes | None] = {}
    for keys, values, removed in files:
        for k, v, r in zip(keys.to_pylist(), values.to_pylist(), removed):
            last[k] = None if r else v
    expected = {k: v for k, v in last.items() if v is not None}
    assert dict(zip(*ours)) == expected
    if key_order:
        assert ours[0] == sorted(expected)
