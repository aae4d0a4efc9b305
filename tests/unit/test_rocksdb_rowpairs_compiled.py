"""The compiled collection of a RocksDB scan's rows into Arrow buffers (``migrate.providers._rowpairs``)
gives the batches of the Python reference (``rocksdb_db._collect_py``: lists and ``pa.array``) on
hypothesis rows, at the row and byte bounds, and on a real RocksDB through rocksdict's ``items()``
view; it passes the iterator's own exception through, refuses rows that are not pairs of bytes, and
leaves the iterator where the batch stopped. test_rocksdb_scan*.py and the provider tests run the
scan through whichever path is in use.

Outside CI a missing extension skips these tests; under ``CI=true`` it fails them (as in
test_digest_compiled.py).
"""

from __future__ import annotations

from collections.abc import Iterator
from types import ModuleType

import pyarrow as pa
import pytest
from compiled_extensions import load
from hypothesis import given, settings
from hypothesis import strategies as st

from migrate.providers import rocksdb_db
from migrate.providers.rocksdb_db import _collect_py


@pytest.fixture(scope="module")
def compiled() -> ModuleType:
    return load("migrate.providers._rowpairs", "the compiled scan collector")


def arrays(result: tuple) -> tuple[pa.Array, pa.Array]:
    count, ko, kd, vo, vd = result
    keys = pa.Array.from_buffers(pa.binary(), count, [None, pa.py_buffer(ko), pa.py_buffer(kd)])
    values = pa.Array.from_buffers(pa.binary(), count, [None, pa.py_buffer(vo), pa.py_buffer(vd)])
    keys.validate(full=True)
    values.validate(full=True)
    return keys, values


def batches(collect, rows: list[tuple[bytes, bytes]], limit: int, max_bytes: int) -> list[tuple[list, list]]:
    """Every batch until an empty one, as Python lists."""
    it = iter(rows)
    out = []
    for _ in range(len(rows) + 2):
        keys, values = collect(it, limit, max_bytes)
        if not len(keys):
            return out
        out.append((keys.to_pylist(), values.to_pylist()))
    raise AssertionError("the batches never ended")


rows_strategy = st.lists(st.tuples(st.binary(max_size=40), st.binary(max_size=90)), max_size=60)


@settings(max_examples=200, deadline=None)
@given(rows=rows_strategy, limit=st.integers(1, 9), max_bytes=st.integers(1, 200))
def test_same_batches_as_the_python_reference(compiled: ModuleType, rows, limit: int, max_bytes: int) -> None:
    ours = batches(lambda it, n, b: arrays(compiled.collect(it, n, b)), rows, limit, max_bytes)
    reference = batches(_collect_py, rows, limit, max_bytes)
    assert ours == reference
    # nothing lost, nothing repeated, order kept
    assert [(k, v) for keys, values in ours for k, v in zip(keys, values)] == rows
    for keys, values in ours:
        assert len(keys) <= limit
        # a batch stops once its keys or values reach max_bytes: only its last row may cross it
        assert sum(map(len, keys[:-1])) < max_bytes and sum(map(len, values[:-1])) < max_bytes


def test_the_bounds_exactly(compiled: ModuleType) -> None:
    rows = [(b"k%d" % i, b"v" * 10) for i in range(10)]
    it = iter(rows)
    keys, values = arrays(compiled.collect(it, 4, 1 << 20))
    assert keys.to_pylist() == [b"k0", b"k1", b"k2", b"k3"]
    # the values reach 25 bytes on the third row: that row is taken, the fourth is not
    keys, _ = arrays(compiled.collect(it, 100, 25))
    assert keys.to_pylist() == [b"k4", b"k5", b"k6"]
    assert next(it) == (b"k7", b"v" * 10)  # the iterator stays where the batch stopped
    assert compiled.collect(it, 0, 100)[0] == 0  # a limit of 0 takes nothing
    assert next(it) == (b"k8", b"v" * 10)
    keys, values = arrays(compiled.collect(it, 100, 1 << 20))
    assert keys.to_pylist() == [b"k9"]
    assert arrays(compiled.collect(it, 100, 1 << 20))[0].to_pylist() == []


def test_empty_keys_and_values(compiled: ModuleType) -> None:
    keys, values = arrays(compiled.collect(iter([(b"", b""), (b"a", b"")]), 10, 100))
    assert keys.to_pylist() == [b"", b"a"] and values.to_pylist() == [b"", b""]


class Boom(Exception):
    pass


def failing(after: int) -> Iterator[tuple[bytes, bytes]]:
    for i in range(after):
        yield b"k%d" % i, b"v"
    raise Boom("block checksum mismatch")


def test_the_iterators_exception_passes_through(compiled: ModuleType) -> None:
    with pytest.raises(Boom, match="block checksum mismatch"):
        compiled.collect(failing(3), 10, 100)
    with pytest.raises(Boom):
        compiled.collect(failing(0), 10, 100)


@pytest.mark.parametrize(
    "row, message",
    [
        ((b"k", "v"), "value is str"),
        (("k", b"v"), "key is str"),
        ((b"k",), "not a \\(key, value\\) tuple"),
        ([b"k", b"v"], "row is list"),
        ((b"k", b"v", b"w"), "not a \\(key, value\\) tuple"),
        ((b"k", bytearray(b"v")), "value is bytearray"),
    ],
)
def test_rows_that_are_not_pairs_of_bytes(compiled: ModuleType, row, message: str) -> None:
    with pytest.raises(TypeError, match=message):
        compiled.collect(iter([(b"a", b"b"), row]), 10, 100)


def test_arguments(compiled: ModuleType) -> None:
    with pytest.raises(TypeError, match="iterator"):
        compiled.collect([(b"a", b"b")], 10, 100)  # a list is iterable, not an iterator
    with pytest.raises(ValueError, match="negative"):
        compiled.collect(iter([]), -1, 100)
    with pytest.raises(ValueError, match="negative"):
        compiled.collect(iter([]), 1, -1)


def test_a_real_scan_through_both_paths(compiled: ModuleType, tmp_path, monkeypatch) -> None:
    """rocksdb_db.iterate over a RocksDB written here, once with the compiled collector and once
    with the reference, with small batches so several are made and one crosses the byte bound."""
    from rocksdict import Options, Rdict

    rows = {b"key-%05d" % i: (b"x" * (i % 300)) for i in range(2000)}
    db = Rdict(str(tmp_path / "db"), options=Options(raw_mode=True))
    for k, v in rows.items():
        db[k] = v
    db.close()
    monkeypatch.setattr(rocksdb_db, "BATCH_ROWS", 333)
    monkeypatch.setattr(rocksdb_db, "BATCH_BYTES", 20_000)

    def scan() -> list[tuple[list, list]]:
        return [(k.to_pylist(), v.to_pylist()) for k, v in rocksdb_db.iterate(str(tmp_path / "db"), "db")]

    monkeypatch.setattr(rocksdb_db, "_rowpairs", compiled)
    ours = scan()
    monkeypatch.setattr(rocksdb_db, "_rowpairs", None)
    reference = scan()
    assert ours == reference
    assert len(ours) > 2000 // 333 + 1  # the byte bound cut some batches short
    assert dict((k, v) for keys, values in ours for k, v in zip(keys, values)) == rows
    assert [k for keys, _ in ours for k in keys] == sorted(rows)
