"""What our writer writes, our reader reads back exactly; the files look like the engine's.

Byte-level shape checks compare with the engine-written samples in tests/fixtures/rocksdb.
"""

from __future__ import annotations

import os
import re
import zipfile
from pathlib import Path

import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from migrate.codecs.hadoop_crc import crc_name, verify_crc
from migrate.errors import CorruptInput, Unsupported
from migrate.providers.base import ROW_SCHEMA, ReadContext, StoreDir, WriteContext
from migrate.providers.rocksdb import (
    FORMAT_VERSION_CONF,
    RocksDBProvider,
    add_version_byte,
    strip_version_byte,
)
from migrate.providers.rocksdb_meta import parse_metadata

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "rocksdb"


def _store(root: Path, rel: str = "state/0/0") -> StoreDir:
    from migrate.storage import open_location

    return StoreDir(open_location(str(root), readonly=False), rel, 0, 0)


def _batches(pairs: list[tuple[bytes, bytes]], size: int) -> list[pa.RecordBatch]:
    out = []
    for i in range(0, len(pairs), size):
        chunk = pairs[i : i + size]
        out.append(
            pa.RecordBatch.from_arrays(
                [pa.array([k for k, _ in chunk], pa.binary()), pa.array([v for _, v in chunk], pa.binary())], schema=ROW_SCHEMA
            )
        )
    return out


def _read(store: StoreDir, version: int, conf: dict[str, str] | None = None) -> list[tuple[bytes, bytes]]:
    rows: list[tuple[bytes, bytes]] = []
    for batch in RocksDBProvider().read(store, version, ReadContext(conf=conf or {})):
        assert batch.schema.equals(ROW_SCHEMA)
        rows += zip(batch.column("key").to_pylist(), batch.column("value").to_pylist())
    return rows


def test_version_byte_vectors() -> None:
    arr = pa.array([b"", b"ab", b"\x00", b"\xff" * 9], pa.binary())
    prefixed = add_version_byte(arr)
    assert prefixed.to_pylist() == [b"\x00", b"\x00ab", b"\x00\x00", b"\x00" + b"\xff" * 9]
    assert strip_version_byte(prefixed, "x").to_pylist() == arr.to_pylist()
    sliced = prefixed.slice(1, 2)  # a non-zero array offset
    assert strip_version_byte(sliced, "x").to_pylist() == [b"ab", b"\x00"]
    assert add_version_byte(arr.slice(1, 2)).to_pylist() == [b"\x00ab", b"\x00\x00"]
    assert add_version_byte(pa.array([b"q"], pa.large_binary())).to_pylist() == [b"\x00q"]


pairs_strategy = st.dictionaries(
    st.binary(min_size=0, max_size=24), st.binary(min_size=0, max_size=48), max_size=120
).map(lambda d: list(d.items()))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(pairs=pairs_strategy, batch_size=st.integers(1, 50), run_bytes=st.sampled_from([1, 300, 1 << 20]))
def test_random_rows_round_trip(tmp_path_factory: pytest.TempPathFactory, pairs, batch_size: int, run_bytes: int) -> None:
    root = tmp_path_factory.mktemp("rt")
    store = _store(root)
    written = RocksDBProvider(run_bytes=run_bytes).write(store, 4, _batches(pairs, batch_size), WriteContext())
    back = _read(store, 4)
    assert back == sorted(pairs)  # every row, once, in byte-wise key order
    zip_file = root / "state/0/0/4.zip"
    meta = parse_metadata(zipfile.ZipFile(zip_file).read("metadata"), "4.zip")
    assert meta.num_keys == len(pairs)
    assert {f"state/0/0/SSTs/{f.dfs_name}" for f in meta.sst_files} == {w.rel for w in written if w.rel.endswith(".sst")}


def test_written_files_match_the_engine_layout(tmp_path: Path) -> None:
    pairs = [(b"k%03d" % i, b"v" * (i % 7)) for i in range(300)]
    store = _store(tmp_path)
    written = RocksDBProvider().write(store, 3, _batches(pairs, 64), WriteContext())
    rels = [w.rel for w in written]
    assert rels[-2:] == ["state/0/0/3.zip", "state/0/0/.3.zip.crc"]  # the zip is written last
    for w in written:
        path = tmp_path / w.rel
        assert path.stat().st_size == w.size
        if not path.name.startswith("."):
            verify_crc(path.read_bytes(), (path.parent / crc_name(path.name)).read_bytes(), w.rel)
    sst = [r for r in rels if r.endswith(".sst") and "/." not in r]
    assert all(re.fullmatch(r"state/0/0/SSTs/\d{6}-[0-9a-f-]{36}\.sst", r) for r in sst)

    def shape(path: Path) -> list[str]:  # member names with the numbers blanked, in order
        with zipfile.ZipFile(path) as z:
            return [re.sub(r"\d+", "N", i.filename) for i in z.infolist()]

    assert shape(tmp_path / "state/0/0/3.zip") == shape(FIXTURES / "agg_p0" / "3.zip")
    with zipfile.ZipFile(tmp_path / "state/0/0/3.zip") as z:
        options = z.read(next(n for n in z.namelist() if n.startswith("OPTIONS-"))).decode()
        meta = parse_metadata(z.read("metadata"), "3.zip")
    for line in ("format_version=5", "compression=kLZ4Compression", "comparator=leveldb.BytewiseComparator", "checksum=kXXH3"):
        assert f"  {line}\n" in options
    assert "  max_file_opening_threads=1\n" in options  # the build's one table-opening thread (rocksdb_db.build_db)
    assert [f.local_name for f in meta.sst_files] == [r.rsplit("/", 1)[1].split("-")[0] + ".sst" for r in sst]


def test_empty_partition_is_written_like_the_engine(tmp_path: Path) -> None:
    store = _store(tmp_path)
    written = RocksDBProvider().write(store, 3, iter([]), WriteContext())
    assert [w.rel for w in written] == ["state/0/0/3.zip", "state/0/0/.3.zip.crc"]
    assert not (tmp_path / "state/0/0/SSTs").exists()
    ours, engine = zipfile.ZipFile(tmp_path / "state/0/0/3.zip"), zipfile.ZipFile(FIXTURES / "empty_p0" / "3.zip")
    assert ours.namelist() == engine.namelist()
    assert ours.read("metadata") == engine.read("metadata")
    assert _read(store, 3) == []


def test_format_version_comes_from_the_conf(tmp_path: Path) -> None:
    store = _store(tmp_path)
    RocksDBProvider().write(store, 1, _batches([(b"a", b"b")], 1), WriteContext(conf={FORMAT_VERSION_CONF: "4"}))
    with zipfile.ZipFile(tmp_path / "state/0/0/1.zip") as z:
        options = z.read(next(n for n in z.namelist() if n.startswith("OPTIONS-"))).decode()
    assert "  format_version=4\n" in options
    assert _read(store, 1) == [(b"a", b"b")]
    with pytest.raises(Unsupported, match="formatVersion=99"):
        RocksDBProvider().write(store, 2, [], WriteContext(conf={FORMAT_VERSION_CONF: "99"}))


@pytest.mark.parametrize("run_bytes", [1 << 20, 40])  # one sorted run, or a run per batch
def test_duplicate_keys_are_refused(tmp_path: Path, run_bytes: int) -> None:
    pairs = [(b"a", b"1"), (b"b", b"2"), (b"c", b"3"), (b"a", b"4")]
    with pytest.raises(CorruptInput, match="same key twice|duplicate keys"):
        RocksDBProvider(run_bytes=run_bytes).write(_store(tmp_path), 1, _batches(pairs, 2), WriteContext())
    assert not (tmp_path / "state/0/0/1.zip").exists()  # no version is committed


@pytest.mark.parametrize(
    "pairs",
    [
        [(b"a", b"1"), (b"a", b"2")],  # sorted but for the repeat
        [(b"a", b"1"), (b"b", b"2"), (b"b", b"3"), (b"c", b"4")],
        [(b"", b"1"), (b"", b"2")],
    ],
)
@pytest.mark.parametrize("batch_rows", [1, 2, 3])  # the repeat inside a batch or across two
def test_duplicate_keys_in_sorted_rows_are_refused(tmp_path: Path, pairs, batch_rows: int) -> None:
    with pytest.raises(CorruptInput, match="same key twice"):
        RocksDBProvider().write(_store(tmp_path), 1, _batches(pairs, batch_rows), WriteContext())
    assert not (tmp_path / "state/0/0/1.zip").exists()


def test_batches_each_sorted_but_overlapping_are_sorted_together(tmp_path: Path) -> None:
    pairs = [(b"a", b"1"), (b"c", b"3"), (b"b", b"2"), (b"d", b"4"), (b"\x80", b"5"), (b"e", b"6")]
    store = _store(tmp_path)
    RocksDBProvider().write(store, 1, _batches(pairs, 2), WriteContext(write_crc=False))
    assert _read(store, 1) == sorted(pairs)


@settings(max_examples=150, deadline=None)
@given(keys=st.lists(st.binary(max_size=6), max_size=40), large=st.booleans())
def test_strictly_increasing_is_python_bytes_order(keys: list[bytes], large: bool) -> None:
    """The check that lets a sorted run skip the sort, against Python's own bytes comparison
    (unsigned bytes, a prefix before its extensions: RocksDB's default comparator)."""
    from migrate.providers.rocksdb_db import strictly_increasing

    arr = pa.array(keys, pa.large_binary() if large else pa.binary())
    expected = all(a < b for a, b in zip(keys, keys[1:]))
    assert strictly_increasing(arr) is expected
    assert strictly_increasing(pa.array(sorted(set(keys)), pa.binary())) is True
    if len(arr) > 2:  # a slice with an offset, as batches of a bigger array are
        assert strictly_increasing(arr.slice(1)) is all(a < b for a, b in zip(keys[1:], keys[2:]))


@pytest.mark.parametrize("presorted", [True, False])
def test_sorted_and_unsorted_rows_give_the_same_store(tmp_path: Path, presorted: bool) -> None:
    pairs = sorted({os.urandom(9): os.urandom(20) for _ in range(2000)}.items())
    rows = pairs if presorted else pairs[1::2] + pairs[0::2]
    store = _store(tmp_path)
    RocksDBProvider().write(store, 1, _batches(rows, 300), WriteContext(write_crc=False))
    assert _read(store, 1) == pairs


def test_many_runs_are_merged_into_one_sorted_store(tmp_path: Path) -> None:
    pairs = [(os.urandom(12), os.urandom(30)) for _ in range(3000)]
    store = _store(tmp_path)
    RocksDBProvider(run_bytes=4096).write(store, 2, _batches(pairs, 100), WriteContext(write_crc=False))
    assert _read(store, 2) == sorted(pairs)
    assert not list((tmp_path / "state/0/0").rglob(".*.crc"))  # write_crc=False writes no sidecars


def test_rows_with_nulls_are_refused(tmp_path: Path) -> None:
    batch = pa.RecordBatch.from_arrays([pa.array([b"a", None]), pa.array([b"x", b"y"])], names=["key", "value"])
    with pytest.raises(CorruptInput, match="null"):
        RocksDBProvider().write(_store(tmp_path), 1, [batch], WriteContext())
