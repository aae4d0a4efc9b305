"""Spark data types: a frozen-dataclass model, its JSON form, and the matching Arrow types.

* ``spark_type_from_json``: the engine's DataType JSON (as stored in schema files and operator
  metadata) into the model (``LongType()``, ``DecimalType(38, 10)``,
  ``StructType((StructField(...), ...))``, ...). Types this module does not know become
  ``UnknownType(raw)`` rather than an error, so a schema can always be parsed; the row decoder
  then leaves such columns undecoded.
* ``spark_type_to_json``: the reverse.
* ``arrow_type``: the Arrow type a decoded column of that Spark type has.

Import these names from ``migrate.rows.schema``, which re-exports them.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from typing import Any, ClassVar

import pyarrow as pa

__all__ = [
    "SparkType", "NullType", "BooleanType", "ByteType", "ShortType", "IntegerType", "LongType",
    "FloatType", "DoubleType", "DecimalType", "StringType", "BinaryType", "DateType",
    "TimestampType", "TimestampNTZType", "DayTimeIntervalType", "YearMonthIntervalType",
    "CalendarIntervalType", "ArrayType", "MapType", "StructField", "StructType", "UnknownType",
    "spark_type_from_json", "spark_type_to_json", "arrow_type", "arrow_field",
    "contains_unknown", "CALENDAR_INTERVAL_ARROW", "MAX_LONG_DIGITS",
]

#: Decimals up to this precision are stored as an inline unscaled long (common practice).
MAX_LONG_DIGITS = 18


# ------------------------------------------------------------------------------------------
# The type model


@dataclass(frozen=True)
class SparkType:
    """Base of every Spark data type in the model."""

    def simple_string(self) -> str:  # pragma: no cover - overridden
        raise NotImplementedError


@dataclass(frozen=True)
class _Atomic(SparkType):
    """A type without parameters; ``json_name`` is its JSON form."""

    json_name: ClassVar[str] = ""

    def simple_string(self) -> str:
        return self.json_name


@dataclass(frozen=True)
class NullType(_Atomic):
    """Spark ``void`` (the type of a NULL literal)."""

    json_name: ClassVar[str] = "void"


@dataclass(frozen=True)
class BooleanType(_Atomic):
    """Spark ``boolean``."""

    json_name: ClassVar[str] = "boolean"


@dataclass(frozen=True)
class ByteType(_Atomic):
    """Spark ``byte``."""

    json_name: ClassVar[str] = "byte"


@dataclass(frozen=True)
class ShortType(_Atomic):
    """Spark ``short``."""

    json_name: ClassVar[str] = "short"


@dataclass(frozen=True)
class IntegerType(_Atomic):
    """Spark ``integer``."""

    json_name: ClassVar[str] = "integer"


@dataclass(frozen=True)
class LongType(_Atomic):
    """Spark ``long``."""

    json_name: ClassVar[str] = "long"


@dataclass(frozen=True)
class FloatType(_Atomic):
    """Spark ``float``."""

    json_name: ClassVar[str] = "float"


@dataclass(frozen=True)
class DoubleType(_Atomic):
    """Spark ``double``."""

    json_name: ClassVar[str] = "double"


@dataclass(frozen=True)
class BinaryType(_Atomic):
    """Spark ``binary``."""

    json_name: ClassVar[str] = "binary"


@dataclass(frozen=True)
class DateType(_Atomic):
    """Spark ``date``: days since 1970-01-01."""

    json_name: ClassVar[str] = "date"


@dataclass(frozen=True)
class TimestampType(_Atomic):
    """Spark ``timestamp``: microseconds since the epoch, UTC."""

    json_name: ClassVar[str] = "timestamp"


@dataclass(frozen=True)
class TimestampNTZType(_Atomic):
    """Spark ``timestamp_ntz``: microseconds of a wall-clock time."""

    json_name: ClassVar[str] = "timestamp_ntz"


@dataclass(frozen=True)
class CalendarIntervalType(_Atomic):
    """Spark ``interval``: months, days and microseconds (legacy interval)."""

    json_name: ClassVar[str] = "interval"


@dataclass(frozen=True)
class StringType(SparkType):
    """Spark ``string``; ``collation`` is kept (e.g. ``UTF8_LCASE``) but bytes are the same."""

    collation: str | None = None
    #: ``char(n)``/``varchar(n)`` are stored as strings; the declared form is kept for display.
    declared: str | None = None

    def simple_string(self) -> str:
        if self.declared:
            return self.declared
        return "string" if self.collation is None else f"string collate {self.collation}"


@dataclass(frozen=True)
class DecimalType(SparkType):
    precision: int = 10
    scale: int = 0

    def simple_string(self) -> str:
        return f"decimal({self.precision},{self.scale})"

    @property
    def is_compact(self) -> bool:
        """True when the engine stores it as an inline unscaled long (precision <= 18)."""
        return self.precision <= MAX_LONG_DIGITS


_DT_FIELDS = ("day", "hour", "minute", "second")
_YM_FIELDS = ("year", "month")


def _interval_string(fields: tuple[str, ...], start: int, end: int) -> str:
    if start == end:
        return f"interval {fields[start]}"
    return f"interval {fields[start]} to {fields[end]}"


@dataclass(frozen=True)
class DayTimeIntervalType(SparkType):
    """ANSI day-time interval: a long of microseconds. Fields 0=day .. 3=second."""

    start_field: int = 0
    end_field: int = 3

    def simple_string(self) -> str:
        return _interval_string(_DT_FIELDS, self.start_field, self.end_field)


@dataclass(frozen=True)
class YearMonthIntervalType(SparkType):
    """ANSI year-month interval: an int of months. Fields 0=year, 1=month."""

    start_field: int = 0
    end_field: int = 1

    def simple_string(self) -> str:
        return _interval_string(_YM_FIELDS, self.start_field, self.end_field)


@dataclass(frozen=True)
class ArrayType(SparkType):
    element_type: SparkType
    contains_null: bool = True

    def simple_string(self) -> str:
        return f"array<{self.element_type.simple_string()}>"


@dataclass(frozen=True)
class MapType(SparkType):
    key_type: SparkType
    value_type: SparkType
    value_contains_null: bool = True

    def simple_string(self) -> str:
        return f"map<{self.key_type.simple_string()},{self.value_type.simple_string()}>"


@dataclass(frozen=True)
class StructField:
    name: str
    data_type: SparkType
    nullable: bool = True
    metadata: tuple[tuple[str, str], ...] = ()  # (key, JSON text of the value), sorted

    @property
    def metadata_dict(self) -> dict[str, Any]:
        return {k: json.loads(v) for k, v in self.metadata}


@dataclass(frozen=True)
class StructType(SparkType):
    fields: tuple[StructField, ...] = ()

    def simple_string(self) -> str:
        inner = ",".join(f"{f.name}:{f.data_type.simple_string()}" for f in self.fields)
        return f"struct<{inner}>"

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.fields)

    def __len__(self) -> int:
        return len(self.fields)


@dataclass(frozen=True)
class UnknownType(SparkType):
    """A type this version does not model (variant, geometry, time, ...): kept as raw JSON."""

    raw: str  # JSON text of the type as found

    def simple_string(self) -> str:
        return f"unknown<{self.raw}>"


# ------------------------------------------------------------------------------------------
# JSON <-> model

_ATOMS: dict[str, SparkType] = {
    cls.json_name: cls()
    for cls in (NullType, BooleanType, ByteType, ShortType, IntegerType, LongType, FloatType,
                DoubleType, BinaryType, DateType, TimestampType, TimestampNTZType,
                CalendarIntervalType)
}
_ATOMS["null"] = NullType()
_ATOMS["string"] = StringType()
_ATOMS["decimal"] = DecimalType(10, 0)

_DECIMAL_RE = re.compile(r"decimal\(\s*(\d+)\s*,\s*(-?\d+)\s*\)")
_CHAR_RE = re.compile(r"(char|varchar)\(\s*(\d+)\s*\)")
_COLLATE_RE = re.compile(r"string\s+collate\s+(\S+)", re.IGNORECASE)
_INTERVAL_RE = re.compile(r"interval\s+(\w+)(?:\s+to\s+(\w+))?")


def _type_from_name(name: str) -> SparkType:
    text = name.strip()
    low = text.lower()
    if low in _ATOMS:
        return _ATOMS[low]
    if m := _DECIMAL_RE.fullmatch(low):
        return DecimalType(int(m.group(1)), int(m.group(2)))
    if m := _CHAR_RE.fullmatch(low):
        return StringType(declared=low)
    if m := _COLLATE_RE.fullmatch(text):
        coll = m.group(1)
        return StringType() if coll.upper() == "UTF8_BINARY" else StringType(collation=coll)
    if m := _INTERVAL_RE.fullmatch(low):
        start, end = m.group(1), m.group(2) or m.group(1)
        if start in _DT_FIELDS and end in _DT_FIELDS:
            s, e = _DT_FIELDS.index(start), _DT_FIELDS.index(end)
            if s <= e:
                return DayTimeIntervalType(s, e)
        if start in _YM_FIELDS and end in _YM_FIELDS:
            s, e = _YM_FIELDS.index(start), _YM_FIELDS.index(end)
            if s <= e:
                return YearMonthIntervalType(s, e)
    return UnknownType(json.dumps(name))


def _need(obj: dict, key: str) -> Any:
    if key not in obj:
        raise ValueError(f"data type JSON object lacks {key!r}: {json.dumps(obj)[:200]}")
    return obj[key]


def spark_type_from_json(obj: Any) -> SparkType:
    """Spark DataType JSON (already parsed, or as a JSON string) into the type model.

    Raises ``ValueError`` for JSON that is not a data type at all (wrong shape); unknown type
    names become ``UnknownType``. ``parse_state_schema_file`` turns the ValueError into
    ``CorruptInput`` with the file path.
    """
    if isinstance(obj, (bytes, bytearray)):
        obj = obj.decode("utf-8")
    if isinstance(obj, str):
        stripped = obj.strip()
        if stripped.startswith(("{", "[", '"')):
            return spark_type_from_json(json.loads(stripped))
        return _type_from_name(obj)
    if not isinstance(obj, dict):
        raise ValueError(f"not a data type: {json.dumps(obj)[:200]}")
    kind = _need(obj, "type")
    if kind == "struct":
        raw_fields = _need(obj, "fields")
        if not isinstance(raw_fields, list):
            raise ValueError("struct 'fields' is not a list")
        return StructType(tuple(_field_from_json(f) for f in raw_fields))
    if kind == "array":
        return ArrayType(spark_type_from_json(_need(obj, "elementType")),
                         bool(obj.get("containsNull", True)))
    if kind == "map":
        return MapType(spark_type_from_json(_need(obj, "keyType")),
                       spark_type_from_json(_need(obj, "valueType")),
                       bool(obj.get("valueContainsNull", True)))
    if kind == "udt" and "sqlType" in obj:
        # A user-defined type is stored as its SQL type (common practice).
        return spark_type_from_json(obj["sqlType"])
    return UnknownType(json.dumps(obj, sort_keys=True))


def _field_from_json(obj: Any) -> StructField:
    if not isinstance(obj, dict):
        raise ValueError(f"struct field is not an object: {json.dumps(obj)[:200]}")
    name = _need(obj, "name")
    if not isinstance(name, str):
        raise ValueError("struct field name is not a string")
    meta = obj.get("metadata") or {}
    if not isinstance(meta, dict):
        raise ValueError(f"metadata of field {name!r} is not an object")
    dtype = spark_type_from_json(_need(obj, "type"))
    # Spark 4 keeps a nested string's collation in field metadata under "__COLLATIONS".
    return StructField(name, dtype, bool(obj.get("nullable", True)),
                       tuple(sorted((k, json.dumps(v, sort_keys=True)) for k, v in meta.items())))


def spark_type_to_json(t: SparkType) -> Any:
    """The inverse of ``spark_type_from_json`` (as a JSON-ready Python value)."""
    if isinstance(t, StructType):
        return {"type": "struct", "fields": [
            {"name": f.name, "type": spark_type_to_json(f.data_type), "nullable": f.nullable,
             "metadata": f.metadata_dict} for f in t.fields]}
    if isinstance(t, ArrayType):
        return {"type": "array", "elementType": spark_type_to_json(t.element_type),
                "containsNull": t.contains_null}
    if isinstance(t, MapType):
        return {"type": "map", "keyType": spark_type_to_json(t.key_type),
                "valueType": spark_type_to_json(t.value_type),
                "valueContainsNull": t.value_contains_null}
    if isinstance(t, UnknownType):
        return json.loads(t.raw)
    return t.simple_string()


def contains_unknown(t: SparkType) -> bool:
    """True when ``t`` is or contains a type the row codec cannot handle."""
    if isinstance(t, UnknownType):
        return True
    if isinstance(t, ArrayType):
        return contains_unknown(t.element_type)
    if isinstance(t, MapType):
        return contains_unknown(t.key_type) or contains_unknown(t.value_type)
    if isinstance(t, StructType):
        return any(contains_unknown(f.data_type) for f in t.fields)
    return False


# ------------------------------------------------------------------------------------------
# Arrow types

#: Arrow form of a calendar interval: exact, no unit conversion (month_day_nano would need
#: micros * 1000 and could overflow).
CALENDAR_INTERVAL_ARROW = pa.struct([pa.field("months", pa.int32(), nullable=False),
                                     pa.field("days", pa.int32(), nullable=False),
                                     pa.field("microseconds", pa.int64(), nullable=False)])

_ARROW_ATOMS: dict[type, pa.DataType] = {
    NullType: pa.null(),
    BooleanType: pa.bool_(),
    ByteType: pa.int8(),
    ShortType: pa.int16(),
    IntegerType: pa.int32(),
    LongType: pa.int64(),
    FloatType: pa.float32(),
    DoubleType: pa.float64(),
    StringType: pa.string(),
    BinaryType: pa.binary(),
    DateType: pa.date32(),
    TimestampType: pa.timestamp("us", tz="UTC"),
    TimestampNTZType: pa.timestamp("us"),
    DayTimeIntervalType: pa.duration("us"),
    YearMonthIntervalType: pa.int32(),  # months; Arrow has no plain month-interval in pyarrow
    CalendarIntervalType: CALENDAR_INTERVAL_ARROW,
}


def arrow_type(t: SparkType) -> pa.DataType:
    """The Arrow type of a decoded column of Spark type ``t``.

    Columns the row decoder leaves undecoded are ``binary``: an ``UnknownType`` field, and an
    array or map whose element, key or value type is directly an ``UnknownType`` (see
    ``unsafe_row``). Everything else maps one to one.
    """
    if isinstance(t, UnknownType):
        return pa.binary()
    if isinstance(t, DecimalType):
        if not 1 <= t.precision <= 38:
            raise ValueError(f"decimal precision {t.precision} is outside 1..38")
        return pa.decimal128(t.precision, t.scale)
    if isinstance(t, ArrayType):
        if isinstance(t.element_type, UnknownType):
            return pa.binary()
        return pa.list_(arrow_field("element", t.element_type, t.contains_null))
    if isinstance(t, MapType):
        if isinstance(t.key_type, UnknownType) or isinstance(t.value_type, UnknownType):
            return pa.binary()
        return pa.map_(pa.field("key", arrow_type(t.key_type), False),
                       arrow_field("value", t.value_type, t.value_contains_null))
    if isinstance(t, StructType):
        return pa.struct([arrow_field(f.name, f.data_type, f.nullable) for f in t.fields])
    return _ARROW_ATOMS[type(t)]


def arrow_field(name: str, t: SparkType, nullable: bool) -> pa.Field:
    """An Arrow field of ``arrow_type(t)``; null-typed fields are always nullable in Arrow."""
    return pa.field(name, arrow_type(t), nullable or isinstance(t, NullType))
