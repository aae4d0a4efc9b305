"""Which engine wrote a checkpoint, the ``--engine-version`` syntax, and what a 3.5 target gets.

The checkpoints are the committed fixtures written by pyspark 3.5.9 and 4.3.0
(``tests/fixtures/engine_versions``, differences in its FINDINGS.md); synthetic log entries cover
the cases the fixtures do not (offsets v2 with a 3.5-looking conf, mixed histories).
"""

from __future__ import annotations

import io
import json
import zipfile
from pathlib import Path

import pyarrow as pa
import pytest

from migrate.checkpoint.engine import (
    FOUR_ONLY_CONFS,
    SPARK_4,
    SPARK_35,
    EngineInference,
    infer_engine,
    infer_from_logs,
    parse_engine_version,
    refuse_for_35,
    refuse_target,
    nullable_value_schema,
    upgrade_schema_rewrites,
    zip_hints,
)
from migrate.checkpoint.logs import CommitEntry, OffsetEntry, parse_commit, parse_offsets
from migrate.checkpoint.model import load_checkpoint
from migrate.errors import Unsupported, UsageError
from migrate.providers.base import ROW_SCHEMA, StoreDir, WriteContext
from migrate.providers.rocksdb import RocksDBProvider
from migrate.providers.rocksdb_meta import VersionMetadata, parse_metadata, render_metadata, unzip_members
from migrate.storage import open_location

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "engine_versions"
CK_35 = FIXTURES / "spark-3.5.9" / "agg_rocksdb" / "checkpoint"
CK_35_SESSION = FIXTURES / "spark-3.5.9" / "session_rocksdb" / "checkpoint"
CK_43 = FIXTURES / "spark-4.3.0" / "agg_rocksdb" / "checkpoint"
CK_43_V2 = FIXTURES / "spark-4.3.0" / "agg_rocksdb_changelog_ckptv2" / "checkpoint"


def _logs(ck: Path) -> tuple[dict[int, OffsetEntry], dict[int, CommitEntry]]:
    offsets = {int(p.name): parse_offsets(p.read_text(), int(p.name), str(p)) for p in (ck / "offsets").iterdir() if p.name.isdigit()}
    commits = {int(p.name): parse_commit(p.read_text(), int(p.name), str(p)) for p in (ck / "commits").iterdir() if p.name.isdigit()}
    return offsets, commits


def _entry(batch: int, version: int = 1, conf: dict | None = None) -> OffsetEntry:
    return OffsetEntry(batch, version, {"batchWatermarkMs": 0, "batchTimestampMs": 1, "conf": conf or {}}, ('{"logOffset":0}',))


@pytest.mark.parametrize("text", ["3.5", "3.5.9", "3.5.x", " 3.5.0 "])
def test_three_five_forms(text: str) -> None:
    assert parse_engine_version(text) == SPARK_35


@pytest.mark.parametrize("text", ["4", "4.x", "4.X", "4.3", "4.3.0", "4.0", "4.1.2"])
def test_four_forms(text: str) -> None:
    assert parse_engine_version(text) == SPARK_4


@pytest.mark.parametrize("text", ["3.4", "3", "3.6", "5.0", "", "latest", "4.3.0.1", "v4"])
def test_other_versions_are_usage_errors(text: str) -> None:
    with pytest.raises(UsageError) as err:
        parse_engine_version(text)
    assert "--engine-version" in str(err.value) and "3.5" in str(err.value) and "4.x" in str(err.value)


def test_fixture_written_by_3_5_9_is_3_5() -> None:
    got = infer_from_logs(*_logs(CK_35))
    assert (got.family, got.evidence_file) == (SPARK_35, "offsets/3")


@pytest.mark.parametrize("ck", [CK_43, CK_43_V2], ids=["format-1", "unique-ids"])
def test_fixtures_written_by_4_3_0_are_4(ck: Path) -> None:
    got = infer_from_logs(*_logs(ck))
    assert got.family == SPARK_4 and got.evidence_file == "offsets/3"
    assert "spark.sql." in got.evidence  # names a 4.x-only conf key


def test_every_four_only_key_alone_means_4() -> None:
    for key in FOUR_ONLY_CONFS:
        assert infer_from_logs({0: _entry(0, conf={key: "x"})}, {}).family == SPARK_4, key


def test_offsets_v2_means_4_even_with_a_3_5_conf() -> None:
    got = infer_from_logs({0: _entry(0), 1: _entry(1, version=2)}, {})
    assert (got.family, got.evidence_file) == (SPARK_4, "offsets/1")


def test_commits_v2_means_4() -> None:
    got = infer_from_logs({0: _entry(0)}, {0: CommitEntry(0, 2, {"nextBatchWatermarkMs": 0})})
    assert (got.family, got.evidence_file) == (SPARK_4, "commits/0")


def test_newest_entry_decides_in_a_mixed_history() -> None:
    """4.x ran first, 3.5 continued (observed: 3.5.9 then writes 10-key entries again)."""
    four = {k: "true" for k in FOUR_ONLY_CONFS}
    assert infer_from_logs({0: _entry(0, conf=four), 1: _entry(1)}, {}).family == SPARK_35
    assert infer_from_logs({0: _entry(0), 1: _entry(1, conf=four)}, {}).family == SPARK_4


def test_zip_hints_tell_the_versions_apart() -> None:
    h35 = zip_hints(unzip_members((CK_35 / "state/0/0/4.zip").read_bytes(), "z"), "z")
    h43 = zip_hints(unzip_members((CK_43 / "state/0/0/4.zip").read_bytes(), "z"), "z")
    assert any("only the 3.5 fields" in h for h in h35) and any("rocksdb_version=8.3.2" in h for h in h35)
    assert any("the 4.x fields" in h for h in h43) and any("rocksdb_version=9.8.4" in h for h in h43)


def test_infer_engine_on_a_loaded_checkpoint_adds_zip_hints_on_request() -> None:
    ckpt = load_checkpoint(open_location(str(CK_35)))
    assert infer_engine(ckpt).hints == ()
    assert any("8.3.2" in h for h in infer_engine(ckpt, zip_evidence=True).hints)


def test_inference_round_trips_through_json() -> None:
    got = infer_engine(load_checkpoint(open_location(str(CK_43))), zip_evidence=True)
    assert EngineInference.from_json(json.loads(json.dumps(got.to_json())), "m") == got


def test_a_4_source_is_refused_for_a_3_5_target_naming_the_file() -> None:
    source = infer_from_logs(*_logs(CK_43))
    with pytest.raises(Unsupported) as err:
        refuse_target(source, SPARK_35, lambda rel: f"/ck/{rel}")
    assert str(err.value).startswith("/ck/offsets/3: ") and "\n" not in str(err.value)
    refuse_target(source, SPARK_4, lambda rel: rel)  # same family: fine
    refuse_target(infer_from_logs(*_logs(CK_35)), SPARK_4, lambda rel: rel)  # older source: fine


def test_logs_3_5_cannot_read_are_refused_for_it() -> None:
    with pytest.raises(Unsupported, match="offsets entry format v2") as err:
        refuse_for_35({0: _entry(0, version=2), 1: _entry(1)}, {}, {}, lambda rel: f"/ck/{rel}")
    assert str(err.value).startswith("/ck/offsets/0:")
    with pytest.raises(Unsupported, match="commits entry format v2"):
        refuse_for_35({0: _entry(0)}, {0: CommitEntry(0, 2, {})}, {}, lambda rel: rel)
    with pytest.raises(Unsupported, match="formatVersion=6"):
        refuse_for_35({0: _entry(0)}, {}, {"spark.sql.streaming.stateStore.rocksdb.formatVersion": "6"}, lambda rel: rel)
    refuse_for_35(*_logs(CK_35), {"spark.sql.streaming.stateStore.rocksdb.formatVersion": "5"}, lambda rel: rel)


def test_only_join_schemas_are_rewritten_and_only_for_3_5_to_4() -> None:
    rels = [
        "state/0/0/_metadata/schema",
        "state/1/0/left-keyToNumValues/_metadata/schema",
        "state/1/0/left-keyWithIndexToValue/_metadata/schema",
        "state/1/0/right-keyWithIndexToValue/_metadata/schema",
        "state/1/0/left-keyWithIndexToValue/_metadata/.schema.crc",
    ]
    assert upgrade_schema_rewrites(SPARK_35, SPARK_4, rels) == sorted(rels[1:4])
    assert upgrade_schema_rewrites(SPARK_35, SPARK_35, rels) == []
    assert upgrade_schema_rewrites(SPARK_4, SPARK_4, rels) == []


def _utf(text: str) -> bytes:
    raw = text.encode()
    return len(raw).to_bytes(2, "big") + raw


def _schema_v2(key: dict, value: dict) -> bytes:
    """A v2 schema file as FINDINGS.md shows its framing: writeUTF("v2"), then per schema an int32
    chunk count and writeUTF chunks of compact JSON."""
    out = _utf("v2")
    for schema in (key, value):
        out += (1).to_bytes(4, "big") + _utf(json.dumps(schema, separators=(",", ":")))
    return out


def _field(name: str, kind, nullable: bool) -> dict:
    return {"name": name, "type": kind, "nullable": nullable, "metadata": {}}


def test_nullable_value_schema_relaxes_every_value_flag_and_keeps_the_key() -> None:
    from migrate.rows.schema import parse_state_schema_file

    key = {"type": "struct", "fields": [_field("field0", "string", False), _field("index", "long", False)]}
    nested = {"type": "struct", "fields": [_field("x", "double", False)]}
    value = {"type": "struct", "fields": [
        _field("buoy", "string", False), _field("ping_time", "timestamp", False),
        _field("tags", {"type": "array", "elementType": "string", "containsNull": False}, False),
        _field("pos", nested, True), _field("matched", "boolean", True),
    ]}
    data = _schema_v2(key, value)
    out = nullable_value_schema(data, "s")
    ((before,), (after,)) = parse_state_schema_file(data, "s"), parse_state_schema_file(out, "s")
    assert after.key_schema == before.key_schema and not any(f.nullable for f in after.key_schema.fields)
    assert after.value_schema.names == before.value_schema.names
    assert all(f.nullable for f in after.value_schema.fields)
    assert after.value_schema.fields[2].data_type.contains_null
    assert all(f.nullable for f in after.value_schema.fields[3].data_type.fields)
    assert out.startswith(data[: len(data) - len(json.dumps(value, separators=(",", ":"))) - 6])  # framing + key unchanged
    already = _schema_v2(key, {"type": "struct", "fields": [_field("value", "long", True)]})
    assert nullable_value_schema(already, "s") == already  # nothing to relax: byte for byte the same


def test_session_prefix_is_inferred_without_operator_metadata() -> None:
    """3.5.9 writes no state/<op>/_metadata/metadata; the schema file says it is a session store."""
    assert not (CK_35_SESSION / "state/0/_metadata").exists()
    session = load_checkpoint(open_location(str(CK_35_SESSION)))
    assert [(s.name, s.num_cols_prefix_key) for s in session.operators[0].stores] == [("default", 1)]
    agg = load_checkpoint(open_location(str(CK_35)))
    assert [(s.name, s.num_cols_prefix_key) for s in agg.operators[0].stores] == [("default", 0)]


def test_zip_metadata_for_3_5_has_only_its_fields() -> None:
    meta = VersionMetadata(sst_files=(), num_keys=3)
    text = render_metadata(meta, "3.5")
    assert text == b'v1\n{"sstFiles":[],"numKeys":3}'
    assert parse_metadata(text, "m") == meta
    assert set(json.loads(render_metadata(meta).split(b"\n", 1)[1])) > {"sstFiles", "numKeys", "numInternalKeys"}
    # the same field set as the zip 3.5.9 wrote
    observed = unzip_members((CK_35 / "state/0/0/4.zip").read_bytes(), "z")["metadata"]
    assert set(json.loads(observed.split(b"\n", 1)[1])) == set(json.loads(text.split(b"\n", 1)[1]))


def _write(tmp: Path, engine: str, conf: dict[str, str]) -> dict[str, bytes]:
    tmp.mkdir(parents=True, exist_ok=True)
    loc = open_location(str(tmp), readonly=False)
    store = StoreDir(loc, "state/0/0", 0, 0)
    batch = pa.RecordBatch.from_arrays([pa.array([b"\x01" * 8], pa.binary()), pa.array([b"\x02" * 8], pa.binary())], schema=ROW_SCHEMA)
    RocksDBProvider().write(store, 1, [batch], WriteContext(conf=conf, engine=engine))
    return unzip_members((tmp / "state/0/0/1.zip").read_bytes(), "z")


def _options(members: dict[str, bytes]) -> str:
    return next(v for k, v in members.items() if k.startswith("OPTIONS-")).decode()


def test_rocksdb_writer_for_3_5(tmp_path: Path) -> None:
    members = _write(tmp_path, SPARK_35, {})
    options = _options(members)
    # RocksDB 8.3.2 (3.5.9) refuses format_version 6, rocksdict's default (FINDINGS.md)
    assert "format_version=5" in options and "kSnappyCompression" in options
    assert set(json.loads(members["metadata"].split(b"\n", 1)[1])) == {"sstFiles", "numKeys"}
    sst = next((tmp_path / "state/0/0/SSTs").glob("*.sst")).read_bytes()
    # block-based table footer: format_version is the 4-byte LE int before the 8-byte magic (FINDINGS.md)
    assert sst[-12:-8] == (5).to_bytes(4, "little")


def test_rocksdb_writer_for_4_keeps_the_4_fields(tmp_path: Path) -> None:
    members = _write(tmp_path, SPARK_4, {})
    assert "kLZ4Compression" in _options(members)
    assert "numInternalKeys" in json.loads(members["metadata"].split(b"\n", 1)[1])


def test_rocksdb_writer_refuses_format_6_for_3_5(tmp_path: Path) -> None:
    with pytest.raises(Unsupported, match="up to 5"):
        _write(tmp_path, SPARK_35, {"spark.sql.streaming.stateStore.rocksdb.formatVersion": "6"})
    assert not (tmp_path / "state/0/0/1.zip").exists()
    members = _write(tmp_path / "four", SPARK_4, {"spark.sql.streaming.stateStore.rocksdb.formatVersion": "6"})
    assert "format_version=6" in _options(members)


def test_zip_reader_accepts_what_the_3_5_writer_wrote(tmp_path: Path) -> None:
    _write(tmp_path, SPARK_35, {})
    loc = open_location(str(tmp_path))
    from migrate.providers.base import ReadContext

    rows = list(RocksDBProvider().read(StoreDir(loc, "state/0/0", 0, 0), 1, ReadContext()))
    assert sum(b.num_rows for b in rows) == 1


def test_zip_member_bytes_are_a_real_zip(tmp_path: Path) -> None:
    _write(tmp_path, SPARK_35, {})
    with zipfile.ZipFile(io.BytesIO((tmp_path / "state/0/0/1.zip").read_bytes())) as z:
        assert "metadata" in z.namelist() and "CURRENT" in z.namelist()


def test_a_stray_partition_of_a_35_checkpoint_is_refused_by_the_pinned_partition_count(tmp_path):
    """3.5 writes no operator metadata, so the shuffle partitions pinned in the offsets log bound
    the partition directories (2 in the fixture): a copied third one is refused, naming it."""
    import shutil

    from migrate.errors import CorruptInput

    src = tmp_path / "checkpoint"
    shutil.copytree(FIXTURES / "spark-3.5.9" / "agg_rocksdb" / "checkpoint", src)
    assert load_checkpoint(open_location(str(src))).num_partitions == 2
    shutil.copytree(src / "state" / "0" / "1", src / "state" / "0" / "2")
    with pytest.raises(CorruptInput, match=r"state/0/2: partition directory 2 is outside the 2 partitions the offsets log names"):
        load_checkpoint(open_location(str(src)))
