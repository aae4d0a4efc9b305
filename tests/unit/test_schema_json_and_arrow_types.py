"""Spark DataType JSON parses into the type model, round-trips, and maps to the right Arrow
types."""

from __future__ import annotations

import json

import pyarrow as pa
import pytest

from migrate.rows.schema import (
    ArrayType, BinaryType, BooleanType, ByteType, CalendarIntervalType, DateType,
    DayTimeIntervalType, DecimalType, DoubleType, FloatType, IntegerType, LongType, MapType,
    NullType, ShortType, StringType, StructField, StructType, TimestampNTZType, TimestampType,
    UnknownType, YearMonthIntervalType, arrow_type, contains_unknown, spark_type_from_json,
    spark_type_to_json,
)

ATOMS = [
    ("boolean", BooleanType(), pa.bool_()),
    ("byte", ByteType(), pa.int8()),
    ("short", ShortType(), pa.int16()),
    ("integer", IntegerType(), pa.int32()),
    ("long", LongType(), pa.int64()),
    ("float", FloatType(), pa.float32()),
    ("double", DoubleType(), pa.float64()),
    ("string", StringType(), pa.string()),
    ("binary", BinaryType(), pa.binary()),
    ("date", DateType(), pa.date32()),
    ("timestamp", TimestampType(), pa.timestamp("us", tz="UTC")),
    ("timestamp_ntz", TimestampNTZType(), pa.timestamp("us")),
    ("void", NullType(), pa.null()),
    ("decimal(10,2)", DecimalType(10, 2), pa.decimal128(10, 2)),
    ("decimal(38,18)", DecimalType(38, 18), pa.decimal128(38, 18)),
    ("decimal", DecimalType(10, 0), pa.decimal128(10, 0)),
    ("interval day to second", DayTimeIntervalType(0, 3), pa.duration("us")),
    ("interval hour to minute", DayTimeIntervalType(1, 2), pa.duration("us")),
    ("interval second", DayTimeIntervalType(3, 3), pa.duration("us")),
    ("interval year to month", YearMonthIntervalType(0, 1), pa.int32()),
    ("interval month", YearMonthIntervalType(1, 1), pa.int32()),
]


@pytest.mark.parametrize("name,model,arrow", ATOMS, ids=[a[0] for a in ATOMS])
def test_atomic_names_parse_and_map_to_arrow(name, model, arrow):
    assert spark_type_from_json(name) == model
    assert spark_type_from_json(json.dumps(name)) == model  # a JSON string literal too
    assert arrow_type(model) == arrow
    if name != "decimal":  # "decimal" is the short form of decimal(10,0)
        assert spark_type_to_json(model) == name


def test_calendar_interval_is_an_exact_three_part_struct():
    t = spark_type_from_json("interval")
    assert t == CalendarIntervalType()
    assert arrow_type(t) == pa.struct([pa.field("months", pa.int32(), False),
                                       pa.field("days", pa.int32(), False),
                                       pa.field("microseconds", pa.int64(), False)])


def test_char_varchar_and_collations_are_strings():
    assert isinstance(spark_type_from_json("char(5)"), StringType)
    assert spark_type_from_json("varchar(20)").simple_string() == "varchar(20)"
    assert spark_type_from_json("string collate UTF8_LCASE") == StringType(collation="UTF8_LCASE")
    assert spark_type_from_json("string collate UTF8_BINARY") == StringType()
    assert arrow_type(StringType(collation="UNICODE_CI")) == pa.string()


NESTED = {
    "type": "struct",
    "fields": [
        {"name": "id", "type": "long", "nullable": False, "metadata": {}},
        {"name": "tags", "type": {"type": "array", "elementType": "string",
                                  "containsNull": True}, "nullable": True, "metadata": {}},
        {"name": "scores", "type": {"type": "map", "keyType": "string",
                                    "valueType": "decimal(38,10)",
                                    "valueContainsNull": False},
         "nullable": True, "metadata": {"comment": "per judge"}},
        {"name": "inner", "type": {"type": "struct", "fields": [
            {"name": "when", "type": "timestamp_ntz", "nullable": True, "metadata": {}}]},
         "nullable": True, "metadata": {}},
    ],
}


def test_nested_json_round_trips_and_has_matching_arrow_type():
    t = spark_type_from_json(NESTED)
    assert isinstance(t, StructType) and t.names == ("id", "tags", "scores", "inner")
    assert t.fields[0].nullable is False
    assert t.fields[1].data_type == ArrayType(StringType(), True)
    assert t.fields[2].data_type == MapType(StringType(), DecimalType(38, 10), False)
    assert t.fields[2].metadata_dict == {"comment": "per judge"}
    assert spark_type_to_json(t) == NESTED
    assert spark_type_from_json(json.dumps(NESTED)) == t
    assert arrow_type(t) == pa.struct([
        pa.field("id", pa.int64(), False),
        pa.field("tags", pa.list_(pa.field("element", pa.string(), True))),
        pa.field("scores", pa.map_(pa.field("key", pa.string(), False),
                                   pa.field("value", pa.decimal128(38, 10), False))),
        pa.field("inner", pa.struct([pa.field("when", pa.timestamp("us"))])),
    ])


def test_user_defined_types_use_their_sql_type():
    udt = {"type": "udt", "class": "org.example.PointUDT", "pyClass": "example.Point",
           "sqlType": {"type": "array", "elementType": "double", "containsNull": False}}
    assert spark_type_from_json(udt) == ArrayType(DoubleType(), False)


def test_unknown_types_are_kept_raw_and_become_binary_columns():
    t = spark_type_from_json({"type": "struct", "fields": [
        {"name": "v", "type": "variant", "nullable": True, "metadata": {}},
        {"name": "vs", "type": {"type": "array", "elementType": "variant", "containsNull": True},
         "nullable": True, "metadata": {}},
        {"name": "ok", "type": {"type": "array", "elementType": {"type": "struct", "fields": [
            {"name": "g", "type": "geometry(4326)", "nullable": True, "metadata": {}}]},
            "containsNull": True}, "nullable": True, "metadata": {}},
    ]})
    v, vs, ok = (f.data_type for f in t.fields)
    assert v == UnknownType('"variant"')
    assert contains_unknown(t) and contains_unknown(ok) and not contains_unknown(LongType())
    assert arrow_type(v) == pa.binary()
    assert arrow_type(vs) == pa.binary()  # element width unknown: whole array left raw
    # a struct element still decodes; only its unknown leaf is raw
    assert arrow_type(ok) == pa.list_(pa.field("element", pa.struct([("g", pa.binary())])))
    assert spark_type_to_json(v) == "variant"


@pytest.mark.parametrize("bad", [
    42, None, ["long"], {"fields": []}, {"type": "struct", "fields": "x"},
    {"type": "struct", "fields": [{"type": "long"}]},
    {"type": "array", "containsNull": True},
    {"type": "map", "keyType": "string"},
    {"type": "struct", "fields": [{"name": 3, "type": "long"}]},
])
def test_shapes_that_are_not_data_types_raise_value_error(bad):
    with pytest.raises(ValueError):
        spark_type_from_json(bad)


def test_decimal_precision_outside_arrow_range_is_refused():
    with pytest.raises(ValueError):
        arrow_type(DecimalType(39, 0))


def test_simple_strings_read_like_the_engine_ddl():
    t = spark_type_from_json(NESTED)
    assert t.simple_string() == ("struct<id:long,tags:array<string>,"
                                 "scores:map<string,decimal(38,10)>,"
                                 "inner:struct<when:timestamp_ntz>>")
    assert StructField("x", LongType()).nullable is True
