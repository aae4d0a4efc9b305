"""Rebuilding versions from engine-written changelog checkpoints (tests/fixtures/rocksdb_more).

The fixtures ran the same queries on the same input, one micro-batch sequence each, with and
without changelog checkpointing (and, for the session windows, on the heap-map provider too), so a
version has one true content, whichever files hold it:

* every version of the changelog checkpoint, rebuilt from its newest zip plus changelogs (or from
  changelogs alone before the first zip), equals the same version of the heap-map checkpoint
  (session windows: prefix-key store, v1 changelogs with deletes) or of the zip-only RocksDB
  checkpoint (transformWithState: column families, v2 changelogs with merges and deletes);
* a version that has a zip reads the same from its zip as rebuilt without it;
* a gap in the chain or a damaged changelog is an error naming the file.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from migrate.checkpoint.model import load_checkpoint
from migrate.errors import CorruptInput
from migrate.providers.base import ReadContext, StoreDir
from migrate.providers.hdfs import HDFSProvider
from migrate.providers.rocksdb import RocksDBProvider
from migrate.storage import open_location

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "rocksdb_more"


def conf_of(checkpoint: Path) -> dict[str, str]:
    return load_checkpoint(open_location(str(checkpoint))).conf


def store(checkpoint: Path, partition: int) -> StoreDir:
    return StoreDir(open_location(str(checkpoint)), f"state/0/{partition}", 0, partition)


def rows(provider, checkpoint: Path, partition: int, version: int, prefix: int = 0) -> list[tuple[bytes, bytes]]:
    ctx = ReadContext(conf=conf_of(checkpoint), num_cols_prefix_key=prefix)
    out: list[tuple[bytes, bytes]] = []
    for b in provider.read(store(checkpoint, partition), version, ctx):
        out += zip(b.column("key").to_pylist(), b.column("value").to_pylist())
    return sorted(out)


def files(checkpoint: Path, partition: int, suffix: str) -> list[int]:
    return sorted(int(p.stem) for p in (checkpoint / "state" / "0" / str(partition)).glob(f"*.{suffix}"))


CASES = [
    # (changelog fixture, reference fixture, reference provider, numColsPrefixKey)
    pytest.param("session_changelog", "session_hdfs", HDFSProvider, 1, id="session-windows-vs-heap-map"),
    pytest.param("tally_changelog", "tally_rocksdb", RocksDBProvider, 0, id="transform-with-state-vs-zips"),
]


@pytest.mark.parametrize("partition", [0, 1])
@pytest.mark.parametrize(("name", "reference", "ref_provider", "prefix"), CASES)
def test_every_version_rebuilds_to_the_reference_state(name, reference, ref_provider, prefix, partition) -> None:
    ckpt = FIXTURES / name
    changelogs, zips = files(ckpt, partition, "changelog"), files(ckpt, partition, "zip")
    assert changelogs == list(range(1, changelogs[-1] + 1)) and len(changelogs) >= 6
    assert zips and set(changelogs) - set(zips), "the fixture needs versions held only in changelogs"
    assert any(v < min(zips) for v in changelogs) or min(zips) == 1
    compared = 0
    for v in changelogs:
        ours = rows(RocksDBProvider(), ckpt, partition, v, prefix)
        assert ours == rows(ref_provider(), FIXTURES / reference, partition, v, prefix), f"version {v}"
        compared += len(ours)
    assert compared, "no rows in any version: the comparison proves nothing"


@pytest.mark.parametrize("name, prefix", [("session_changelog", 1), ("tally_changelog", 0)])
def test_a_zip_version_rebuilt_without_its_zip_reads_the_same(tmp_path: Path, name: str, prefix: int) -> None:
    ckpt = tmp_path / name
    shutil.copytree(FIXTURES / name, ckpt)
    zips = files(ckpt, 0, "zip")
    later = [z for z in zips if z > min(zips)]
    assert later, "needs two zips"
    for z in later:
        expected = rows(RocksDBProvider(), ckpt, 0, z, prefix)
        part = ckpt / "state" / "0" / "0"
        (part / f"{z}.zip").rename(tmp_path / f"{z}.zip")
        (part / f".{z}.zip.crc").unlink(missing_ok=True)
        listing = open_location(str(part)).list_dir("")
        assert RocksDBProvider().plan(store(ckpt, 0), z, listing)[1][-1] == f"{z}.changelog"
        assert rows(RocksDBProvider(), ckpt, 0, z, prefix) == expected
        (tmp_path / f"{z}.zip").rename(part / f"{z}.zip")


def test_a_gap_in_the_chain_is_an_error_not_a_partial_state(tmp_path: Path) -> None:
    ckpt = tmp_path / "c"
    shutil.copytree(FIXTURES / "session_changelog", ckpt)
    part = ckpt / "state" / "0" / "0"
    zips, changelogs = files(ckpt, 0, "zip"), files(ckpt, 0, "changelog")
    target = next(v for v in changelogs if v not in zips and v - 1 in zips and v - 1 > min(zips))
    (part / f"{target - 1}.zip").unlink()  # rebuild from the zip before, through the changelog removed next
    (part / f"{target - 1}.changelog").unlink()
    with pytest.raises(CorruptInput, match=rf"{target - 1}\.changelog is missing"):
        rows(RocksDBProvider(), ckpt, 0, target, 1)


def test_a_damaged_changelog_is_named(tmp_path: Path) -> None:
    ckpt = tmp_path / "c"
    shutil.copytree(FIXTURES / "tally_changelog", ckpt)
    part = ckpt / "state" / "0" / "0"
    zips = files(ckpt, 0, "zip")
    v = next(v for v in files(ckpt, 0, "changelog") if v not in zips)
    data = bytearray((part / f"{v}.changelog").read_bytes())
    data[len(data) // 2] ^= 0xFF
    (part / f"{v}.changelog").write_bytes(bytes(data))
    with pytest.raises(CorruptInput, match=rf"{v}\.changelog"):
        rows(RocksDBProvider(), ckpt, 0, v)
    (part / f".{v}.changelog.crc").unlink()  # without the sidecar the codec's own checksum catches it
    with pytest.raises(CorruptInput, match=rf"{v}\.changelog"):
        rows(RocksDBProvider(), ckpt, 0, v)


def test_source_files_of_a_rebuilt_version_name_the_zip_and_the_changelogs() -> None:
    ckpt = FIXTURES / "session_changelog"
    zips, changelogs = files(ckpt, 0, "zip"), files(ckpt, 0, "changelog")
    v = next(v for v in changelogs if v not in zips and v > min(zips))
    base = max(z for z in zips if z < v)
    names = [f.rel.rsplit("/", 1)[-1] for f in RocksDBProvider().source_files(store(ckpt, 0), v, ReadContext())]
    assert names[0] == f"{base}.zip"
    assert names[-(v - base):] == [f"{x}.changelog" for x in range(base + 1, v + 1)]
    assert all(n.endswith(".sst") for n in names[1 : -(v - base)])
    assert RocksDBProvider().versions(open_location(str(ckpt / "state/0/0")).list_dir("")) == changelogs


def test_merge_operands_left_in_the_snapshot_resolve_like_the_engine_after_a_replay(tmp_path: Path) -> None:
    # a version made of a zip whose tables hold several list-state merge operands for a key and a
    # changelog that does not touch that key: the operands must still be joined the engine's way
    from migrate.codecs import codec_for
    from migrate.providers.rocksdb_changelog import render_changelog

    ckpt = tmp_path / "c"
    shutil.copytree(FIXTURES / "tally_changelog", ckpt)
    part = ckpt / "state" / "0" / "0"
    base = 3  # its tables hold unresolved operands (checked: the rows differ under the "," join)
    conf = conf_of(ckpt)
    at_base = rows(RocksDBProvider(), ckpt, 0, base)
    comma = ReadContext(conf={**conf, "spark.sql.streaming.stateStore.rocksdb.mergeOperatorVersion": "1"})
    joined = sorted(
        (k, v) for b in RocksDBProvider().read(store(ckpt, 0), base, comma) for k, v in zip(b.column("key").to_pylist(), b.column("value").to_pylist())
    )
    assert joined != at_base, "the base zip has no key with several operands"
    (part / f"{base + 1}.changelog").write_bytes(codec_for("lz4").compress(render_changelog([], 2)))
    (part / f".{base + 1}.changelog.crc").unlink()
    (part / f"{base + 1}.zip").unlink(missing_ok=True)
    assert rows(RocksDBProvider(), ckpt, 0, base + 1) == at_base
