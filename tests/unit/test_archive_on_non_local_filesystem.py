"""Export and import work through fsspec on a filesystem that is not local disk (the in-memory
filesystem stands in for an object store: no renames, no fsync, writes go through fs.open)."""

from __future__ import annotations

import uuid
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from migrate.archive.reader import check_archive, load_manifest
from migrate.commands.export import export
from migrate.commands.import_archive import import_archive
from migrate.commands.verify import verify
from migrate.errors import CorruptInput
from migrate.storage import open_location

DEMO = Path(__file__).resolve().parents[2] / "demo_checkpoints"


@pytest.fixture
def memory_url():
    url = f"memory://stateshift-test-{uuid.uuid4().hex}"
    yield url
    loc = open_location(url, readonly=False)
    loc.remove("", recursive=True)


@pytest.mark.parametrize("to", ["hdfs", "rocksdb"])
def test_archive_on_a_non_local_filesystem_round_trips(tmp_path, memory_url, to):
    src = open_location(str(DEMO / "greenhouse_totals_rocksdb"))
    archive = open_location(f"{memory_url}/archive", readonly=False)
    assert not archive.is_local
    report = export(src, archive, jobs=1)
    manifest = load_manifest(open_location(f"{memory_url}/archive"))
    assert manifest.rows == report.manifest.rows > 0
    assert check_archive(archive, manifest) > 0
    with archive.open_read(manifest.data_files[0].path) as f:
        assert pq.ParquetFile(f).schema_arrow.names[:2] == ["key", "value"]

    dst = open_location(str(tmp_path / "restored"), readonly=False)
    assert import_archive(open_location(f"{memory_url}/archive"), dst, to, jobs=1).to_json()["verified"]
    assert verify(src, dst)["identical"] is True
    remote_dst = open_location(f"{memory_url}/restored", readonly=False)
    assert import_archive(open_location(f"{memory_url}/archive"), remote_dst, to, jobs=1).to_json()["verified"]
    assert verify(src, remote_dst)["identical"] is True


def test_tampering_is_caught_on_a_non_local_filesystem(memory_url):
    src = open_location(str(DEMO / "greenhouse_totals_hdfs"))
    archive = open_location(f"{memory_url}/archive", readonly=False)
    export(src, archive, jobs=1)
    manifest = load_manifest(archive)
    rel = manifest.data_files[0].path
    data = bytearray(archive.read_bytes(rel))
    data[10] ^= 0xFF
    archive.write_bytes(rel, bytes(data))
    with pytest.raises(CorruptInput, match="SHA-256 does not match") as info:
        check_archive(archive, manifest)
    assert rel in str(info.value)
