"""Column-family stores (transformWithState) read, write and refuse as they should.

Fixtures (tests/fixtures/rocksdb_more, README.md): the same per-bay tally query, event time,
written with plain zips (list-state merge operands left in the tables), with compaction on every
commit (the engine itself resolved the merges) and with changelog checkpointing; plus a
processing-time run with TTL.

* the list values we read from unresolved merge operands are byte-identical to the values the
  engine merged itself, and differ from RocksDB's default ``,``-joined merge (which a reader that
  trusts the engine's OPTIONS file would produce);
* what we write carries the column-family table and counts (numKeys / numInternalKeys) exactly
  as the engine recorded them, and reads back the same rows;
* the heap-map provider refuses such a store with the reason; rows whose family id the table
  does not list are refused;
* operator metadata v2 names state schema files by absolute path, and the copy for a target
  points at the target.
"""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

import pyarrow as pa
import pytest

from migrate.checkpoint.files import engine_root, point_schema_paths_at
from migrate.checkpoint.model import load_checkpoint
from migrate.errors import CorruptInput, Unsupported
from migrate.providers.base import (
    COLUMN_FAMILIES,
    KEY_SCHEMA,
    ReadContext,
    StoreDir,
    WriteContext,
)
from migrate.providers.hdfs import HDFSProvider
from migrate.providers.rocksdb import RocksDBProvider
from migrate.providers.rocksdb_changelog import MERGE_VERSION_CONF
from migrate.providers.rocksdb_meta import parse_column_families, parse_metadata
from migrate.storage import open_location

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "rocksdb_more"


def _conf(name: str) -> dict[str, str]:
    return load_checkpoint(open_location(str(FIXTURES / name))).conf


def _store(root: Path, partition: int = 0, readonly: bool = True) -> StoreDir:
    return StoreDir(open_location(str(root), readonly=readonly), f"state/0/{partition}", 0, partition)


def _rows(root: Path, version: int, conf: dict[str, str], partition: int = 0, extra: dict | None = None) -> list[tuple[bytes, bytes]]:
    out: list[tuple[bytes, bytes]] = []
    for b in RocksDBProvider().read(_store(root, partition), version, ReadContext(conf=conf, extra=extra or {})):
        out += zip(b.column("key").to_pylist(), b.column("value").to_pylist())
    return sorted(out)


def _zip_meta(root: Path, version: int, partition: int = 0):
    raw = zipfile.ZipFile(root / "state" / "0" / str(partition) / f"{version}.zip").read("metadata")
    return parse_metadata(raw, "m")


def _zips(root: Path, partition: int = 0) -> list[int]:
    return sorted(int(p.stem) for p in (root / "state" / "0" / str(partition)).glob("*.zip"))


def _list_family(root: Path, version: int) -> int:
    return _zip_meta(root, version).column_family_mapping["levels"]


@pytest.mark.parametrize("partition", [0, 1])
def test_list_values_equal_the_engine_merged_values(partition: int) -> None:
    plain, compacted = FIXTURES / "tally_rocksdb", FIXTURES / "tally_compacted"
    conf = _conf("tally_rocksdb")
    assert conf.get(MERGE_VERSION_CONF) == "2"
    multi = 0
    for v in _zips(plain, partition):
        ours = _rows(plain, v, conf, partition)
        assert ours == _rows(compacted, v, _conf("tally_compacted"), partition), f"version {v}"
        fam = _list_family(plain, v).to_bytes(2, "little")
        lists = [value for key, value in ours if key[:2] == fam]
        multi += sum(1 for value in lists if len(value) > 21)  # more than one 21-byte element
    assert multi, "no list value with several elements: the merge delimiter is not exercised"


def test_rocksdb_default_delimiter_would_corrupt_the_lists() -> None:
    # where a list key has several unresolved operands in the tables, RocksDB's default
    # string-append operator joins them with "," - the engine (mergeOperatorVersion=2) does not
    plain = FIXTURES / "tally_rocksdb"
    differing = 0
    for partition in (0, 1):
        for v in _zips(plain, partition):
            right = dict(_rows(plain, v, _conf("tally_rocksdb"), partition))
            wrong = dict(_rows(plain, v, {**_conf("tally_rocksdb"), MERGE_VERSION_CONF: "1"}, partition))
            assert right.keys() == wrong.keys()
            for key, value in right.items():
                if value != wrong[key]:
                    differing += 1
                    assert wrong[key].count(b",") >= 1 and len(wrong[key]) > len(value)
    assert differing, "no key with several merge operands in the fixture: the delimiter is not exercised"


@pytest.mark.parametrize("name", ["tally_rocksdb", "tally_ttl"])
def test_written_store_carries_the_family_table_and_counts(tmp_path: Path, name: str) -> None:
    src = FIXTURES / name
    conf = _conf(name)
    v = _zips(src)[-1]
    props = RocksDBProvider().store_properties(_store(src), v, ReadContext(conf=conf))
    assert set(props) == {COLUMN_FAMILIES} and KEY_SCHEMA not in props
    table = parse_column_families(props[COLUMN_FAMILIES], "p")
    engine = _zip_meta(src, v)
    assert (table.mapping, table.internal, table.max_id) == (
        engine.column_family_mapping, engine.column_family_type_map, engine.max_column_family_id)
    if name == "tally_ttl":
        assert any(n.startswith("$ttl_") for n in table.mapping) and any(n.startswith("$procTimers") for n in table.mapping)
    rows = _rows(src, v, conf)
    batch = pa.RecordBatch.from_arrays([pa.array([k for k, _ in rows], pa.binary()), pa.array([x for _, x in rows], pa.binary())],
                                       names=["key", "value"])
    target = tmp_path / "t"
    RocksDBProvider().write(_store(target, readonly=False), v, [batch], WriteContext(conf=conf, extra=props))
    ours = _zip_meta(target, v)
    assert (ours.num_keys, ours.num_internal_keys) == (engine.num_keys, engine.num_internal_keys)
    assert json.dumps(ours.column_family_mapping) == json.dumps(engine.column_family_mapping)  # same order too
    assert ours.column_family_type_map == engine.column_family_type_map
    assert ours.max_column_family_id == engine.max_column_family_id
    assert _rows(target, v, conf) == rows  # read back with the table from the written zip


def test_the_heap_map_refuses_column_families_with_the_reason() -> None:
    src = FIXTURES / "tally_rocksdb"
    props = RocksDBProvider().store_properties(_store(src), _zips(src)[-1], ReadContext(conf=_conf("tally_rocksdb")))
    with pytest.raises(Unsupported, match="column families.*transformWithState.*hdfs provider .*cannot hold"):
        HDFSProvider().check_writable(props, "state/0/0")
    RocksDBProvider().check_writable(props, "state/0/0")  # no error


def test_rows_of_an_unknown_family_are_refused(tmp_path: Path) -> None:
    src = FIXTURES / "tally_rocksdb"
    props = RocksDBProvider().store_properties(_store(src), _zips(src)[-1], ReadContext(conf=_conf("tally_rocksdb")))
    batch = pa.RecordBatch.from_arrays([pa.array([b"\x63\x00\x00row"]), pa.array([b"\x00v"])], names=["key", "value"])
    with pytest.raises(CorruptInput, match="column-family id 99"):
        RocksDBProvider().write(_store(tmp_path, readonly=False), 1, [batch], WriteContext(extra=props))


def test_operator_metadata_points_its_schema_files_at_the_target(tmp_path: Path) -> None:
    meta_file = FIXTURES / "tally_rocksdb" / "state" / "0" / "_metadata" / "v2" / "0"
    data = meta_file.read_bytes()
    body = json.loads(data.split(b"\n", 1)[1])
    (old,) = body["stateStoreInfo"][0]["stateSchemaFilePaths"]
    assert old.startswith("file:/") and "/state/0/_stateSchema/default/" in old
    # re-rendering without a change gives the engine's bytes back (json4s compact style)
    assert (b"v2\n" + json.dumps(body, separators=(",", ":"), ensure_ascii=False).encode()) == data.rstrip(b"\n")
    dst = open_location(str(tmp_path / "target"), readonly=False)
    new = point_schema_paths_at(data, dst, "m")
    (path,) = json.loads(new.split(b"\n", 1)[1])["stateStoreInfo"][0]["stateSchemaFilePaths"]
    assert path == f"{engine_root(dst, old)}/state/0/_stateSchema/default/{old.rsplit('/', 1)[1]}"
    assert path.startswith("file:" + str((tmp_path / "target").resolve()))
    assert new.replace(path.encode(), old.encode()) == data.rstrip(b"\n")
    assert point_schema_paths_at(new, dst, "m") == new  # already pointing at the target: unchanged
    with pytest.raises(CorruptInput, match="not under state/<op>/_stateSchema"):
        point_schema_paths_at(data.replace(b"/_stateSchema/", b"/elsewhere/"), dst, "m")
