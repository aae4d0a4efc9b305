"""Our reader decodes zips and SSTs the engine wrote, to rows we can derive by hand.

The expected rows are built here from the sample's input (see tests/fixtures/rocksdb/README.md)
and the engine's binary row layout as we know it from memory (common practice for this format):
a null bitset of one 8-byte word per 64 fields, one 8-byte little-endian slot per field, and for
a variable-length field the slot holds ``offset << 32 | size`` pointing past the fixed region,
the bytes padded to a multiple of 8.
"""

from __future__ import annotations

import shutil
import struct
from pathlib import Path

import pytest

from migrate.providers.base import ROW_SCHEMA, ReadContext, StoreDir
from migrate.providers.rocksdb import RocksDBProvider
from migrate.storage import open_location

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "rocksdb"


def row(*fields: object) -> bytes:
    """A row of longs, doubles, strings and nulls in the layout described above."""
    n = len(fields)
    bitset = 0
    slots: list[bytes] = []
    tail = b""
    fixed = 8 * ((n + 63) // 64) + 8 * n
    for i, f in enumerate(fields):
        if f is None:
            bitset |= 1 << i
            slots.append(b"\0" * 8)
        elif isinstance(f, float):
            slots.append(struct.pack("<d", f))
        elif isinstance(f, int):
            slots.append(struct.pack("<q", f))
        else:
            data = f.encode("utf-8")
            slots.append(struct.pack("<Q", ((fixed + len(tail)) << 32) | len(data)))
            tail += data + b"\0" * (-len(data) % 8)
    return struct.pack("<Q", bitset) + b"".join(slots) + tail


def expected_rows(version: int) -> list[tuple[bytes, bytes]]:
    """State of partition 0 (keys "key0" and null) after ``version`` input files."""
    groups: dict[str | None, list[tuple[int, float]]] = {}
    for i in range(version):
        for j in range(5):
            k = None if j == 4 else f"key{j % 3}"
            groups.setdefault(k, []).append((j + i, float(j)))
    out = []
    for k in ("key0", None):
        recs = groups[k]
        value = row(len(recs), sum(n for n, _ in recs), sum(v for _, v in recs), len(recs), max(v for _, v in recs))
        out.append((row(k), value))
    return sorted(out)


def _store(path: Path) -> StoreDir:
    return StoreDir(open_location(str(path)), "", 0, 0)


def _read(store: StoreDir, version: int) -> list[tuple[bytes, bytes]]:
    rows: list[tuple[bytes, bytes]] = []
    for batch in RocksDBProvider().read(store, version, ReadContext()):
        assert batch.schema.equals(ROW_SCHEMA)
        rows += zip(batch.column("key").to_pylist(), batch.column("value").to_pylist())
    return rows


@pytest.mark.parametrize("version", [1, 2, 3])
def test_engine_versions_decode_to_hand_built_rows(version: int) -> None:
    rows = _read(_store(FIXTURES / "agg_p0"), version)
    assert sorted(rows) == expected_rows(version)
    assert rows == sorted(rows)  # key order of the RocksDB (byte-wise) is kept


def test_versions_and_source_files_of_engine_sample() -> None:
    store = _store(FIXTURES / "agg_p0")
    provider = RocksDBProvider()
    assert provider.versions(store.location.list_dir("")) == [1, 2, 3]
    files = provider.source_files(store, 3, ReadContext())
    names = [f.rel for f in files]
    assert names[0] == "3.zip" and len(names) == 4  # the zip and the three SSTs version 3 needs
    assert all(n.startswith("SSTs/") and n.endswith(".sst") for n in names[1:])
    for f in files:
        assert (FIXTURES / "agg_p0" / f.rel).stat().st_size == f.size


def test_engine_empty_partition_reads_as_no_rows() -> None:
    store = _store(FIXTURES / "empty_p0")
    assert RocksDBProvider().versions(store.location.list_dir("")) == [3]
    assert _read(store, 3) == []


def test_changelog_only_versions_are_listed_and_rebuilt() -> None:
    # this partition never received a row: every changelog is just the end marker
    store = _store(FIXTURES / "changelog_p0")
    provider = RocksDBProvider()
    listing = store.location.list_dir("")
    assert provider.snapshot_versions(listing) == []
    assert provider.versions(listing) == provider.changelog_versions(listing) == [1, 2, 3]
    assert provider.plan(store, 2, listing) == (None, ["1.changelog", "2.changelog"])
    assert _read(store, 2) == []


def test_changelog_after_a_zip_is_applied_not_ignored(tmp_path: Path) -> None:
    from migrate.codecs import codec_for
    from migrate.providers.rocksdb_changelog import DELETE, Record, render_changelog

    part = tmp_path / "p"
    shutil.copytree(FIXTURES / "agg_p0", part)
    gone = b"\x00" + row("key0")  # the RocksDB key: version byte + key row
    (part / "4.changelog").write_bytes(codec_for("lz4").compress(render_changelog([Record(DELETE, gone, None)])))
    assert sorted(_read(_store(part), 4)) == [r for r in expected_rows(3) if r[0] != row("key0")]
    assert sorted(_read(_store(part), 3)) == expected_rows(3)  # a version with a zip still reads from it
