"""State schema files (v1, v2, v3) parse into key/value schemas; damaged files raise CorruptInput.

The v2 and v3 fixtures were written by the engine (Spark 4.3.0): v2 by a streaming aggregation
grouping by one string column (count, sum, avg, max), v3 by a transformWithState query with a
value, a list and a map state. v1 and multi-chunk files are built by hand from the layout in
``migrate.rows.schema``.
"""

from __future__ import annotations

import json
import struct
from pathlib import Path

import pytest

from migrate.errors import CorruptInput, Unsupported
from migrate.rows.schema import (
    DoubleType, IntegerType, LongType, StringType, StructField, StructType,
    parse_state_schema_file, spark_type_to_json,
)

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "rows"


def _utf(text: str) -> bytes:
    raw = text.encode("utf-8")
    return struct.pack(">H", len(raw)) + raw


def _chunked(text: str, size: int) -> bytes:
    parts = [text[i:i + size] for i in range(0, len(text), size)] or [""]
    return struct.pack(">i", len(parts)) + b"".join(_utf(p) for p in parts)


KEY = StructType((StructField("sensor", StringType()),))
VALUE = StructType((StructField("count", LongType()), StructField("peak", DoubleType())))


def _json(t: StructType) -> str:
    return json.dumps(spark_type_to_json(t), separators=(",", ":"), ensure_ascii=False)


def test_engine_v2_file_gives_key_and_value_schema():
    path = FIXTURES / "schema_v2_aggregation.bin"
    data = path.read_bytes()
    assert data[:4] == b"\x00\x02v2"  # observed: writeUTF("v2")
    (schema,) = parse_state_schema_file(data, str(path))
    assert schema.format_version == 2 and schema.column_family == "default"
    assert schema.key_schema == StructType((StructField("k", StringType()),))
    assert schema.value_schema.simple_string() == (
        "struct<count:long,sum:long,sum:double,count:long,max:double>")


def test_engine_v3_file_lists_every_column_family():
    path = FIXTURES / "schema_v3_transform_with_state.bin"
    schemas = parse_state_schema_file(path.read_bytes(), str(path))
    by_name = {s.column_family: s for s in schemas}
    assert list(by_name) == ["$rowCounter_lst", "cnt", "lst", "mp"]
    assert all(s.format_version == 3 for s in schemas)
    assert by_name["cnt"].key_schema == StructType((StructField("k", StringType()),))
    assert by_name["cnt"].value_schema == StructType((StructField("c", LongType()),))
    assert by_name["lst"].value_schema == StructType((StructField("n", IntegerType()),))
    assert by_name["cnt"].key_state_encoder == {"keyStateEncoderType":
                                                "NoPrefixKeyStateEncoderSpec"}
    mp = by_name["mp"]
    assert mp.key_state_encoder == {"keyStateEncoderType": "PrefixKeyScanStateEncoderSpec",
                                    "numColsPrefixKey": 1}
    assert mp.key_schema.names == ("key", "userKey")
    assert mp.user_key_encoder_schema == StructType((StructField("mk", StringType()),))
    assert by_name["cnt"].user_key_encoder_schema is None


def test_hand_built_v1_file():
    data = _utf("v1") + _utf(_json(KEY)) + _utf(_json(VALUE))
    (schema,) = parse_state_schema_file(data, "v1-file")
    assert (schema.key_schema, schema.value_schema, schema.format_version) == (KEY, VALUE, 1)


def _java_utf(text: str) -> bytes:  # noqa: D401
    """``DataOutput.writeUTF`` as its Java documentation specifies it: each UTF-16 code unit
    on its own, NUL as two bytes, 1-3 bytes per unit (so surrogates are 3 bytes each)."""
    units = text.encode("utf-16-be")
    out = bytearray()
    for i in range(0, len(units), 2):
        u = int.from_bytes(units[i:i + 2], "big")
        if 0 < u < 0x80:
            out.append(u)
        elif u < 0x800:
            out += bytes([0xC0 | u >> 6, 0x80 | u & 0x3F])
        else:
            out += bytes([0xE0 | u >> 12, 0x80 | (u >> 6) & 0x3F, 0x80 | u & 0x3F])
    return struct.pack(">H", len(out)) + bytes(out)


def test_v2_chunks_are_joined_and_modified_utf8_is_decoded():
    key = StructType((StructField("z\u00e9ro\x00\U0001F600", StringType()),))
    text = _json(key)
    parts = [text[i:i + 7] for i in range(0, len(text), 7)]
    body = struct.pack(">i", len(parts)) + b"".join(_java_utf(p) for p in parts)
    assert b"\xed\xa0\xbd" in body  # the emoji's high surrogate on its own (JSON escapes NUL)
    data = _utf("v2") + body + _chunked(_json(VALUE), 5)
    (schema,) = parse_state_schema_file(data, "v2-file")
    assert schema.key_schema == key
    assert schema.value_schema == VALUE


def test_every_truncation_of_the_engine_file_is_corrupt_input_naming_the_file():
    data = (FIXTURES / "schema_v2_aggregation.bin").read_bytes()
    for cut in range(len(data)):
        with pytest.raises(CorruptInput) as info:
            parse_state_schema_file(data[:cut], "/cp/state/0/0/_metadata/schema")
        assert "/cp/state/0/0/_metadata/schema" in str(info.value)
        assert "\n" not in str(info.value)


def test_every_truncation_of_the_v3_file_is_corrupt_input():
    data = (FIXTURES / "schema_v3_transform_with_state.bin").read_bytes()
    for cut in range(0, len(data), 7):
        with pytest.raises(CorruptInput):
            parse_state_schema_file(data[:cut], "v3")


@pytest.mark.parametrize("data,error", [
    (_utf("v2") + _chunked(_json(KEY), 100) + _chunked(_json(VALUE), 100) + b"\x00",
     CorruptInput),
    (_utf("hello"), CorruptInput),
    (_utf("v9") + b"\x00" * 8, Unsupported),
    (_utf("v2") + _chunked('"long"', 100) + _chunked(_json(VALUE), 100), CorruptInput),
    (_utf("v2") + _chunked("{not json", 100) + _chunked(_json(VALUE), 100), CorruptInput),
    (_utf("v2") + struct.pack(">i", -1), CorruptInput),
    (_utf("v1") + struct.pack(">H", 2) + b"\xff\xfe" + _utf(_json(VALUE)), CorruptInput),
    (_utf("v3") + struct.pack(">i", 0), CorruptInput),
], ids=["trailing-bytes", "no-version", "future-version", "key-not-struct", "key-not-json",
        "negative-chunks", "bad-utf8", "v3-empty"])
def test_malformed_files_raise_the_right_error(data, error):
    with pytest.raises(error) as info:
        parse_state_schema_file(data, "some/schema")
    assert "some/schema" in str(info.value)
