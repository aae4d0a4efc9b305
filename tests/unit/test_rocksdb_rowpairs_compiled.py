"""The compiled hand-over of rows between Arrow buffers and rocksdict (``migrate.providers._rowpairs``).

``collect`` gives the batches of the Python reference (``rocksdb_db._collect_py``: lists and
``pa.array``) on hypothesis rows, at the row and byte bounds, and on a real RocksDB through
rocksdict's ``items()`` view; it passes the iterator's own exception through, refuses rows that are
not pairs of bytes, and leaves the iterator where the batch stopped. ``put`` makes the calls of the
reference (``rocksdb_db._put_py``: Arrow prefixes, lists, a Python loop) on hypothesis rows and
slices with every prefix, refuses bad buffers before its first call, stops at the target's
exception, and writes the same SST file as the reference through rocksdict's ``SstFileWriter``.
The provider tests run the scan and the write through whichever path is in use.

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

from migrate.buffers import binary_args
from migrate.providers import rocksdb_db
from migrate.providers.rocksdb_db import _collect_py, _put_py


@pytest.fixture(scope="module")
def compiled() -> ModuleType:
    return load("migrate.providers._rowpairs", "the compiled scan collector")


def arrays(result: tuple) -> tuple[pa.Array, pa.Array]:
    keys, values, _ = collected(result)
    return keys, values


def collected(result: tuple) -> tuple[pa.Array, pa.Array, tuple | None]:
    """The compiled result as rocksdb_db.collect gives it: two checked arrays and the stray row."""
    count, ko, kd, vo, vd, stray = result
    keys = pa.Array.from_buffers(pa.binary(), count, [None, pa.py_buffer(ko), pa.py_buffer(kd)])
    values = pa.Array.from_buffers(pa.binary(), count, [None, pa.py_buffer(vo), pa.py_buffer(vd)])
    keys.validate(full=True)
    values.validate(full=True)
    return keys, values, stray


def batches(collect, rows: list[tuple[bytes, bytes]], limit: int, max_bytes: int, prefixes=(b"", b"")) -> list:
    """Every batch until an empty one or a stray row, as Python lists; a stray row is the last
    item, as ("stray", row)."""
    it = iter(rows)
    out: list = []
    for _ in range(len(rows) + 2):
        keys, values, stray = collect(it, limit, max_bytes, prefixes)
        if len(keys):
            out.append((keys.to_pylist(), values.to_pylist()))
        if stray is not None:
            out.append(("stray", stray))
            return out
        if not len(keys):
            return out
    raise AssertionError("the batches never ended")


def compiled_collect(compiled: ModuleType):
    return lambda it, n, b, prefixes: collected(compiled.collect(it, n, b, *prefixes))


rows_strategy = st.lists(st.tuples(st.binary(max_size=40), st.binary(max_size=90)), max_size=60)


@settings(max_examples=200, deadline=None)
@given(rows=rows_strategy, limit=st.integers(1, 9), max_bytes=st.integers(1, 200))
def test_same_batches_as_the_python_reference(compiled: ModuleType, rows, limit: int, max_bytes: int) -> None:
    ours = batches(compiled_collect(compiled), rows, limit, max_bytes)
    reference = batches(_collect_py, rows, limit, max_bytes)
    assert ours == reference
    # nothing lost, nothing repeated, order kept
    assert [(k, v) for keys, values in ours for k, v in zip(keys, values)] == rows
    for keys, values in ours:
        assert len(keys) <= limit
        # a batch stops once its keys or values reach max_bytes: only its last row may cross it
        assert sum(map(len, keys[:-1])) < max_bytes and sum(map(len, values[:-1])) < max_bytes


prefix_rows = st.lists(
    st.tuples(st.sampled_from([b"", b"\x00", b"\x01", b"ab"]), st.binary(max_size=30),
              st.sampled_from([b"", b"\x00", b"\x02", b"a"]), st.binary(max_size=50)),
    max_size=40,
).map(lambda parts: [(kp + k, vp + v) for kp, k, vp, v in parts])


@settings(max_examples=300, deadline=None)
@given(
    rows=prefix_rows,
    prefixes=st.sampled_from([(b"", b""), (b"\x00", b"\x00"), (b"", b"\x00"), (b"ab", b"a")]),
    limit=st.integers(1, 9),
    max_bytes=st.integers(1, 200),
)
def test_prefixes_taken_off_as_the_python_reference_does(compiled: ModuleType, rows, prefixes, limit: int, max_bytes: int) -> None:
    ours = batches(compiled_collect(compiled), rows, limit, max_bytes, prefixes)
    reference = batches(_collect_py, rows, limit, max_bytes, prefixes)
    assert ours == reference
    # the rows before the first one without the prefixes, each without them; that row is the stray
    kp, vp = prefixes
    good = next((i for i, (k, v) in enumerate(rows) if not (k.startswith(kp) and v.startswith(vp))), len(rows))
    taken = [(k, v) for batch in ours if batch[0] != "stray" for k, v in zip(*batch)]
    assert taken == [(k[len(kp) :], v[len(vp) :]) for k, v in rows[:good]]
    assert (ours[-1] == ("stray", rows[good])) if good < len(rows) else all(b[0] != "stray" for b in ours)


def test_buffers_sized_from_the_first_row_still_grow(compiled: ModuleType) -> None:
    """A batch of small rows, then large ones: the room guessed from the first row is outgrown
    and grown; a first row larger than the byte bound asks no more than the bound allows."""
    rows = [(b"k%03d" % i, b"v" * (1 if i < 5 else 5000)) for i in range(300)]
    keys, values, stray = collected(compiled.collect(iter(rows), 1000, 1 << 30))
    assert stray is None and list(zip(keys.to_pylist(), values.to_pylist())) == rows
    big = [(b"k", b"x" * 100_000), (b"l", b"y")]
    keys, values, _ = collected(compiled.collect(iter(big), 1000, 10))
    assert values.to_pylist() == [b"x" * 100_000]  # the first row crosses the bound: the batch ends


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


class Recorder:
    """A put target that records every call, and raises on the call numbered ``fail_at``."""

    def __init__(self, fail_at: int | None = None) -> None:
        self.calls: list[tuple[bytes, bytes]] = []
        self.fail_at = fail_at

    def __setitem__(self, key: bytes, value: bytes) -> None:
        if len(self.calls) == self.fail_at:
            raise Boom(f"refused row {self.fail_at}")
        assert type(key) is bytes and type(value) is bytes
        self.calls.append((key, value))


@settings(max_examples=200, deadline=None)
@given(
    rows=st.lists(st.tuples(st.binary(max_size=30), st.binary(max_size=60)), max_size=40),
    cut=st.tuples(st.integers(0, 40), st.integers(0, 40)),
    prefixes=st.sampled_from([(b"", b""), (b"\x00", b"\x00"), (b"", b"\x00"), (b"ab", b"")]),
    key_type=st.sampled_from([pa.binary(), pa.large_binary()]),
    value_type=st.sampled_from([pa.binary(), pa.large_binary()]),
)
def test_put_makes_the_calls_of_the_python_reference(compiled: ModuleType, rows, cut, prefixes, key_type, value_type) -> None:
    keys = pa.array([k for k, _ in rows], key_type)
    values = pa.array([v for _, v in rows], value_type)
    start = min(cut[0], len(rows))
    count = min(cut[1], len(rows) - start)
    keys, values = keys.slice(start, count), values.slice(start, count)  # slices: a non-zero offset
    ours, reference = Recorder(), Recorder()
    compiled.put(ours, prefixes[0], prefixes[1], *binary_args(keys), *binary_args(values), count)
    _put_py(reference, keys, values, prefixes)
    assert ours.calls == reference.calls
    assert ours.calls == [(prefixes[0] + k, prefixes[1] + v) for k, v in rows[start : start + count]]


def test_put_stops_at_the_targets_exception(compiled: ModuleType) -> None:
    keys = pa.array([b"a", b"b", b"c", b"d"], pa.binary())
    target = Recorder(fail_at=2)
    with pytest.raises(Boom, match="refused row 2"):
        compiled.put(target, b"", b"", *binary_args(keys), *binary_args(keys), 4)
    assert target.calls == [(b"a", b"a"), (b"b", b"b")]


def test_put_refuses_bad_buffers_before_any_call(compiled: ModuleType) -> None:
    keys = pa.array([b"ab", b"cd"], pa.binary())
    _, offsets, data = keys.buffers()
    target = Recorder()
    with pytest.raises(ValueError, match="shorter than the slice"):  # three rows over two
        compiled.put(target, b"", b"", offsets, data, 0, False, offsets, data, 0, False, 3)
    with pytest.raises(ValueError, match="not those of a binary array"):  # offsets past the data
        compiled.put(target, b"", b"", offsets, b"a", 0, False, offsets, data, 0, False, 2)
    with pytest.raises(ValueError, match="negative"):
        compiled.put(target, b"", b"", offsets, data, 0, False, offsets, data, 0, False, -1)
    with pytest.raises(TypeError, match="12 arguments"):
        compiled.put(target, b"", b"", offsets, data, 0, False)
    with pytest.raises(TypeError):
        compiled.put(target, None, b"", offsets, data, 0, False, offsets, data, 0, False, 2)  # a prefix is a buffer
    assert target.calls == []


def test_put_writes_the_sst_file_of_the_reference(compiled: ModuleType, tmp_path, monkeypatch) -> None:
    """rocksdb_db.put_rows into rocksdict's SstFileWriter, once compiled and once the reference,
    then each file ingested into its own RocksDB and scanned: the same rows, prefixed."""
    from rocksdict import Options, Rdict, SstFileWriter

    rows = sorted({b"key-%05d" % (i * 7919 % 10007): b"v" * (i % 50) for i in range(3000)}.items())
    keys = pa.array([k for k, _ in rows], pa.binary())
    values = pa.array([v for _, v in rows], pa.binary())
    scanned = []
    for name, module in (("compiled", compiled), ("reference", None)):
        monkeypatch.setattr(rocksdb_db, "_rowpairs", module)
        writer = SstFileWriter(options=Options(raw_mode=True))
        writer.open(str(tmp_path / f"{name}.sst"))
        for start in range(0, len(rows), 1000):  # three slices of the arrays
            rocksdb_db.put_rows(writer, keys.slice(start, 1000), values.slice(start, 1000), (b"\x00", b"\x00"))
        writer.finish()
        db = Rdict(str(tmp_path / f"{name}-db"), options=Options(raw_mode=True))
        db.ingest_external_file([str(tmp_path / f"{name}.sst")])
        scanned.append(list(db.items()))
        db.close()
    assert scanned[0] == scanned[1] == [(b"\x00" + k, b"\x00" + v) for k, v in rows]
