"""Spark data types and state schema files: JSON in, a frozen type model and Arrow types out.

Owns three things:

* ``spark_type_from_json``: the engine's DataType JSON (as stored in schema files and operator
  metadata) into a small frozen-dataclass model (``LongType()``, ``DecimalType(38, 10)``,
  ``StructType((StructField(...), ...))``, ...). Types this module does not know become
  ``UnknownType(raw)`` rather than an error, so a schema can always be parsed; the row decoder
  then leaves such columns undecoded.
* ``arrow_type``: the Arrow type a decoded column of that Spark type has.
* ``parse_state_schema_file``: the binary schema files the engine writes next to state
  (``state/<op>/<part>/_metadata/schema``, and ``state/<op>/_stateSchema/<store>/<id>`` in newer
  releases).

Schema file layouts (Java ``DataOutputStream``; ``writeUTF`` = 2-byte big-endian length then
modified UTF-8):

* ``v1`` (from memory): ``writeUTF("v1")``, ``writeUTF(keyJson)``, ``writeUTF(valueJson)``.
* ``v2`` (observed, Spark 4.3.0 streaming aggregation): ``writeUTF("v2")``, then for the key and
  then the value schema ``writeInt(numChunks)`` followed by ``numChunks`` ``writeUTF`` chunks
  whose concatenation is the schema JSON.
* ``v3`` (observed, Spark 4.3.0 transformWithState): ``writeUTF("v3")``, ``writeInt(count)``,
  then per column family its name, schema ids and chunked JSON documents (see
  ``_column_family_schema``).

No I/O here: callers hand in bytes and a ``where`` (path) for error messages.
"""

from __future__ import annotations

import json
import re
import struct
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa

from migrate.errors import CorruptInput

__all__ = [
    "SparkType", "NullType", "BooleanType", "ByteType", "ShortType", "IntegerType", "LongType",
    "FloatType", "DoubleType", "DecimalType", "StringType", "BinaryType", "DateType",
    "TimestampType", "TimestampNTZType", "DayTimeIntervalType", "YearMonthIntervalType",
    "CalendarIntervalType", "ArrayType", "MapType", "StructField", "StructType", "UnknownType",
    "StateSchema", "spark_type_from_json", "spark_type_to_json", "arrow_type",
    "parse_state_schema_file", "contains_unknown", "MAX_LONG_DIGITS",
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


def _atom(name: str, json_name: str):
    """Make a parameterless atomic type class whose JSON form is ``json_name``."""

    def simple_string(self) -> str:
        return json_name

    cls = dataclass(frozen=True)(type(name, (SparkType,), {"simple_string": simple_string,
                                                          "json_name": json_name,
                                                          "__doc__": f"Spark ``{json_name}``."}))
    return cls


NullType = _atom("NullType", "void")
BooleanType = _atom("BooleanType", "boolean")
ByteType = _atom("ByteType", "byte")
ShortType = _atom("ShortType", "short")
IntegerType = _atom("IntegerType", "integer")
LongType = _atom("LongType", "long")
FloatType = _atom("FloatType", "float")
DoubleType = _atom("DoubleType", "double")
BinaryType = _atom("BinaryType", "binary")
DateType = _atom("DateType", "date")
TimestampType = _atom("TimestampType", "timestamp")
TimestampNTZType = _atom("TimestampNTZType", "timestamp_ntz")
CalendarIntervalType = _atom("CalendarIntervalType", "interval")


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

    ``UnknownType`` maps to ``binary`` (the undecoded bytes, see ``unsafe_row.decode_rows``); a
    container holding an unknown type anywhere inside is itself left undecoded, as ``binary``.
    """
    if contains_unknown(t):
        return pa.binary()
    if isinstance(t, DecimalType):
        return pa.decimal128(t.precision, t.scale)
    if isinstance(t, ArrayType):
        return pa.list_(pa.field("element", arrow_type(t.element_type), t.contains_null))
    if isinstance(t, MapType):
        return pa.map_(pa.field("key", arrow_type(t.key_type), False),
                       pa.field("value", arrow_type(t.value_type), t.value_contains_null))
    if isinstance(t, StructType):
        return pa.struct([pa.field(f.name, arrow_type(f.data_type), f.nullable)
                          for f in t.fields])
    return _ARROW_ATOMS[type(t)]


# ------------------------------------------------------------------------------------------
# State schema files


@dataclass(frozen=True)
class StateSchema:
    """Key and value schema of one state store / column family."""

    key_schema: StructType
    value_schema: StructType
    column_family: str = "default"
    key_state_encoder: dict | None = field(default=None, compare=False, hash=False)
    user_key_encoder_schema: StructType | None = None
    format_version: int = 2
    key_schema_id: int = 0
    value_schema_id: int = 0


class _Reader:
    def __init__(self, data: bytes, where: str) -> None:
        self.data, self.pos, self.where = data, 0, where

    def eof(self) -> bool:
        return self.pos >= len(self.data)

    def take(self, n: int, what: str) -> bytes:
        if self.pos + n > len(self.data):
            raise CorruptInput(f"state schema file truncated while reading {what} "
                               f"(need {n} bytes at offset {self.pos}, file has "
                               f"{len(self.data)})", self.where)
        out = self.data[self.pos:self.pos + n]
        self.pos += n
        return out

    def utf(self, what: str) -> str:
        (n,) = struct.unpack(">H", self.take(2, what))
        return _modified_utf8(self.take(n, what), self.where)

    def chunked(self, what: str) -> str:
        (count,) = struct.unpack(">i", self.take(4, what))
        if count < 0 or count > len(self.data):
            raise CorruptInput(f"state schema file has an impossible chunk count {count} "
                               f"for {what}", self.where)
        return "".join(self.utf(what) for _ in range(count))


def _modified_utf8(raw: bytes, where: str) -> str:
    """Java's modified UTF-8: NUL as C0 80, supplementary characters as surrogate pairs."""
    try:
        text = raw.replace(b"\xc0\x80", b"\x00").decode("utf-8", "surrogatepass")
        return text.encode("utf-16", "surrogatepass").decode("utf-16")
    except UnicodeError as exc:
        raise CorruptInput(f"state schema file holds text that is not modified UTF-8 ({exc})",
                           where) from None


def _struct_from_json_text(text: Any, where: str, what: str) -> StructType:
    try:
        t = spark_type_from_json(text)
    except (ValueError, TypeError, RecursionError) as exc:
        raise CorruptInput(f"{what} in state schema file is not a Spark schema: {exc}",
                           where) from None
    if not isinstance(t, StructType):
        raise CorruptInput(f"{what} in state schema file is {t.simple_string()}, not a struct",
                           where)
    return t


def parse_state_schema_file(data: bytes, where: str) -> list[StateSchema]:
    """Parse a state schema file; one ``StateSchema`` per column family (v1/v2: exactly one)."""
    reader = _Reader(bytes(data), where)
    version_text = reader.utf("the version")
    if not re.fullmatch(r"v\d+", version_text):
        raise CorruptInput(f"state schema file does not start with a version (found "
                           f"{version_text[:20]!r})", where)
    version = int(version_text[1:])
    if version == 1:
        key = _struct_from_json_text(reader.utf("the key schema"), where, "key schema")
        value = _struct_from_json_text(reader.utf("the value schema"), where, "value schema")
        out = [StateSchema(key, value, format_version=1)]
    elif version == 2:
        key = _struct_from_json_text(reader.chunked("the key schema"), where, "key schema")
        value = _struct_from_json_text(reader.chunked("the value schema"), where, "value schema")
        out = [StateSchema(key, value, format_version=2)]
    elif version == 3:
        (count,) = struct.unpack(">i", reader.take(4, "the column family count"))
        if count <= 0 or count > len(reader.data):
            raise CorruptInput(f"state schema file v3 has an impossible column family count "
                               f"{count}", where)
        out = [_column_family_schema(reader) for _ in range(count)]
    else:
        from migrate.errors import Unsupported

        raise Unsupported(f"state schema file version {version} is not supported "
                          f"(known: v1, v2, v3)", where)
    if not reader.eof():
        raise CorruptInput(f"state schema file has {len(reader.data) - reader.pos} unexpected "
                           f"trailing bytes", where)
    return out


def _column_family_schema(reader: _Reader) -> StateSchema:
    """One v3 entry (observed, Spark 4.3.0): ``writeUTF(name)``, ``writeShort(keySchemaId)``,
    chunked key JSON, ``writeShort(valueSchemaId)``, chunked value JSON, chunked key state
    encoder spec JSON, chunked user-key schema JSON (``"{    }"`` when there is none)."""
    where = reader.where
    name = reader.utf("a column family name")
    (key_id,) = struct.unpack(">h", reader.take(2, f"the key schema id of {name!r}"))
    key = _struct_from_json_text(reader.chunked(f"the key schema of {name!r}"), where,
                                 f"key schema of {name!r}")
    (value_id,) = struct.unpack(">h", reader.take(2, f"the value schema id of {name!r}"))
    value = _struct_from_json_text(reader.chunked(f"the value schema of {name!r}"), where,
                                   f"value schema of {name!r}")
    encoder_text = reader.chunked(f"the key encoder of {name!r}")
    user_text = reader.chunked(f"the user key schema of {name!r}")
    try:
        encoder = json.loads(encoder_text)
        user = json.loads(user_text)
    except ValueError as exc:
        raise CorruptInput(f"column family {name!r}: encoder spec or user key schema is not "
                           f"JSON ({exc})", where) from None
    if not isinstance(encoder, dict):
        raise CorruptInput(f"column family {name!r}: encoder spec is not a JSON object", where)
    user_schema = None
    if isinstance(user, dict) and user.get("type") is not None:
        user_schema = _struct_from_json_text(user, where, f"user key schema of {name!r}")
    return StateSchema(key_schema=key, value_schema=value, column_family=name,
                       key_state_encoder=encoder, user_key_encoder_schema=user_schema,
                       format_version=3, key_schema_id=key_id, value_schema_id=value_id)
