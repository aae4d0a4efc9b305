"""Data files: raw bytes kept exactly, typed columns right, hashes true, streaming per batch; and
the archive check refuses missing, truncated, changed and unlisted files."""

from __future__ import annotations

import datetime as dt
import decimal
import hashlib
import json
import struct
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from migrate.archive.columns import decoder_for, find_schema_file, raw_decoder
from migrate.archive.manifest import ArchivedFile, DataFile, Manifest
from migrate.archive.reader import check_archive, read_rows
from migrate.archive.writer import (
    copy_verbatim,
    data_file_rel,
    write_data_file,
    write_manifest,
)
from migrate.digest import digest_batches
from migrate.errors import CorruptInput
from migrate.providers.base import ROW_SCHEMA
from migrate.rows.schema import spark_type_from_json
from migrate.rows.writer import encode_rows
from migrate.storage import open_location

KEY_JSON = {"type": "struct", "fields": [
    {"name": "bay", "type": "string", "nullable": True, "metadata": {}},
    {"name": "rack", "type": "integer", "nullable": True, "metadata": {}},
]}
VALUE_JSON = {"type": "struct", "fields": [
    {"name": "sum", "type": "decimal(20,2)", "nullable": True, "metadata": {}},
    {"name": "sum", "type": "long", "nullable": True, "metadata": {}},
    {"name": "seen", "type": "timestamp", "nullable": True, "metadata": {}},
    {"name": "levels", "type": {"type": "array", "elementType": "integer", "containsNull": True}, "nullable": True, "metadata": {}},
]}


def _utf(text: str) -> bytes:  # Java DataOutputStream.writeUTF for ASCII text
    data = text.encode()
    return struct.pack(">H", len(data)) + data


SCHEMA_V1 = _utf("v1") + _utf(json.dumps(KEY_JSON)) + _utf(json.dumps(VALUE_JSON))


def rows(n: int, start: int = 0) -> tuple[pa.RecordBatch, list[dict], list[dict]]:
    keys = [{"bay": None if i % 5 == 0 else f"bay-{i}", "rack": None if i % 7 == 0 else i} for i in range(start, start + n)]
    values = [
        {
            "sum": decimal.Decimal(i * 1000003) / 100,
            "sum_long": -i,
            "seen": dt.datetime(2031, 4, 2, 6, 0, tzinfo=dt.timezone.utc) + dt.timedelta(seconds=i),
            "levels": None if i % 3 == 0 else list(range(i % 4)),
        }
        for i in range(start, start + n)
    ]
    kt = spark_type_from_json(KEY_JSON)
    vt = spark_type_from_json(VALUE_JSON)
    kstruct = pa.array([(k["bay"], k["rack"]) for k in keys], pa.struct([("bay", pa.string()), ("rack", pa.int32())]))
    vstruct = pa.StructArray.from_arrays(
        [pa.array([v["sum"] for v in values], pa.decimal128(20, 2)), pa.array([v["sum_long"] for v in values], pa.int64()),
         pa.array([v["seen"] for v in values], pa.timestamp("us", tz="UTC")),
         pa.array([v["levels"] for v in values], pa.list_(pa.int32()))],
        names=["sum", "sum", "seen", "levels"],
    )
    batch = pa.RecordBatch.from_arrays([encode_rows(kstruct, kt), encode_rows(vstruct, vt)], schema=ROW_SCHEMA)
    return batch, keys, values


@pytest.fixture
def loc(tmp_path: Path):
    return open_location(str(tmp_path / "arch"), readonly=False)


def test_raw_bytes_are_kept_exactly_and_typed_columns_decode(loc):
    batch, keys, values = rows(50)
    rel = data_file_rel(0, "default", 3)
    w = write_data_file(loc, rel, [batch], decoder_for(SCHEMA_V1, "schema"), {"stateshift.partition": "3"})
    assert rel == "state/operator=0/store=default/partition=3/part-0.parquet"
    table = pq.read_table(loc.path(rel))
    assert table.column("key").to_pylist() == batch.column("key").to_pylist()
    assert table.column("value").to_pylist() == batch.column("value").to_pylist()
    assert table.column("key_bay").to_pylist() == [k["bay"] for k in keys]
    assert table.column("key_rack").to_pylist() == [k["rack"] for k in keys]
    assert table.column("value_sum").to_pylist() == [v["sum"] for v in values]
    assert table.column("value_sum_2").to_pylist() == [v["sum_long"] for v in values]  # duplicate field name
    assert table.column("value_seen").to_pylist() == [v["seen"] for v in values]
    assert table.column("value_levels").to_pylist() == [v["levels"] for v in values]
    assert table.schema.metadata[b"stateshift.partition"] == b"3"
    assert w.undecoded_rows == 0 and w.decode_error is None


def test_size_sha256_and_digest_describe_the_written_file(loc):
    batches = [rows(30, 0)[0], rows(40, 30)[0]]
    rel = data_file_rel(1, "left-keyToNumValues", 0)
    w = write_data_file(loc, rel, batches, decoder_for(SCHEMA_V1, "schema"), {})
    data = Path(loc.path(rel)).read_bytes()
    assert w.bytes == len(data)
    assert w.sha256 == hashlib.sha256(data).hexdigest()  # reference: hashlib over the file on disk
    assert w.digest == digest_batches(batches) and w.digest.rows == 70
    assert w.key_bytes == sum(len(k) for b in batches for k in b.column("key").to_pylist())


def test_one_row_group_per_batch_so_memory_stays_at_one_batch(loc):
    batches = [rows(10, i * 10)[0] for i in range(4)]
    rel = data_file_rel(0, "default", 0)
    write_data_file(loc, rel, iter(batches), decoder_for(SCHEMA_V1, "schema"), {})
    assert pq.ParquetFile(loc.path(rel)).num_row_groups == 4


def test_read_rows_gives_back_the_raw_batches(loc):
    batches = [rows(25, 0)[0], rows(25, 25)[0]]
    rel = data_file_rel(0, "default", 0)
    w = write_data_file(loc, rel, batches, decoder_for(SCHEMA_V1, "schema"), {})
    df = DataFile(rel, 0, "default", 0, 50, w.bytes, w.sha256, w.digest)
    back = list(read_rows(loc, df, batch_rows=7))
    assert all(b.schema.equals(ROW_SCHEMA) for b in back)
    assert pa.Table.from_batches(back).to_pylist() == pa.Table.from_batches(batches).to_pylist()
    assert digest_batches(back) == w.digest


def test_read_rows_refuses_a_row_count_other_than_the_manifest(loc):
    batch = rows(5)[0]
    rel = data_file_rel(0, "default", 0)
    w = write_data_file(loc, rel, [batch], raw_decoder("x", None), {})
    with pytest.raises(CorruptInput, match="holds 5 rows but manifest.json lists 6"):
        list(read_rows(loc, DataFile(rel, 0, "default", 0, 6, w.bytes, w.sha256, w.digest)))


def test_without_a_schema_only_raw_columns_are_written(loc):
    batch = rows(5)[0]
    rel = data_file_rel(0, "default", 0)
    dec = decoder_for(None, "nowhere")
    write_data_file(loc, rel, [batch], dec, {})
    assert pq.read_schema(loc.path(rel)).names == ["key", "value"]
    assert not dec.decoded and "no state schema file" in dec.note


def test_rows_that_do_not_fit_the_schema_keep_raw_bytes_and_are_counted(loc):
    good = rows(4)[0]
    bad = pa.RecordBatch.from_arrays([pa.array([b"\x01\x02"] * 3, pa.binary()), pa.array([b"\x03"] * 3, pa.binary())], schema=ROW_SCHEMA)
    rel = data_file_rel(0, "default", 0)
    w = write_data_file(loc, rel, [good, bad], decoder_for(SCHEMA_V1, "schema-file"), {})
    table = pq.read_table(loc.path(rel))
    assert table.num_rows == 7
    assert table.column("key").to_pylist()[4:] == [b"\x01\x02"] * 3
    assert table.column("key_bay").to_pylist()[4:] == [None] * 3
    assert table.column("key_rack").to_pylist()[:4] == [None, 1, 2, 3]
    assert w.undecoded_rows == 3 and w.decode_error


def test_empty_partition_is_a_valid_file_with_no_rows(loc):
    rel = data_file_rel(0, "default", 1)
    w = write_data_file(loc, rel, [], decoder_for(SCHEMA_V1, "schema"), {})
    assert pq.read_table(loc.path(rel)).num_rows == 0 and w.digest.rows == 0


def test_unknown_types_are_listed_as_not_decoded():
    key = {"type": "struct", "fields": [{"name": "v", "type": "variant", "nullable": True, "metadata": {}},
                                         {"name": "n", "type": "long", "nullable": True, "metadata": {}}]}
    dec = decoder_for(_utf("v1") + _utf(json.dumps(key)) + _utf(json.dumps(VALUE_JSON)), "s")
    flags = {c.column: c.decoded for c in dec.columns}
    assert flags["key_v"] is False and flags["key_n"] is True
    assert "key_v" not in dec.note and "v" in dec.note


def test_schema_file_lookup_prefers_newest_schema_at_or_before_the_batch():
    paths = [
        "state/0/0/_metadata/schema", "state/0/1/_metadata/schema",
        "state/1/_stateSchema/default/0_aaaa", "state/1/_stateSchema/default/5_bbbb", "state/1/_stateSchema/default/9_cccc",
        "state/2/0/left-keyToNumValues/_metadata/schema", "state/2/0/right-keyToNumValues/_metadata/schema",
    ]
    assert find_schema_file(paths, 0, "default", 3) == "state/0/0/_metadata/schema"
    assert find_schema_file(paths, 1, "default", 7) == "state/1/_stateSchema/default/5_bbbb"
    assert find_schema_file(paths, 2, "right-keyToNumValues", 0) == "state/2/0/right-keyToNumValues/_metadata/schema"
    assert find_schema_file(paths, 2, "default", 0) is None
    assert find_schema_file(paths, 3, "default", 0) is None


# ---------------------------------------------------------------------------- archive check


def small_archive(tmp_path: Path) -> tuple:
    src = tmp_path / "ckpt"
    src.mkdir()
    (src / "metadata").write_text('{"id":"x"}\n')
    srcloc = open_location(str(src))
    arch = open_location(str(tmp_path / "arch"), readonly=False)
    kept = copy_verbatim(srcloc, "metadata", arch)
    batch = rows(8)[0]
    rel = data_file_rel(0, "default", 0)
    w = write_data_file(arch, rel, [batch], decoder_for(SCHEMA_V1, "s"), {})
    manifest = Manifest("t", "now", "src", "q", 0, 1, "p", "lz4", 1, (), (), (), (),
                        (kept,), (DataFile(rel, 0, "default", 0, 8, w.bytes, w.sha256, w.digest),))
    write_manifest(arch, manifest)
    return arch, manifest, Path(arch.path(rel)), Path(arch.path(kept.path))


def test_an_intact_archive_passes(tmp_path):
    arch, manifest, data, meta = small_archive(tmp_path)
    assert check_archive(arch, manifest) == data.stat().st_size + meta.stat().st_size
    assert isinstance(manifest.checkpoint_files[0], ArchivedFile)


@pytest.mark.parametrize(
    ("damage", "message"),
    [
        (lambda d, m: d.write_bytes(d.read_bytes()[:-1] + bytes([d.read_bytes()[-1] ^ 1])), "SHA-256 does not match"),
        (lambda d, m: d.write_bytes(d.read_bytes()[:100]), "bytes but manifest.json lists"),
        (lambda d, m: d.unlink(), "missing from the archive"),
        (lambda d, m: m.write_text('{"id":"y"}\n'), "SHA-256 does not match"),
        (lambda d, m: (d.parent / "part-1.parquet").write_bytes(d.read_bytes()), "not listed in manifest.json"),
        (lambda d, m: (m.parent / ".hidden").write_bytes(b""), "not listed in manifest.json"),
    ],
    ids=["flipped-byte", "truncated", "deleted", "changed-metadata", "extra-data-file", "extra-hidden-file"],
)
def test_damaged_archives_are_refused_naming_the_file(tmp_path, damage, message):
    arch, manifest, data, meta = small_archive(tmp_path)
    damage(data, meta)
    with pytest.raises(CorruptInput, match=message) as info:
        check_archive(arch, manifest)
    text = str(info.value)
    assert "\n" not in text
    assert str(tmp_path / "arch") in text and ("part-" in text or "metadata" in text or ".hidden" in text)


def test_dictionaries_only_for_typed_text_and_statistics_only_for_typed_columns(loc):
    """Raw rows are unique: no dictionary, no min/max; typed text columns get a dictionary;
    every typed leaf column keeps its statistics for query engines (read back with pyarrow)."""
    batch, _, _ = rows(200)
    rel = data_file_rel(0, "default", 0)
    write_data_file(loc, rel, [batch], decoder_for(SCHEMA_V1, "schema"), {})
    meta = pq.ParquetFile(loc.path(rel)).metadata.row_group(0)
    columns = {meta.column(i).path_in_schema: meta.column(i) for i in range(meta.num_columns)}
    dictionary_encodings = {"PLAIN_DICTIONARY", "RLE_DICTIONARY"}
    for raw in ("key", "value"):
        assert not dictionary_encodings & set(columns[raw].encodings), raw
        assert not columns[raw].is_stats_set, raw
    assert dictionary_encodings & set(columns["key_bay"].encodings)
    for number in ("key_rack", "value_sum_2"):
        assert not dictionary_encodings & set(columns[number].encodings), number
    for typed in ("key_bay", "key_rack", "value_sum", "value_sum_2", "value_seen"):
        assert columns[typed].is_stats_set and columns[typed].statistics.has_min_max, typed


@pytest.mark.parametrize("threads", [1, 2, 4])
def test_with_files_hashed_at_once_the_first_damaged_file_in_manifest_order_is_named(tmp_path, monkeypatch, threads):
    """check_archive hashes several files at once (reader.HASH_THREADS); what it reports is still
    the first file in the manifest's order whose SHA-256 does not match, whatever finishes first,
    and every file's progress comes in that order until then."""
    from migrate.archive import reader

    monkeypatch.setattr(reader, "HASH_THREADS", threads)
    arch = open_location(str(tmp_path / "arch"), readonly=False)
    files = []
    for p in range(6):
        rel = data_file_rel(0, "default", p)
        w = write_data_file(arch, rel, [rows(8 + p)[0]], decoder_for(SCHEMA_V1, "s"), {})
        files.append(DataFile(rel, 0, "default", p, 8 + p, w.bytes, w.sha256, w.digest))
    manifest = Manifest("t", "now", "src", "q", 0, 1, "p", "lz4", 1, (), (), (), (), (), tuple(files))
    write_manifest(arch, manifest)
    for p in (2, 4):  # two damaged files: the one listed first is named
        path = Path(arch.path(files[p].path))
        data = path.read_bytes()
        path.write_bytes(data[:-1] + bytes([data[-1] ^ 1]))
    seen: list[str] = []
    with pytest.raises(CorruptInput, match="SHA-256 does not match") as info:
        reader.check_archive(arch, manifest, seen.append)
    assert "partition=2/" in str(info.value) and "partition=4/" not in str(info.value)
    assert seen == [files[0].path, files[1].path]


def _fields_json(*fields: tuple[str, str]) -> str:
    return json.dumps({"type": "struct", "fields": [
        {"name": n, "type": t, "nullable": False, "metadata": {}} for n, t in fields]})


def test_a_per_group_timeout_declared_int_but_stored_as_a_long_keeps_all_eight_bytes(loc):
    from migrate.archive.columns import schema_json

    # Per-group state format 1: the value schema ends with `timeoutTimestamp` declared "integer",
    # while the engine writes an 8-byte epoch-millisecond value into its slot (observed on the
    # engine's files; see migrate/archive/columns.py). A key field of that name stays an int.
    key_json = _fields_json(("timeoutTimestamp", "integer"))
    value_json = _fields_json(("readings", "long"), ("timeoutTimestamp", "integer"))
    schema = _utf("v1") + _utf(key_json) + _utf(value_json)
    stamps = [1_978_677_000_000, -1, 2**31 + 5, 7]  # 2032-09-14 in ms, "no timeout", above int range, small
    # UnsafeRow, as the row format lays it out (common practice): an 8-byte null bitset, then one
    # 8-byte slot per fixed-width field, ints in the low 4 bytes of theirs
    keys = [struct.pack("<qq", 0, 40 + i) for i in range(len(stamps))]
    values = [struct.pack("<qqq", 0, 3 * i, ts) for i, ts in enumerate(stamps)]
    batch = pa.RecordBatch.from_arrays([pa.array(keys, pa.binary()), pa.array(values, pa.binary())], schema=ROW_SCHEMA)
    decoder = decoder_for(schema, "schema")
    rel = data_file_rel(0, "default", 0)
    w = write_data_file(loc, rel, [batch], decoder, {})
    table = pq.read_table(loc.path(rel))
    assert w.undecoded_rows == 0
    assert table.column("value_timeoutTimestamp").type == pa.int64()
    assert table.column("value_timeoutTimestamp").to_pylist() == stamps
    assert table.column("value_readings").to_pylist() == [0, 3, 6, 9]
    assert table.column("key_timeoutTimestamp").type == pa.int32()
    assert table.column("key_timeoutTimestamp").to_pylist() == [40, 41, 42, 43]
    types = {(c.side, c.field): c.spark_type for c in decoder.columns}
    assert types == {("key", "timeoutTimestamp"): "integer", ("value", "readings"): "long", ("value", "timeoutTimestamp"): "long"}
    # the manifest keeps the schema as the engine declared it
    assert schema_json(decoder) == (json.loads(key_json), json.loads(value_json))
    assert table.column("value").to_pylist() == values  # the raw bytes as they were


def test_a_timeout_field_of_another_type_or_nested_is_decoded_as_declared():
    nested = json.dumps({"type": "struct", "fields": [{"name": "groupState", "type": json.loads(_fields_json(("timeoutTimestamp", "integer"))),
                                                      "nullable": True, "metadata": {}}]})
    for value_json in (_fields_json(("timeoutTimestamp", "long")), _fields_json(("timeoutTimestamp", "short")), nested):
        decoder = decoder_for(_utf("v1") + _utf(_fields_json(("k", "long"))) + _utf(value_json), "schema")
        assert decoder.value.stored == decoder.value.schema, value_json
