"""Every inconsistency in a RocksDB partition is a one-line error naming the file, never a
partial result, and the reader never writes outside its own temporary folder."""

from __future__ import annotations

import io
import json
import os
import shutil
import zipfile
from pathlib import Path

import pyarrow as pa
import pytest

from migrate.errors import CorruptInput, Unsupported
from migrate.providers.base import ReadContext, StoreDir, WriteContext
from migrate.providers.rocksdb import TRACK_ROWS_CONF, RocksDBProvider
from migrate.providers.rocksdb_meta import zip_checkpoint
from migrate.storage import open_location

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "rocksdb"
V3_SSTS = ["000008-066e0d26-c3a7-454f-98e7-6e151909b059.sst", "000009-511cff6d-d4a2-4e10-983b-1e766dd18715.sst",
           "000010-20af6807-e202-48df-a958-2550843707e4.sst"]  # fmt: skip


@pytest.fixture
def scratch(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Route the reader's temporary folders into a folder the test can inspect."""
    folder = tmp_path / "scratch"
    folder.mkdir()
    monkeypatch.setenv("STATESHIFT_SCRATCH", str(folder))  # migrate.scratch: the user's choice wins
    return folder


def _engine_copy(tmp_path: Path) -> Path:
    part = tmp_path / "part"
    shutil.copytree(FIXTURES / "agg_p0", part)
    return part


def _read(part: Path, version: int, conf: dict[str, str] | None = None, prefix: int = 0) -> int:
    store = StoreDir(open_location(str(part)), "", 0, 0)
    return sum(b.num_rows for b in RocksDBProvider().read(store, version, ReadContext(conf=conf or {}, num_cols_prefix_key=prefix)))


def _rezip(path: Path, change) -> None:
    """Rewrite a zip with ``change(members)`` applied; drops the (now stale) sidecar."""
    with zipfile.ZipFile(path) as z:
        members = {i.filename: z.read(i) for i in z.infolist()}
    change(members)
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        for name, data in members.items():
            z.writestr(zipfile.ZipInfo(name), data)
    path.write_bytes(buf.getvalue())
    (path.parent / f".{path.name}.crc").unlink(missing_ok=True)


def test_missing_sst_is_named(tmp_path: Path, scratch: Path) -> None:
    part = _engine_copy(tmp_path)
    (part / "SSTs" / V3_SSTS[1]).unlink()
    with pytest.raises(CorruptInput, match=f"SSTs/{V3_SSTS[1]}.*missing"):
        _read(part, 3)
    assert _read(part, 1) == 2  # version 1 does not need that file
    assert os.listdir(scratch) == []


def test_sst_size_mismatch_is_named(tmp_path: Path, scratch: Path) -> None:
    part = _engine_copy(tmp_path)
    with open(part / "SSTs" / V3_SSTS[2], "ab") as f:
        f.write(b"\0")
    with pytest.raises(CorruptInput, match=f"{V3_SSTS[2]}.*1270 bytes, the metadata records 1269"):
        _read(part, 3)


def test_zip_slip_member_is_refused_and_nothing_is_written_outside(tmp_path: Path, scratch: Path) -> None:
    part = _engine_copy(tmp_path)
    _rezip(part / "3.zip", lambda m: m.update({"../../escaped-marker": b"x", "/tmp/escaped-marker-abs": b"x"}))
    with pytest.raises(CorruptInput, match="not a plain file name") as info:
        _read(part, 3)
    assert "3.zip" in str(info.value)
    assert not list(tmp_path.rglob("escaped-marker*")) and not os.path.exists("/tmp/escaped-marker-abs")
    assert os.listdir(scratch) == []


def test_zip_checksum_mismatch_is_corrupt(tmp_path: Path) -> None:
    part = _engine_copy(tmp_path)
    crc = bytearray((part / ".3.zip.crc").read_bytes())
    crc[-1] ^= 0xFF
    (part / ".3.zip.crc").write_bytes(bytes(crc))
    with pytest.raises(CorruptInput, match="checksum mismatch"):
        _read(part, 3)


def test_num_keys_mismatch_is_corrupt_unless_rows_are_not_tracked(tmp_path: Path) -> None:
    part = _engine_copy(tmp_path)
    _rezip(part / "3.zip", lambda m: m.update(metadata=m["metadata"].replace(b'"numKeys":2', b'"numKeys":5')))
    with pytest.raises(CorruptInput, match="holds 2 keys.*numKeys=5"):
        _read(part, 3)
    assert _read(part, 3, {TRACK_ROWS_CONF: "false"}) == 2


def test_missing_metadata_or_current_is_corrupt(tmp_path: Path) -> None:
    part = _engine_copy(tmp_path)
    _rezip(part / "2.zip", lambda m: m.pop("metadata"))
    _rezip(part / "3.zip", lambda m: m.pop("CURRENT"))
    with pytest.raises(CorruptInput, match="no 'metadata' member"):
        _read(part, 2)
    with pytest.raises(CorruptInput, match="no CURRENT"):
        _read(part, 3)


def test_column_family_table_that_does_not_fit_is_corrupt(tmp_path: Path) -> None:
    # column families are read (see test_rocksdb_changelog_*); a table whose ids exceed
    # maxColumnFamilyId, or keys whose 2-byte family id the table does not list, are refused
    part = _engine_copy(tmp_path)
    _rezip(
        part / "3.zip",
        lambda m: m.update(metadata=m["metadata"].replace(b'"columnFamilyMapping":{}', b'"columnFamilyMapping":{"default":0,"x":1}')),
    )
    with pytest.raises(CorruptInput, match="has id 1, not in 0..maxColumnFamilyId=0"):
        _read(part, 3)
    _rezip(
        part / "2.zip",
        lambda m: m.update(
            metadata=m["metadata"]
            .replace(b'"columnFamilyMapping":{}', b'"columnFamilyMapping":{"x":9}')
            .replace(b'"maxColumnFamilyId":0', b'"maxColumnFamilyId":9')
        ),
    )
    with pytest.raises(CorruptInput, match="column-family id 0, which the column-family table does not list"):
        _read(part, 2)


def test_missing_version_and_version_zero(tmp_path: Path) -> None:
    part = _engine_copy(tmp_path)
    with pytest.raises(CorruptInput, match=r"version 7 has no snapshot file 7\.zip"):
        _read(part, 7)
    assert _read(part, 0) == 0  # version 0 is the empty store the engine starts from


def test_unique_id_zip_needs_the_id_from_the_commit_log(tmp_path: Path) -> None:
    part = _engine_copy(tmp_path)
    shutil.copy(part / "3.zip", part / "4_5f1c0de2-aaaa-bbbb-cccc-0123456789ab.zip")
    with pytest.raises(CorruptInput, match="4_5f1c0de2-aaaa-bbbb-cccc-0123456789ab.zip.*commit log names no id"):
        _read(part, 4)
    store = StoreDir(open_location(str(part)), "", 0, 0)
    ctx = ReadContext(checkpoint_id="5f1c0de2-aaaa-bbbb-cccc-0123456789ab")
    assert sum(b.num_rows for b in RocksDBProvider().read(store, 4, ctx)) == _read(part, 3)


@pytest.mark.parametrize(
    "conf, prefix, message",
    [
        ({}, 1, "prefix key"),
        ({"spark.sql.streaming.stateStore.encodingFormat": "avro"}, 0, "avro"),
        ({"spark.sql.streaming.stateStore.rowChecksum.enabled": "true"}, 0, "checksums"),
    ],
)
def test_other_row_encodings_are_unsupported_both_ways(tmp_path: Path, conf: dict[str, str], prefix: int, message: str) -> None:
    part = _engine_copy(tmp_path)
    with pytest.raises(Unsupported, match=message):
        _read(part, 3, conf, prefix)
    target = StoreDir(open_location(str(tmp_path / "out"), readonly=False), "p", 0, 0)
    with pytest.raises(Unsupported, match=message):
        RocksDBProvider().write(target, 1, [], WriteContext(conf=conf, num_cols_prefix_key=prefix))


def _raw_partition(folder: Path, pairs: list[tuple[bytes, bytes]]) -> None:
    """A version-1 partition whose RocksDB holds ``pairs`` exactly as given (no prefix added)."""
    from rocksdict import Checkpoint, Options, Rdict

    from migrate.providers.rocksdb_meta import (
        SharedFile,
        VersionMetadata,
        render_metadata,
    )

    db_dir, cp_dir = folder / "db", folder / "cp"
    db = Rdict(str(db_dir), options=Options(raw_mode=True))
    for k, v in pairs:
        db[k] = v
    db.flush()
    Checkpoint(db).create_checkpoint(str(cp_dir))
    db.close()
    (folder / "SSTs").mkdir()
    shared = []
    for name in sorted(n for n in os.listdir(cp_dir) if n.endswith(".sst")):
        dfs = name.replace(".sst", "-0000.sst")
        shutil.copy(cp_dir / name, folder / "SSTs" / dfs)
        shared.append(SharedFile(name, dfs, (cp_dir / name).stat().st_size))
    meta = render_metadata(VersionMetadata(sst_files=tuple(shared), num_keys=len(pairs)))
    (folder / "1.zip").write_bytes(zip_checkpoint(str(cp_dir), meta, "1.zip"))
    shutil.rmtree(db_dir)
    shutil.rmtree(cp_dir)


def test_unknown_encoding_version_byte_is_unsupported(tmp_path: Path) -> None:
    _raw_partition(tmp_path, [(b"\x00k1", b"\x00v"), (b"\x01k2", b"\x00v")])
    with pytest.raises(Unsupported, match="encoding-version byte 1"):
        _read(tmp_path, 1)


def test_key_without_version_byte_is_corrupt(tmp_path: Path) -> None:
    _raw_partition(tmp_path, [(b"\x00k1", b"")])
    with pytest.raises(CorruptInput, match="empty"):
        _read(tmp_path, 1)


def test_corrupt_table_block_is_an_error_not_a_short_read(tmp_path: Path, scratch: Path) -> None:
    # Many rows, so the SST has many data blocks; flip bytes in the middle one. rocksdict's
    # items() view would stop there silently; the reader must raise instead. Row tracking is
    # off so the numKeys cross-check cannot be what catches it.
    rows = 20000
    keys = pa.array([b"key-%08d" % i for i in range(rows)], pa.binary())
    values = pa.array([os.urandom(40) for _ in range(rows)], pa.binary())
    target = StoreDir(open_location(str(tmp_path / "out"), readonly=False), "p", 0, 0)
    written = RocksDBProvider().write(
        target, 1, [pa.RecordBatch.from_arrays([keys, values], names=["key", "value"])], WriteContext(write_crc=False)
    )
    (sst,) = [tmp_path / "out" / w.rel for w in written if w.rel.endswith(".sst")]
    data = bytearray(sst.read_bytes())
    middle = len(data) // 3
    data[middle : middle + 8] = bytes(b ^ 0xFF for b in data[middle : middle + 8])
    sst.write_bytes(bytes(data))
    seen = 0
    with pytest.raises(CorruptInput, match="[Cc]orruption|checksum") as info:
        for batch in RocksDBProvider().read(target, 1, ReadContext(conf={TRACK_ROWS_CONF: "false"})):
            seen += batch.num_rows
    assert "1.zip" in str(info.value)
    assert seen < rows
    assert os.listdir(scratch) == []


def _plain_db(path: Path, keys: list[bytes]) -> None:
    from rocksdict import Options, Rdict

    options = Options(raw_mode=True)
    options.create_if_missing(True)
    db = Rdict(str(path), options=options)
    for k in keys:
        db[k] = b"v" + k
    db.close()


@pytest.mark.parametrize(
    ("last", "complete"),
    [(b"k-0299", True), (b"k-0150", False), (None, False), (b"k-0150x", False), (b"k-0", False)],
)
def test_a_scan_that_ended_early_is_caught(tmp_path: Path, last: bytes | None, complete: bool) -> None:
    """The completeness check behind the reader's scan (rocksdict's items() view ends silently on
    an unreadable block): given the last key a scan gave, keys left after it are an error."""
    from rocksdict import AccessType, Options, Rdict, ReadOptions

    from migrate.providers.rocksdb_db import _check_scan_complete

    _plain_db(tmp_path / "db", [b"k-%04d" % i for i in range(300)])
    db = Rdict(str(tmp_path / "db"), options=Options(raw_mode=True), access_type=AccessType.read_only())
    try:
        if complete:
            _check_scan_complete(db, ReadOptions(), last, "p/1.zip")
        else:
            with pytest.raises(CorruptInput, match="ended early") as info:
                _check_scan_complete(db, ReadOptions(), last, "p/1.zip")
            assert info.value.path == "p/1.zip"
    finally:
        db.close()


def test_an_empty_scan_of_an_empty_store_is_complete(tmp_path: Path) -> None:
    from rocksdict import AccessType, Options, Rdict, ReadOptions

    from migrate.providers.rocksdb_db import _check_scan_complete, iterate

    _plain_db(tmp_path / "db", [])
    assert list(iterate(str(tmp_path / "db"), "p/1.zip")) == []
    db = Rdict(str(tmp_path / "db"), options=Options(raw_mode=True), access_type=AccessType.read_only())
    try:
        _check_scan_complete(db, ReadOptions(), None, "p/1.zip")
    finally:
        db.close()


def test_the_scan_gives_every_row_in_order_across_batches(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from migrate.providers import rocksdb_db

    monkeypatch.setattr(rocksdb_db, "BATCH_ROWS", 7)  # many batches, the last one short
    keys = sorted(os.urandom(5) for _ in range(100))
    _plain_db(tmp_path / "db", keys)
    got = list(rocksdb_db.iterate(str(tmp_path / "db"), "p/1.zip"))
    assert [len(k) for k, _ in got] == [7] * 14 + [2]
    assert [x for k, _ in got for x in k.to_pylist()] == keys
    assert [x for _, v in got for x in v.to_pylist()] == [b"v" + k for k in keys]


def test_abandoned_read_removes_its_temporary_folder(tmp_path: Path, scratch: Path) -> None:
    part = _engine_copy(tmp_path)
    store = StoreDir(open_location(str(part)), "", 0, 0)
    gen = RocksDBProvider().read(store, 3, ReadContext())
    next(gen)
    assert len(os.listdir(scratch)) == 1
    gen.close()
    assert os.listdir(scratch) == []


def test_source_is_never_written(tmp_path: Path) -> None:
    part = _engine_copy(tmp_path)
    before = {p: p.read_bytes() for p in part.rglob("*") if p.is_file()}
    assert _read(part, 3) == 2
    after = {p: p.read_bytes() for p in part.rglob("*") if p.is_file()}
    assert after == before
    assert json.loads(zipfile.ZipFile(part / "3.zip").read("metadata").split(b"\n", 1)[1])["numKeys"] == 2
