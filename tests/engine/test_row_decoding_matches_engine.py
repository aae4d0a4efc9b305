"""The row decoder, the reference writer and key partitioning agree with the real engine.

A streaming aggregation (file source, one file per micro-batch, available-now trigger, update
mode, HDFS-backed state, 2 shuffle partitions) groups invented "weather kiosk" readings by keys
of every supported type and keeps aggregates of every supported type. The last micro-batch
touches every group, so the engine emits every group's final result in that batch. The test then
reads the last version of the state files directly (delta files replayed in order; no engine
state reader), decodes keys and values with ``decode_rows`` using the schema parsed from the
engine's schema file, and checks that

* the decoded keys are exactly the groups the engine emitted, value for value;
* each aggregate's buffer, as decoded from state, implies exactly the value the engine emitted
  (buffer layouts per aggregate are listed in ``AGGREGATES``, see the comment there);
* ``encode_rows`` re-creates the engine's key and value bytes exactly;
* every key found in partition p hashes (``partition_ids``) to p.

Engine-observed facts this relies on are stated next to the checks.
"""

from __future__ import annotations

import json
import math
import os
import struct
from pathlib import Path

import pyarrow as pa
import pytest

if os.environ.get("CI") == "true":
    import pyspark  # noqa: F401  (CI must have the engine: an ImportError fails here)
else:
    pytest.importorskip("pyspark")

from migrate.rows.partitioning import partition_ids
from migrate.rows.schema import (
    ArrayType, StringType, StructField, StructType, arrow_type, parse_state_schema_file,
)
from migrate.rows.unsafe_row import decode_rows_report, encode_rows

pytestmark = pytest.mark.engine


def _to_arrow(df) -> pa.Table:
    """The rows of ``df`` as an Arrow table: ``DataFrame.toArrow`` (pyspark 4.x); 3.5 has no public
    form, so its Arrow collection (the one its ``toPandas`` uses) is taken instead."""
    if hasattr(df, "toArrow"):
        return df.toArrow()
    batches = df._collect_as_arrow()
    assert batches, "the engine returned no Arrow batches"
    return pa.Table.from_batches(batches)

HDFS_PROVIDER = "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider"
GROUPS = 40  # enough keys that a wrong hash of any one key type shows

# Grouping keys: (name, SQL over g = kiosk number). Nulls at every level appear for some g.
KEYS = [
    ("k_bool", "CASE WHEN g = 6 THEN NULL ELSE g % 2 = 0 END"),
    ("k_byte", "CASE WHEN g = 1 THEN NULL ELSE CAST(g * 11 % 256 - 128 AS TINYINT) END"),
    ("k_short", "CAST(g * 700 - 3000 AS SMALLINT)"),
    ("k_int", "g * 100000 - 7"),
    ("k_long", "CAST(g AS BIGINT) * 10000000000 - 1"),
    # -0.0 and NaN: the engine normalises float keys before grouping and hashing.
    ("k_float", "CASE WHEN g = 0 THEN CAST('-0.0' AS FLOAT) WHEN g = 2 THEN CAST('NaN' AS FLOAT)"
                " WHEN g = 3 THEN NULL ELSE CAST(g / 3.0 AS FLOAT) END"),
    ("k_double", "CASE WHEN g = 0 THEN CAST('NaN' AS DOUBLE) WHEN g = 4 THEN -0.0D"
                 " ELSE g * -2.5D END"),
    ("k_dec_s", "CAST(g * 1.25 - 3 AS DECIMAL(10,2))"),
    ("k_dec_l", "CASE WHEN g = 5 THEN NULL ELSE CAST(concat(CASE WHEN g % 2 = 0 THEN '-' ELSE ''"
                " END, g, '234567890123456789.0123456789') AS DECIMAL(38,10)) END"),
    ("k_str", "CASE WHEN g = 4 THEN NULL WHEN g = 5 THEN '' ELSE concat('kiosk-', g, "
              "repeat('\u00e9', g)) END"),
    ("k_bin", "CASE WHEN g = 7 THEN NULL ELSE CAST(repeat(concat('b', g), g) AS BINARY) END"),
    ("k_date", "CASE WHEN g = 8 THEN NULL ELSE date_add(DATE'1969-12-20', g * 3) END"),
    ("k_ts", "timestamp_micros(CAST(g - 6 AS BIGINT) * 86400000123)"),
    ("k_ntz", "CAST(timestamp_micros(CAST(g AS BIGINT) * 3600000001) AS TIMESTAMP_NTZ)"),
    ("k_dti", "make_dt_interval(g, 3, 4, 5.678901)"),
    ("k_ymi", "make_ym_interval(g - 3, 5)"),
    ("k_struct", "CASE WHEN g = 3 THEN NULL ELSE named_struct('a', CASE WHEN g = 1 THEN NULL"
                 " ELSE g END, 'b', concat('s', g), 'c', CASE WHEN g = 2 THEN NULL ELSE"
                 " named_struct('x', g * 0.5D, 'y', array(concat('t', g), NULL)) END) END"),
    ("k_arr", "CASE WHEN g = 6 THEN NULL ELSE array(g, NULL, g + 1) END"),
]

# Values: (name, SQL over g and i = reading number).
VALUES = [
    ("v_long", "CASE WHEN g = 2 AND i = 1 THEN NULL ELSE CAST(g AS BIGINT) * 1000 + i END"),
    ("v_int", "g * i - 5"),
    ("v_double", "CASE WHEN g = 5 THEN NULL ELSE i * 1.5D - g END"),
    ("v_dec_s", "CASE WHEN g = 7 THEN NULL ELSE CAST(i * 10.25 - g AS DECIMAL(10,2)) END"),
    ("v_dec_l", "CASE WHEN g = 8 AND i = 0 THEN NULL ELSE CAST(concat(CASE WHEN g % 2 = 0 THEN"
                " '-' ELSE '' END, g, '2345678901234567.', lpad(CAST(i AS STRING), 10, '0'))"
                " AS DECIMAL(38,10)) END"),
    ("v_map", "CASE WHEN g = 9 THEN NULL ELSE map(concat('m', g), array(CAST(i AS DECIMAL(38,10)),"
              " NULL, CAST(-123456789012345678901234.5 AS DECIMAL(38,10))), 'n',"
              " CAST(NULL AS ARRAY<DECIMAL(38,10)>)) END"),
    ("v_struct", "CASE WHEN g = 10 THEN NULL ELSE named_struct('p', CASE WHEN g = 4 THEN NULL"
                 " ELSE i END, 'q', concat('q', i), 'r', array(i, NULL)) END"),
    ("v_arr", "array(named_struct('e', concat('e', i), 'f', i * 0.25D),"
              " CAST(NULL AS STRUCT<e: STRING, f: DOUBLE>),"
              " named_struct('e', CAST(NULL AS STRING), 'f', CAST(NULL AS DOUBLE)))"),
    ("v_date", "date_add(DATE'1969-12-25', g * 3 + i)"),
    ("v_ts", "timestamp_micros(CAST(g - 20 AS BIGINT) * 86400000000 + i * 7)"),
    ("v_ntz", "make_timestamp_ntz(2020, 1 + g % 12, 1 + g % 28, 1, 2,"
              " CAST(i AS DECIMAL(8,6)) + 0.123456)"),
    ("v_bin", "unhex(repeat(lpad(hex((g * 16 + i) % 256), 2, '0'), i + 1))"),
    ("v_str", "CASE WHEN g = 11 THEN NULL ELSE concat(repeat('\u00fc', i), 'z', g) END"),
    ("v_dti", "make_dt_interval(i, g, 1, 2.000003) * -1"),
    ("v_ymi", "make_ym_interval(-g, i)"),
    ("v_bool", "(g + i) % 2 = 0"),
    ("v_byte", "CAST(i - g AS TINYINT)"),
    ("v_short", "CAST(g * 300 - i AS SMALLINT)"),
    ("v_float", "CAST(i / 3.0 + g AS FLOAT)"),
    ("v_ci", "make_interval(0, g, 0, i, 0, 0, 0.000123)"),
    ("v_words", "concat('w', g, '-', i)"),
]

# Aggregates: (output name, SQL, buffer field count, buffer -> the value the engine outputs).
# Buffer layouts (common practice, from memory; the value schema check below confirms the
# field names and types): count/max/min/sum of integral types keep one field equal to the
# output; sum of decimals keeps (sum, isEmpty) and outputs null when isEmpty; first keeps
# (first, valueSet); collect_list keeps one binary field holding an UnsafeRow with one array
# field (the list so far).
AGGREGATES = [
    ("n", "count(*)", 1, lambda b: b[0]),
    ("max_long", "max(v_long)", 1, lambda b: b[0]),
    ("total_int", "sum(v_int)", 1, lambda b: b[0]),
    ("min_double", "min(v_double)", 1, lambda b: b[0]),
    ("sum_dec_s", "sum(v_dec_s)", 2, lambda b: None if b[1] else b[0]),
    ("sum_dec_l", "sum(v_dec_l)", 2, lambda b: None if b[1] else b[0]),
    ("first_map", "first(v_map)", 2, lambda b: b[0]),
    ("max_struct", "max(v_struct)", 1, lambda b: b[0]),
    ("first_arr", "first(v_arr)", 2, lambda b: b[0]),
    ("max_date", "max(v_date)", 1, lambda b: b[0]),
    ("max_ts", "max(v_ts)", 1, lambda b: b[0]),
    ("max_ntz", "max(v_ntz)", 1, lambda b: b[0]),
    ("max_bin", "max(v_bin)", 1, lambda b: b[0]),
    ("min_str", "min(v_str)", 1, lambda b: b[0]),
    ("max_dti", "max(v_dti)", 1, lambda b: b[0]),
    ("max_ymi", "max(v_ymi)", 1, lambda b: b[0]),
    ("max_bool", "max(v_bool)", 1, lambda b: b[0]),
    ("min_byte", "min(v_byte)", 1, lambda b: b[0]),
    ("max_short", "max(v_short)", 1, lambda b: b[0]),
    ("max_float", "max(v_float)", 1, lambda b: b[0]),
    ("first_ci", "first(v_ci)", 2, lambda b: b[0]),
    ("words", "collect_list(v_words)", 1, None),  # decoded from the binary buffer below
]

# Which groups each input file (= micro-batch) touches; the last touches all of them.
FILES = [
    [(g, 0) for g in range(0, GROUPS, 2)] + [(1, 0)],
    [(g, 1) for g in range(GROUPS) if g % 3 != 0] + [(2, 2)],
    [(g, 3) for g in range(GROUPS)] + [(g, 4) for g in (0, 5, 9)],
]


# --------------------------------------------------------------------------------------------
# state files


def _lz4_block_stream(data: bytes, where: str) -> bytes:
    """Decompress an lz4-java block stream ("LZ4Block" magic, token, compressed length,
    original length, checksum, payload; an empty block ends it). Used only if migrate.codecs is
    not importable."""
    import lz4.block

    out, pos = bytearray(), 0
    while pos < len(data):
        assert data[pos:pos + 8] == b"LZ4Block", f"{where}: bad lz4 block magic at {pos}"
        token = data[pos + 8]
        clen, olen, _check = struct.unpack_from("<iii", data, pos + 9)
        pos += 21
        if olen == 0:
            break
        payload = data[pos:pos + clen]
        pos += clen
        out += payload if token & 0xF0 == 0x10 else lz4.block.decompress(payload,
                                                                           uncompressed_size=olen)
    return bytes(out)


def _decompress(data: bytes, where: str) -> bytes:
    try:
        from migrate.codecs import codec_for
    except ImportError:
        return _lz4_block_stream(data, where)
    return bytes(codec_for("lz4").decompress(data, where))  # bytes: the records' keys are hashed below


def _records(raw: bytes, where: str):
    """(key, value-or-None) records of a delta/snapshot file: int32 BE key length, key, int32
    BE value length (-1 = removal), value; a key length of -1 ends the file."""
    pos = 0
    while True:
        (klen,) = struct.unpack_from(">i", raw, pos)
        pos += 4
        if klen == -1:
            return
        key = raw[pos:pos + klen]
        pos += klen
        (vlen,) = struct.unpack_from(">i", raw, pos)
        pos += 4
        value = None if vlen < 0 else raw[pos:pos + vlen]
        pos += max(vlen, 0)
        yield key, value


def _state_at(part_dir: Path, version: int) -> dict[bytes, bytes]:
    snapshots = [int(p.stem) for p in part_dir.glob("*.snapshot") if int(p.stem) <= version]
    start = max(snapshots, default=0)
    state: dict[bytes, bytes] = {}
    files = ([part_dir / f"{start}.snapshot"] if start else []) + \
        [part_dir / f"{v}.delta" for v in range(start + 1, version + 1)]
    for path in files:
        for key, value in _records(_decompress(path.read_bytes(), str(path)), str(path)):
            if value is None:
                state.pop(key, None)
            else:
                state[key] = value
    return state


# --------------------------------------------------------------------------------------------
# comparison form


def _canon(v):
    """Hashable comparison form: NaN-safe floats, lists/dicts to tuples, bytearray to bytes."""
    if isinstance(v, float):
        return ("nan",) if math.isnan(v) else ("f", v)
    if isinstance(v, (bytes, bytearray, memoryview)):
        return bytes(v)
    if isinstance(v, dict):
        return tuple((k, _canon(x)) for k, x in v.items())
    if isinstance(v, (list, tuple)):
        return tuple(_canon(x) for x in v)
    return v


# --------------------------------------------------------------------------------------------
# the run


def _run_query(spark, tmp: Path):
    from pyspark.sql import functions as F

    inp = tmp / "in"
    inp.mkdir()
    for n, rows in enumerate(FILES):
        path = inp / f"readings-{n:02d}.json"
        path.write_text("".join(json.dumps({"g": g, "i": i}) + "\n" for g, i in rows))
        os.utime(path, (1_700_000_000 + n, 1_700_000_000 + n))
    cp = tmp / "cp"
    stream = (spark.readStream.schema("g INT, i INT").option("maxFilesPerTrigger", 1)
              .json(str(inp)))
    typed = stream.selectExpr(*[f"{sql} AS {name}" for name, sql in KEYS + VALUES])
    agg = typed.groupBy(*[name for name, _ in KEYS]).agg(
        *[F.expr(sql).alias(name) for name, sql, _, _ in AGGREGATES])
    batches: dict[int, pa.Table] = {}

    def collect(df, batch_id):
        # Year-month intervals have no Arrow form in the engine: emit their months (the
        # physical value) instead. Calendar intervals neither: emit their three parts.
        for name in ("k_ymi", "max_ymi"):
            df = df.withColumn(name, F.expr(f"extract(YEAR FROM {name}) * 12 + "
                                            f"extract(MONTH FROM {name})"))
        df = df.selectExpr("*", "extract(YEAR FROM first_ci) * 12 + extract(MONTH FROM first_ci)"
                           " AS ci_months", "extract(DAY FROM first_ci) AS ci_days",
                           "CAST(extract(HOUR FROM first_ci) * 3600000000 + extract(MINUTE FROM"
                           " first_ci) * 60000000 + extract(SECOND FROM first_ci) * 1000000"
                           " AS BIGINT) AS ci_micros").drop("first_ci")
        batches[batch_id] = _to_arrow(df)

    previous = spark.conf.get("spark.sql.streaming.stateStore.providerClass", None)
    spark.conf.set("spark.sql.streaming.stateStore.providerClass", HDFS_PROVIDER)
    try:
        query = (agg.writeStream.outputMode("update").foreachBatch(collect)
                 .option("checkpointLocation", str(cp)).trigger(availableNow=True).start())
        query.awaitTermination(600)
        assert query.exception() is None, query.exception()
    finally:
        if previous is None:
            spark.conf.unset("spark.sql.streaming.stateStore.providerClass")
        else:
            spark.conf.set("spark.sql.streaming.stateStore.providerClass", previous)
    return cp, batches


@pytest.fixture(scope="module")
def engine_run(spark, tmp_path_factory):
    tmp = tmp_path_factory.mktemp("rows-engine")
    cp, batches = _run_query(spark, tmp)
    assert sorted(batches) == list(range(len(FILES))), "one micro-batch per input file"
    return cp, batches


def test_engine_state_decodes_to_what_the_engine_output(engine_run):
    cp, batches = engine_run
    last = batches[max(batches)]
    assert last.num_rows == GROUPS, "the last micro-batch updates every group"

    schema_path = cp / "state" / "0" / "0" / "_metadata" / "schema"
    (schemas,) = parse_state_schema_file(schema_path.read_bytes(), str(schema_path))
    key_schema, value_schema = schemas.key_schema, schemas.value_schema
    assert key_schema.names == tuple(name for name, _ in KEYS)
    assert len(value_schema.fields) == sum(width for _, _, width, _ in AGGREGATES)

    version = len(FILES)  # state version = batch id + 1
    decoded: dict = {}
    raw_pairs = []
    for part in (0, 1):
        state = _state_at(cp / "state" / "0" / str(part), version)
        keys = pa.array(list(state), pa.binary())
        values = pa.array(list(state.values()), pa.binary())
        where = f"{cp}/state/0/{part}"
        k = decode_rows_report(keys, key_schema, where, unsupported="error")
        v = decode_rows_report(values, value_schema, where, unsupported="error")
        assert k.rows.type == arrow_type(key_schema) and v.rows.type == arrow_type(value_schema)
        raw_pairs.append((part, keys, values, k.rows, v.rows))
        # value fields repeat names (max, first, valueSet, ...): convert by position
        value_columns = [v.rows.field(i).to_pylist() for i in range(v.rows.type.num_fields)]
        for krow, vrow in zip(k.rows.to_pylist(), zip(*value_columns)):
            decoded[_canon(krow)] = list(vrow)
    assert len(decoded) == GROUPS

    out_rows = last.to_pylist()
    key_names = [name for name, _ in KEYS]
    checked = 0
    for row in out_rows:
        key = _canon({name: row[name] for name in key_names})
        assert key in decoded, f"engine emitted group {key} that is not in decoded state"
        buf = decoded[key]
        pos = 0
        for name, _sql, width, implied in AGGREGATES:
            part = buf[pos:pos + width]
            pos += width
            if name == "first_ci":
                assert part[1] is True
                expected = {"months": row["ci_months"], "days": row["ci_days"],
                            "microseconds": row["ci_micros"]}
                assert part[0] == expected, (key, name)
            elif name == "words":
                # collect_list's buffer: a binary UnsafeRow with one array<string> field.
                wschema = StructType((StructField("list", ArrayType(StringType())),))
                inner = decode_rows_report(pa.array([part[0]], pa.binary()), wschema,
                                           "collect_list buffer").rows.to_pylist()[0]["list"]
                assert inner == row[name], (key, name)
            else:
                assert _canon(implied(part)) == _canon(row[name]), (key, name, part, row[name])
            checked += 1
    assert checked == GROUPS * len(AGGREGATES)


def test_reference_writer_reproduces_engine_bytes(engine_run):
    cp, _ = engine_run
    schema_path = cp / "state" / "0" / "0" / "_metadata" / "schema"
    (schemas,) = parse_state_schema_file(schema_path.read_bytes(), str(schema_path))
    for part in (0, 1):
        state = _state_at(cp / "state" / "0" / str(part), len(FILES))
        keys = pa.array(list(state), pa.binary())
        values = pa.array(list(state.values()), pa.binary())
        krows = decode_rows_report(keys, schemas.key_schema).rows
        vrows = decode_rows_report(values, schemas.value_schema).rows
        assert encode_rows(krows, schemas.key_schema).to_pylist() == keys.to_pylist()
        assert encode_rows(vrows, schemas.value_schema).to_pylist() == values.to_pylist()


def test_keys_sit_in_the_partition_their_hash_names(engine_run):
    cp, _ = engine_run
    schema_path = cp / "state" / "0" / "0" / "_metadata" / "schema"
    (schemas,) = parse_state_schema_file(schema_path.read_bytes(), str(schema_path))
    seen = 0
    for part in (0, 1):
        state = _state_at(cp / "state" / "0" / str(part), len(FILES))
        keys = decode_rows_report(pa.array(list(state), pa.binary()), schemas.key_schema).rows
        assert partition_ids(keys, schemas.key_schema, 2).tolist() == [part] * len(keys)
        seen += len(keys)
    assert seen == GROUPS


# Columns for comparing ``spark_hash`` with the engine's own ``hash()`` SQL function (the same
# Murmur3, seed 42), over id = 0..299 with a null every 13th row. Maps are left out: the engine
# refuses to hash them (and cannot group by them).
HASHED = [
    ("c_bool", "id % 3 = 0"),
    ("c_byte", "CAST(id % 256 - 128 AS TINYINT)"),
    ("c_short", "CAST(id * 331 % 65536 - 32768 AS SMALLINT)"),
    ("c_int", "CAST(id * 7919 - 1000000 AS INT)"),
    ("c_long", "id * 1000000007 - 99999999999"),
    ("c_float", "CASE id WHEN 0 THEN CAST('-0.0' AS FLOAT) WHEN 1 THEN CAST('NaN' AS FLOAT)"
                " WHEN 2 THEN CAST('Infinity' AS FLOAT) ELSE CAST(id / 7.0 - 20 AS FLOAT) END"),
    ("c_double", "CASE id WHEN 0 THEN -0.0D WHEN 1 THEN CAST('NaN' AS DOUBLE)"
                 " WHEN 2 THEN CAST('-Infinity' AS DOUBLE) ELSE id / 7.0D - 20 END"),
    ("c_dec_s", "CAST(id * 12.34 - 1000 AS DECIMAL(10,2))"),
    ("c_dec_18", "CAST(id * 3333333333333333 - 99999999999999999 AS DECIMAL(18,0))"),
    ("c_dec_19", "CAST(id - 150 AS DECIMAL(19,0))"),
    ("c_dec_l", "CAST(concat(CASE WHEN id % 2 = 0 THEN '-' ELSE '' END, repeat('9',"
                " CAST(id % 28 AS INT)), '1.0123456789') AS DECIMAL(38,10))"),
    # every length 0..40, with 1- to 4-byte characters, so every tail length occurs
    ("c_str", "substring(repeat('a\u00e9\u20ac\U0001F600x', 20), 1, CAST(id % 41 AS INT))"),
    ("c_bin", "unhex(substring(repeat('00ff7f80abcdef', 10), 1, CAST(id % 30 AS INT) * 2))"),
    ("c_date", "date_add(DATE'1900-01-01', CAST(id * 997 AS INT))"),
    ("c_ts", "timestamp_micros(id * 86400000123 - 20000000000000000)"),
    ("c_ntz", "CAST(timestamp_micros(id * 3600000001) AS TIMESTAMP_NTZ)"),
    ("c_dti", "make_dt_interval(CAST(id AS INT) - 100, 3, 4, 5.678901)"),
    ("c_ymi", "make_ym_interval(CAST(id AS INT) - 100, 5)"),
    ("c_struct", "CASE WHEN id % 7 = 0 THEN NULL ELSE named_struct('a', CASE WHEN id % 5 = 0"
                 " THEN NULL ELSE CAST(id AS INT) END, 'b', substring('abcdefgh', 1,"
                 " CAST(id % 9 AS INT)), 'c', CASE WHEN id % 17 = 3 THEN NULL ELSE"
                 " named_struct('x', CASE WHEN id < 0 THEN NULL ELSE id * 0.5D END) END) END"),
    ("c_arr", "CASE WHEN id % 11 = 0 THEN NULL ELSE slice(array(CAST(id AS INT), NULL, 7, -1),"
              " 1, CAST(id % 5 AS INT)) END"),
    ("c_arr_str", "array(substring('xyzxyzxyz', 1, CAST(id % 10 AS INT)), NULL)"),
    ("c_arr_arr", "array(array(id, NULL), CAST(NULL AS ARRAY<BIGINT>), array())"),
]


def test_key_hash_matches_the_engine_hash_function(spark):
    from migrate.rows.partitioning import spark_hash
    from migrate.rows.schema import spark_type_from_json

    df = spark.range(300).selectExpr(
        *[f"CASE WHEN id % 13 = 12 THEN NULL ELSE {sql} END AS {name}" for name, sql in HASHED])
    names = [name for name, _ in HASHED]
    engine = df.selectExpr(*[f"hash({n}) AS {n}" for n in names],
                           f"hash({', '.join(names)}) AS all_columns")
    engine = _to_arrow(engine)
    schema = spark_type_from_json(df.schema.json())
    # the engine has no Arrow form for year-month intervals: take their months (physical value)
    values = df.selectExpr(*[f"extract(YEAR FROM {n}) * 12 + extract(MONTH FROM {n}) AS {n}"
                             if n == "c_ymi" else n for n in names])
    values = _to_arrow(values)
    columns = pa.StructArray.from_arrays([c.combine_chunks() for c in values.columns],
                                         names=values.column_names)
    for i, f in enumerate(schema.fields):
        one = pa.StructArray.from_arrays([columns.field(i)], names=[f.name])
        mine = spark_hash(one, StructType((f,))).tolist()
        assert mine == engine.column(f.name).to_pylist(), f.name
    assert spark_hash(columns, schema).tolist() == engine.column("all_columns").to_pylist()
