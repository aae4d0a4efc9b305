"""Prefix-key stores (session windows): the RocksDB two-row key and the heap map's full key row.

* hand-built vectors from the row layout (common practice, see migrate/rows/layout.py) and the
  key layout observed in engine files (``int32 LE`` length of version byte + prefix row, then
  ``0x00`` + prefix row, ``0x00`` + remaining row);
* a property: splitting rows encoded by the reference row writer (``migrate.rows.writer``, an
  independent per-row implementation) gives exactly what that writer produces for the two field
  subsets, and joining gives the full row back;
* the engine's own session-window state: the RocksDB fixture read through the prefix codec equals
  the heap-map fixture of the same query, row for row, at every version; and what we write reads
  back the same and lays keys out as the engine does.
"""

from __future__ import annotations

import shutil
import struct
import zipfile
from pathlib import Path

import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_rows_roundtrip_property import batches

from migrate.errors import CorruptInput, Unsupported
from migrate.providers.base import KEY_SCHEMA, ReadContext, StoreDir, WriteContext
from migrate.providers.facts import read_key_schema, render_key_schema
from migrate.providers.hdfs import HDFSProvider
from migrate.providers.rocksdb import RocksDBProvider
from migrate.providers.rocksdb_keys import (
    decode_prefix_keys,
    encode_prefix_keys,
    field_layouts,
    join_rows,
    split_rows,
)
from migrate.rows.schema import (
    DecimalType,
    LongType,
    StringType,
    StructField,
    StructType,
    TimestampType,
)
from migrate.rows.unsafe_row import encode_rows
from migrate.storage import open_location

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "rocksdb_more"
KEY = StructType((StructField("bay", StringType()), StructField("sessionStartTime", TimestampType())))


def slot(offset: int, size: int) -> bytes:
    return struct.pack("<Q", offset << 32 | size)


def row(bitset: int, *parts: bytes) -> bytes:
    return struct.pack("<Q", bitset) + b"".join(parts)


def test_hand_built_session_key_splits_joins_and_encodes() -> None:
    full = row(0, slot(24, 5), struct.pack("<q", 7), b"north\0\0\0")
    prefix = row(0, slot(16, 5), b"north\0\0\0")
    rest = row(0, struct.pack("<q", 7))
    layouts = field_layouts(KEY, "t")
    p, r = split_rows(pa.array([full]), layouts, 1, "t")
    assert (p[0].as_py(), r[0].as_py()) == (prefix, rest)
    assert join_rows(p, r, layouts, 1, "t")[0].as_py() == full
    key = struct.pack("<i", 1 + len(prefix)) + b"\0" + prefix + b"\0" + rest
    assert encode_prefix_keys(pa.array([full]), layouts, 1, "t")[0].as_py() == key
    assert decode_prefix_keys(pa.array([key]), layouts, 1, "t")[0].as_py() == full


def test_null_and_wide_decimal_fields_keep_their_layout() -> None:
    schema = StructType((StructField("a", StringType()), StructField("d", DecimalType(30, 2)), StructField("n", LongType())))
    # a = null (slot 0, bit 0), d = null but with its 16 reserved bytes (bit 1), n = 5
    full = row(0b011, slot(0, 0), slot(32, 0), struct.pack("<q", 5), bytes(16))
    layouts = field_layouts(schema, "t")
    p, r = split_rows(pa.array([full]), layouts, 1, "t")
    assert p[0].as_py() == row(0b1, slot(0, 0))
    assert r[0].as_py() == row(0b01, slot(24, 0), struct.pack("<q", 5), bytes(16))
    assert join_rows(p, r, layouts, 1, "t")[0].as_py() == full


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(batches(), st.data())
def test_split_matches_the_reference_writer_and_join_inverts_it(batch, data) -> None:
    schema, arr = batch
    if len(schema.fields) < 2:
        return
    arr = arr.filter(arr.is_valid())  # a key row is never null
    k = data.draw(st.integers(1, len(schema.fields) - 1))
    full = encode_rows(arr, schema)
    layouts = field_layouts(schema, "generated")
    p, r = split_rows(full, layouts, k, "generated")

    def subset(lo: int, hi: int) -> pa.Array:
        fields = schema.fields[lo:hi]
        sub = pa.StructArray.from_arrays([arr.field(i) for i in range(lo, hi)], fields=[arr.type.field(i) for i in range(lo, hi)])
        return encode_rows(sub, StructType(fields))

    assert p.to_pylist() == subset(0, k).to_pylist()
    assert r.to_pylist() == subset(k, len(schema.fields)).to_pylist()
    assert join_rows(p, r, layouts, k, "generated").to_pylist() == full.to_pylist()
    keys = encode_prefix_keys(full, layouts, k, "generated")
    assert decode_prefix_keys(keys, layouts, k, "generated").to_pylist() == full.to_pylist()


def test_malformed_prefix_keys_are_refused() -> None:
    layouts = field_layouts(KEY, "t")
    prefix = row(0, slot(16, 5), b"north\0\0\0")
    good = struct.pack("<i", 1 + len(prefix)) + b"\0" + prefix + b"\0" + row(0, struct.pack("<q", 7))
    with pytest.raises(CorruptInput, match="records a prefix of 999 bytes"):
        decode_prefix_keys(pa.array([struct.pack("<i", 999) + good[4:]]), layouts, 1, "k")
    with pytest.raises(Unsupported, match="encoding-version byte 1"):
        decode_prefix_keys(pa.array([good[:4] + b"\1" + good[5:]]), layouts, 1, "k")
    bad_slot = good[:5] + row(0, slot(400, 5), b"north\0\0\0") + good[5 + len(prefix):]
    with pytest.raises(CorruptInput, match="outside its 24-byte row"):
        decode_prefix_keys(pa.array([bad_slot]), layouts, 1, "k")
    with pytest.raises(Unsupported, match="numColsPrefixKey=2"):
        decode_prefix_keys(pa.array([good]), layouts, 2, "k")


# ------------------------------------------------------------------------ engine fixtures
def _store(checkpoint: Path, partition: int) -> StoreDir:
    return StoreDir(open_location(str(checkpoint)), f"state/0/{partition}", 0, partition)


def _rows(provider, store: StoreDir, version: int, ctx: ReadContext) -> list[tuple[bytes, bytes]]:
    out: list[tuple[bytes, bytes]] = []
    for b in provider.read(store, version, ctx):
        out += zip(b.column("key").to_pylist(), b.column("value").to_pylist())
    return sorted(out)


def _versions(checkpoint: Path, partition: int) -> list[int]:
    return sorted(int(p.stem) for p in (checkpoint / "state" / "0" / str(partition)).glob("*.zip"))


@pytest.mark.parametrize("partition", [0, 1])
def test_engine_rocksdb_session_state_equals_the_heap_map_state(partition: int) -> None:
    rocks, heap = FIXTURES / "session_rocksdb", FIXTURES / "session_hdfs"
    versions = _versions(rocks, partition)
    assert len(versions) >= 5
    # the engine writes the schema file under partition 0 only; partition 1 finds it there
    key_schema = read_key_schema(_store(rocks, partition), ReadContext(num_cols_prefix_key=1))
    assert key_schema.simple_string() == "struct<bay:string,sessionStartTime:timestamp>"
    extra = {KEY_SCHEMA: render_key_schema(key_schema)}
    compared = 0
    for v in versions:
        from_rocks = _rows(RocksDBProvider(), _store(rocks, partition), v, ReadContext(num_cols_prefix_key=1, extra=extra))
        from_heap = _rows(HDFSProvider(), _store(heap, partition), v, ReadContext(num_cols_prefix_key=1))
        assert from_rocks == from_heap, f"version {v}"
        compared += len(from_rocks)
    assert compared > 0, "the fixture holds no session rows"


def test_prefix_store_is_written_with_the_engine_key_layout(tmp_path: Path) -> None:
    src = FIXTURES / "session_rocksdb"
    v = _versions(src, 0)[-2]
    ctx = ReadContext(num_cols_prefix_key=1)
    store = _store(src, 0)
    props = RocksDBProvider().store_properties(store, v, ctx)
    assert set(props) == {KEY_SCHEMA}
    rows = _rows(RocksDBProvider(), store, v, ctx)
    assert rows
    target = StoreDir(open_location(str(tmp_path), readonly=False), "state/0/0", 0, 0)
    batch = pa.RecordBatch.from_arrays([pa.array([k for k, _ in rows], pa.binary()), pa.array([x for _, x in rows], pa.binary())],
                                       names=["key", "value"])
    RocksDBProvider().write(target, v, [batch], WriteContext(num_cols_prefix_key=1, extra=props))
    assert _rows(RocksDBProvider(), target, v, ReadContext(num_cols_prefix_key=1, extra=props)) == rows
    # the raw RocksDB keys we wrote are the engine's raw keys
    ours, engine = _raw_keys(tmp_path / "state/0/0", v, tmp_path / "a"), _raw_keys(src / "state/0/0", v, tmp_path / "b")
    assert ours == engine and all(k[:4] != b"\0\0\0\0" for k in ours)


def _raw_keys(part: Path, version: int, scratch: Path) -> list[bytes]:
    from rocksdict import AccessType, Options, Rdict

    from migrate.providers.rocksdb_meta import parse_metadata

    scratch.mkdir()
    z = zipfile.ZipFile(part / f"{version}.zip")
    z.extractall(scratch)
    meta = parse_metadata((scratch / "metadata").read_bytes(), "m")
    (scratch / "metadata").unlink()
    for f in meta.sst_files:
        shutil.copy(part / "SSTs" / f.dfs_name, scratch / f.local_name)
    db = Rdict(str(scratch), options=Options(raw_mode=True), access_type=AccessType.read_only())
    try:
        return list(db.keys())
    finally:
        db.close()


def test_prefix_store_without_a_key_schema_is_refused(tmp_path: Path) -> None:
    part = tmp_path / "state" / "0" / "1"
    shutil.copytree(FIXTURES / "session_rocksdb" / "state" / "0" / "1", part)  # partition 1: no schema file
    store = StoreDir(open_location(str(tmp_path)), "state/0/1", 0, 1)
    with pytest.raises(Unsupported, match="prefix key .*no state schema file"):
        _rows(RocksDBProvider(), store, _versions(tmp_path, 1)[-1], ReadContext(num_cols_prefix_key=1))
    target = StoreDir(open_location(str(tmp_path / "out"), readonly=False), "state/0/1", 0, 1)
    with pytest.raises(Unsupported, match="prefix key .*needs its key schema"):
        RocksDBProvider().write(target, 1, [], WriteContext(num_cols_prefix_key=1))
