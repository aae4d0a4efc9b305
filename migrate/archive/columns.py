"""Typed columns for the archive: which schema file describes a store, and rows -> flat columns.

The raw ``key``/``value`` bytes are the archive's source of truth; the typed columns exist so
people can query the state. Each field of the key schema becomes a column ``key_<field>``, each
field of the value schema ``value_<field>`` (state schemas may repeat a field name, e.g. the
buffers of two ``sum`` aggregates: later ones get ``_2``, ``_3``, ...).

Decoding never blocks an export. Without a schema file, without the row decoder
(``migrate.rows.unsafe_row``), for schemas with several column families, or when a batch does
not decode, the typed columns are left out (or null for that batch), the manifest marks them as
not decoded, and one warning is given per store.

Schema files, as the engine lays them out (observed with Spark 4.3.0 for the default store; named
stores from memory): ``state/<op>/_stateSchema/<store>/<batch>_<uuid>`` (newer operators; the
newest one written at or before the archived batch applies), else
``state/<op>/<partition>/_metadata/schema`` for the default store and
``state/<op>/<partition>/<store>/_metadata/schema`` for a named store.

One field is decoded wider than declared: per-group state (``flatMapGroupsWithState``,
``applyInPandasWithState``) in state format 1 appends ``timeoutTimestamp`` to the value schema as
``integer`` but stores the 8-byte epoch-millisecond timeout in its fixed-width slot (observed on
4.3.0 and 3.5.9: the engine's own restart fails its value-row check on such state unless that
check is off). Read as the declared int it keeps the low 4 bytes only, so that top-level field is
decoded as a long and its column is listed as ``long``. The raw bytes are untouched either way.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field, replace
from typing import Any

import pyarrow as pa

from ..errors import StateshiftError
from ..providers.base import ROW_SCHEMA
from .manifest import Column

_SCHEMA_V3 = re.compile(r"^state/(\d+)/_stateSchema/([^/]+)/([^/]+)$")
_SCHEMA_V2 = re.compile(r"^state/(\d+)/(\d+)/(?:([^/]+)/)?_metadata/schema$")
_LEADING_INT = re.compile(r"^(\d+)")

#: what a failing decode may raise besides our own errors (a row that does not fit its schema)
_DECODE_ERRORS: tuple[type[BaseException], ...] = (StateshiftError, ValueError, IndexError, TypeError, pa.ArrowException)


def find_schema_file(paths: Iterable[str], operator_id: int, store: str, batch_id: int) -> str | None:
    """The checkpoint-relative schema file that describes ``store`` of ``operator_id``, if any."""
    v3: list[tuple[int, str]] = []
    v2: list[tuple[int, str]] = []
    for rel in paths:
        m = _SCHEMA_V3.match(rel)
        if m and int(m.group(1)) == operator_id and m.group(2) == store and not m.group(3).startswith("."):
            lead = _LEADING_INT.match(m.group(3))
            v3.append((int(lead.group(1)) if lead else -1, rel))
            continue
        m = _SCHEMA_V2.match(rel)
        if m and int(m.group(1)) == operator_id and (m.group(3) or "default") == store:
            v2.append((int(m.group(2)), rel))
    if v3:
        eligible = [c for c in v3 if c[0] <= batch_id] or v3
        return max(eligible)[1]
    if v2:
        return min(v2)[1]
    return None


def _unique(name: str, taken: set[str]) -> str:
    out, n = name, 2
    while out in taken:
        out, n = f"{name}_{n}", n + 1
    taken.add(out)
    return out


def _decode_quietly(data: pa.Array, schema: Any, where: str) -> pa.StructArray:
    """The row decoder without its own warning (the archive warns once per store itself)."""
    from ..rows.unsafe_row import decode_rows_report

    return decode_rows_report(data, schema, where).rows


def _decoder() -> tuple[Callable[..., pa.StructArray] | None, str | None]:
    try:
        from ..rows.unsafe_row import decode_rows_report  # noqa: F401
    except ImportError as exc:
        return None, f"the row decoder is not available in this build ({exc}); raw bytes only"
    return _decode_quietly, None


@dataclass(frozen=True)
class Side:
    """One side (key or value) of a store's rows and how it is decoded."""

    name: str  # "key" or "value"
    schema: Any  # migrate.rows.schema.StructType as the schema file declares it, or None
    columns: tuple[Column, ...]
    arrow_fields: tuple[pa.Field, ...]
    stored: Any = None  # the StructType the rows are decoded with (``schema`` but for ``_as_stored``)


@dataclass(frozen=True)
class RowDecoder:
    """Turns batches of raw rows into the archive's record batches (raw + typed columns)."""

    key: Side
    value: Side
    where: str
    note: str | None = None
    decode_fn: Callable[..., pa.StructArray] | None = field(default=None, compare=False)

    @property
    def decoded(self) -> bool:
        return bool(self.decode_fn) and any(c.decoded for c in self.key.columns + self.value.columns)

    @property
    def columns(self) -> tuple[Column, ...]:
        return self.key.columns + self.value.columns

    @property
    def schema(self) -> pa.Schema:
        return pa.schema(list(ROW_SCHEMA) + list(self.key.arrow_fields) + list(self.value.arrow_fields))

    def _side(self, side: Side, raw: pa.Array) -> list[pa.Array]:
        if not side.arrow_fields:
            return []
        assert self.decode_fn is not None
        struct = self.decode_fn(raw, side.stored, self.where)
        out = []
        for i, f in enumerate(side.arrow_fields):
            col = struct.field(i)
            if not col.type.equals(f.type):
                col = col.cast(f.type)
            out.append(col)
        return out

    def decode(self, batch: pa.RecordBatch) -> tuple[pa.RecordBatch, str | None]:
        """(archive batch, None) or (archive batch with null typed columns, why it failed)."""
        raw = [batch.column("key"), batch.column("value")]
        typed_fields = list(self.key.arrow_fields) + list(self.value.arrow_fields)
        if not typed_fields:
            return pa.RecordBatch.from_arrays(raw, schema=self.schema), None
        try:
            typed = self._side(self.key, raw[0]) + self._side(self.value, raw[1])
        except _DECODE_ERRORS as exc:
            nulls = [pa.nulls(batch.num_rows, f.type) for f in typed_fields]
            return pa.RecordBatch.from_arrays(raw + nulls, schema=self.schema), " ".join(str(exc).split())
        return pa.RecordBatch.from_arrays(raw + typed, schema=self.schema), None


def _raw_only_side(name: str, schema: Any) -> Side:
    if schema is None:
        return Side(name, None, (), ())
    cols = tuple(Column(name, f.name, f.data_type.simple_string(), None, False) for f in schema.fields)
    return Side(name, schema, cols, ())


#: (side, top-level field name) of the integer fields the engine stores as longs, see the module
#: docstring.
_STORED_AS_LONG = {("value", "timeoutTimestamp")}


def _as_stored(name: str, schema: Any) -> Any:
    """``schema`` with the fields of ``_STORED_AS_LONG`` typed as the engine stores them."""
    from ..rows.types import IntegerType, LongType

    fields = tuple(
        replace(f, data_type=LongType()) if (name, f.name) in _STORED_AS_LONG and isinstance(f.data_type, IntegerType) else f
        for f in schema.fields
    )
    return replace(schema, fields=fields) if fields != schema.fields else schema


def _typed_side(name: str, declared: Any) -> Side:
    from ..rows.schema import arrow_type, contains_unknown

    schema = _as_stored(name, declared)
    taken = {"key", "value"}
    cols: list[Column] = []
    fields: list[pa.Field] = []
    for f in schema.fields:
        column = _unique(f"{name}_{f.name}", taken)
        cols.append(Column(name, f.name, f.data_type.simple_string(), column, not contains_unknown(f.data_type)))
        fields.append(pa.field(column, arrow_type(f.data_type), True))
    return Side(name, declared, tuple(cols), tuple(fields), schema)


def raw_decoder(where: str, note: str | None, key_schema: Any = None, value_schema: Any = None) -> RowDecoder:
    """A decoder that keeps only the raw bytes (the fields are listed as not decoded)."""
    return RowDecoder(_raw_only_side("key", key_schema), _raw_only_side("value", value_schema), where, note)


def decoder_for(schema_bytes: bytes | None, where: str) -> RowDecoder:
    """The decoder for one store from its schema file bytes (``None``: no schema file)."""
    if schema_bytes is None:
        return raw_decoder(where, "no state schema file found for this store; raw bytes only")
    try:
        from ..rows.schema import parse_state_schema_file
    except ImportError as exc:  # pragma: no cover - schema.py ships with the package
        return raw_decoder(where, f"schema parser unavailable ({exc}); raw bytes only")
    try:
        schemas = parse_state_schema_file(schema_bytes, where)
    except StateshiftError as exc:
        return raw_decoder(where, f"schema file not understood ({exc}); raw bytes only")
    chosen = [s for s in schemas if s.column_family == "default"] if len(schemas) > 1 else schemas
    if len(chosen) != 1:
        names = ", ".join(s.column_family for s in schemas)
        return raw_decoder(where, f"schema file lists several column families ({names}); raw bytes only")
    key_schema, value_schema = chosen[0].key_schema, chosen[0].value_schema
    fn, why = _decoder()
    if fn is None:
        return raw_decoder(where, why, key_schema, value_schema)
    key, value = _typed_side("key", key_schema), _typed_side("value", value_schema)
    # names must be unique across both sides (they are: different prefixes), checked for safety
    names = [f.name for f in key.arrow_fields + value.arrow_fields]
    assert len(set(names)) == len(names)
    undecoded = [c.field for c in key.columns + value.columns if not c.decoded]
    note = f"fields of a type this version cannot decode kept as raw bytes: {', '.join(undecoded)}" if undecoded else None
    return RowDecoder(key, value, where, note, fn)


def schema_json(decoder: RowDecoder) -> tuple[Any, Any]:
    """The engine-form JSON of the key and value schemas (for the manifest)."""
    from ..rows.schema import spark_type_to_json

    k = decoder.key.schema
    v = decoder.value.schema
    return (spark_type_to_json(k) if k is not None else None, spark_type_to_json(v) if v is not None else None)
