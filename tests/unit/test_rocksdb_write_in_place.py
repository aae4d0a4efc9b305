"""A RocksDB partition of one sorted run of at least ``in_place_bytes`` of rows, written to local
disk, has its table file written in place in the target (under a temporary name, renamed once the
version is built) instead of in scratch and then copied; the scratch DB ingests it through a
symbolic link. Everything else is copied as before: smaller partitions, partitions of several runs
(their table files come out of a compaction in scratch) and every target off local disk. A write
that fails leaves no temporary file behind. The tests lower the threshold to 0 where they need
the in-place write (their rows take about 40 KB).
"""

from __future__ import annotations

import os
import uuid
import zipfile
from pathlib import Path

import pyarrow as pa
import pytest

from migrate.codecs.hadoop_crc import crc_name, verify_crc
from migrate.errors import CorruptInput
from migrate.providers import rocksdb_db
from migrate.providers.base import ROW_SCHEMA, ReadContext, StoreDir, WriteContext
from migrate.providers.rocksdb import RocksDBProvider
from migrate.storage import Location, open_location

ROWS = [(b"key-%05d" % i, b"value-%d" % (i * 7)) for i in range(2000)]


def _batches(rows: list[tuple[bytes, bytes]], size: int = 500) -> list[pa.RecordBatch]:
    return [
        pa.RecordBatch.from_arrays(
            [pa.array([k for k, _ in rows[i : i + size]], pa.binary()), pa.array([v for _, v in rows[i : i + size]], pa.binary())],
            schema=ROW_SCHEMA,
        )
        for i in range(0, len(rows), size)
    ]


def _read(store: StoreDir, version: int = 3) -> list[tuple[bytes, bytes]]:
    out: list[tuple[bytes, bytes]] = []
    for b in RocksDBProvider().read(store, version, ReadContext()):
        out += zip(b.column("key").to_pylist(), b.column("value").to_pylist())
    return out


class _Spy:
    """Records the table files put by copy and the temporary files committed by rename."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.copied: list[str] = []
        self.renamed: list[tuple[str, str]] = []
        put, commit = Location.put_file, Location.commit_temp

        def spy_put(loc: Location, local: str, rel: str) -> None:
            self.copied.append(rel)
            put(loc, local, rel)

        def spy_commit(loc: Location, tmp: str, rel: str) -> None:
            self.renamed.append((tmp, rel))
            commit(loc, tmp, rel)

        monkeypatch.setattr(Location, "put_file", spy_put)
        monkeypatch.setattr(Location, "commit_temp", spy_commit)


def _leftovers(root: Path) -> list[Path]:
    return [p for p in root.rglob("*") if p.name.startswith(".stateshift-") or p.name.startswith("in-place-") or p.is_symlink()]


def test_one_run_on_local_disk_is_written_in_place_and_renamed(tmp_path: Path, monkeypatch) -> None:
    spy = _Spy(monkeypatch)
    store = StoreDir(open_location(str(tmp_path), readonly=False), "state/0/4", 0, 4)
    written = RocksDBProvider(in_place_bytes=0).write(store, 3, _batches(ROWS), WriteContext(write_crc=True))
    ssts = [w.rel for w in written if w.rel.endswith(".sst")]
    assert len(ssts) == 1
    assert not [c for c in spy.copied if c.endswith(".sst")], "the table file was copied, not renamed"
    [(tmp, rel)] = spy.renamed
    assert rel == ssts[0]
    assert os.path.dirname(tmp) == str(tmp_path / "state/0/4/SSTs")  # renamed within its directory
    sst = tmp_path / rel
    assert sst.is_file() and not sst.is_symlink()
    assert {w.size for w in written if w.rel == rel} == {sst.stat().st_size}
    # the sidecar is the CRC of the file as it lies in the target
    verify_crc(sst.read_bytes(), (tmp_path / os.path.dirname(rel) / crc_name(os.path.basename(rel))).read_bytes(), str(sst))
    # the version zip names that file with its size (the engine's metadata)
    zip_path = tmp_path / "state/0/4/3.zip"
    with zipfile.ZipFile(zip_path) as z:
        assert os.path.basename(rel) in z.read("metadata").decode()
    assert not _leftovers(tmp_path)
    assert _read(store) == ROWS


def test_several_runs_are_copied_from_the_compaction(tmp_path: Path, monkeypatch) -> None:
    spy = _Spy(monkeypatch)
    store = StoreDir(open_location(str(tmp_path), readonly=False), "state/0/0", 0, 0)
    RocksDBProvider(run_bytes=4096, in_place_bytes=0).write(store, 3, _batches(ROWS, 100), WriteContext(write_crc=False))
    assert not spy.renamed
    assert [c for c in spy.copied if c.endswith(".sst")]
    assert not _leftovers(tmp_path)
    assert _read(store) == ROWS


def test_a_target_off_local_disk_gets_its_table_file_copied(monkeypatch) -> None:
    spy = _Spy(monkeypatch)
    url = f"memory://stateshift-in-place-{uuid.uuid4().hex}"
    loc = open_location(url, readonly=False)
    try:
        assert loc.temp_in("state/0/0/SSTs") is None
        store = StoreDir(loc, "state/0/0", 0, 0)
        RocksDBProvider(in_place_bytes=0).write(store, 3, _batches(ROWS), WriteContext(write_crc=False))
        assert not spy.renamed
        assert [c for c in spy.copied if c.endswith(".sst")]
        assert _read(store) == ROWS
    finally:
        loc.remove("", recursive=True)


def test_a_build_that_fails_after_the_run_leaves_no_temporary_file(tmp_path: Path, monkeypatch) -> None:
    def broken(*args, **kwargs):
        raise CorruptInput("the build failed (test)", "here")

    seen: list[str] = []
    real_write_run = rocksdb_db._write_run

    def watch(keys, values, options, place, where, prefixes):
        path = real_write_run(keys, values, options, place, where, prefixes)
        seen.append(path)
        return path

    monkeypatch.setattr(rocksdb_db, "_write_run", watch)
    monkeypatch.setattr("migrate.providers.rocksdb.build_db", broken)
    store = StoreDir(open_location(str(tmp_path), readonly=False), "state/0/0", 0, 0)
    with pytest.raises(CorruptInput, match="the build failed"):
        RocksDBProvider(in_place_bytes=0).write(store, 3, _batches(ROWS), WriteContext())
    assert seen and os.path.dirname(seen[0]) == str(tmp_path / "state/0/0/SSTs"), "the run was not written in place"
    assert not os.path.exists(seen[0])
    assert not _leftovers(tmp_path)
    assert not list((tmp_path / "state/0/0").glob("*.zip"))


def test_rows_refused_before_the_run_is_placed_make_no_file(tmp_path: Path) -> None:
    twice = ROWS[:10] + ROWS[5:6]
    store = StoreDir(open_location(str(tmp_path), readonly=False), "state/0/0", 0, 0)
    with pytest.raises(CorruptInput, match="same key twice"):
        RocksDBProvider(in_place_bytes=0).write(store, 3, _batches(twice, 4), WriteContext())
    assert not (tmp_path / "state/0/0/SSTs").exists()
    assert not _leftovers(tmp_path)


def test_a_rewritten_version_is_the_same_store_either_way(tmp_path: Path, monkeypatch) -> None:
    """The in-place write and the copy give table files with the same rows and the same size."""
    in_place = StoreDir(open_location(str(tmp_path / "a"), readonly=False), "s", 0, 0)
    RocksDBProvider(in_place_bytes=0).write(in_place, 3, _batches(ROWS), WriteContext(write_crc=False))
    monkeypatch.setattr(Location, "temp_in", lambda loc, rel_dir: None)  # as off local disk
    copied = StoreDir(open_location(str(tmp_path / "b"), readonly=False), "s", 0, 0)
    RocksDBProvider(in_place_bytes=0).write(copied, 3, _batches(ROWS), WriteContext(write_crc=False))
    sizes = [sorted(p.stat().st_size for p in (tmp_path / d / "s/SSTs").glob("*.sst")) for d in ("a", "b")]
    assert sizes[0] == sizes[1] and sizes[0]
    assert _read(in_place) == _read(copied) == ROWS


def test_temp_in_and_commit_temp_refuse_a_read_only_location(tmp_path: Path) -> None:
    loc = open_location(str(tmp_path), readonly=True)
    with pytest.raises(Exception, match="read-only"):
        loc.temp_in("SSTs")
    with pytest.raises(Exception, match="read-only"):
        loc.commit_temp(str(tmp_path / "x"), "y")


def test_a_partition_below_the_threshold_is_built_in_scratch_and_copied(tmp_path: Path, monkeypatch) -> None:
    spy = _Spy(monkeypatch)
    rows_bytes = sum(len(k) + len(v) for k, v in ROWS)
    store = StoreDir(open_location(str(tmp_path), readonly=False), "state/0/0", 0, 0)
    RocksDBProvider(in_place_bytes=10 * rows_bytes).write(store, 3, _batches(ROWS), WriteContext(write_crc=False))
    assert not spy.renamed and [c for c in spy.copied if c.endswith(".sst")]
    spy.copied.clear()
    other = StoreDir(open_location(str(tmp_path), readonly=False), "state/0/1", 0, 1)
    RocksDBProvider(in_place_bytes=rows_bytes).write(other, 3, _batches(ROWS), WriteContext(write_crc=False))
    assert len(spy.renamed) == 1 and not [c for c in spy.copied if c.endswith(".sst")]
    assert _read(store) == _read(other) == ROWS
    assert not _leftovers(tmp_path)


def test_scratch_without_symbolic_links_still_builds_the_partition(tmp_path: Path, monkeypatch) -> None:
    """Where no link can be made in scratch, RocksDB copies the run into its DB, the table file
    is put into the target as before, and the temporary file in the target is removed."""
    spy = _Spy(monkeypatch)

    def no_links(src, dst, *args, **kwargs):
        raise OSError(95, "Operation not supported", dst)

    monkeypatch.setattr(rocksdb_db.os, "symlink", no_links)
    store = StoreDir(open_location(str(tmp_path), readonly=False), "state/0/0", 0, 0)
    RocksDBProvider(in_place_bytes=0).write(store, 3, _batches(ROWS), WriteContext(write_crc=True))
    monkeypatch.undo()
    assert not spy.renamed and [c for c in spy.copied if c.endswith(".sst")]
    assert not _leftovers(tmp_path)
    assert _read(store) == ROWS


def test_commit_temp_syncs_the_file_before_the_rename(tmp_path: Path, monkeypatch) -> None:
    loc = open_location(str(tmp_path), readonly=False)
    tmp = loc.temp_in("SSTs")
    assert tmp is not None and os.path.dirname(tmp) == str(tmp_path / "SSTs")
    Path(tmp).write_bytes(b"table bytes")
    events: list[str] = []
    real_fsync, real_replace = os.fsync, os.replace
    monkeypatch.setattr(os, "fsync", lambda fd: (events.append("fsync"), real_fsync(fd))[1])
    monkeypatch.setattr(os, "replace", lambda a, b: (events.append("rename"), real_replace(a, b))[1])
    loc.commit_temp(tmp, "SSTs/000008-x.sst")
    monkeypatch.undo()
    assert events == ["fsync", "rename"]
    assert (tmp_path / "SSTs/000008-x.sst").read_bytes() == b"table bytes" and not os.path.exists(tmp)
