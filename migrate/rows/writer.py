"""Reference writer of the engine's binary rows: typed Arrow columns back into UnsafeRow bytes.

``encode_rows(struct_array, schema)`` produces, for each row, the bytes the engine's own row
projection writes for the same values (layout in ``migrate.rows.layout``; byte-identity is
checked against engine-written state in tests/engine). It is meant for tests, fixtures and
benchmarks, and is deliberately written differently from the vectorised decoder: columns are
turned into plain Python values once (vectorised by pyarrow/numpy), then each row is written by
a small recursive writer. It is not a hot path of the tool, which never re-encodes rows.

Two engine habits it reproduces (common practice, from memory, engine-checked):

* a null field's slot is zero, except a null decimal of precision > 18 in a row, which still
  reserves its 16 zero bytes and records their offset (``offset << 32 | 0``);
* inside arrays a large decimal takes its byte length rounded up to 8, and a null element is a
  zero slot.

``UnknownType`` columns cannot be written and raise ``migrate.errors.Unsupported``.
"""

from __future__ import annotations

import struct
from typing import Any

import numpy as np
import pyarrow as pa

from migrate.errors import Unsupported
from migrate.rows.layout import FIXED_DTYPES, bitset_bytes, element_size, round_up8
from migrate.rows.schema import (
    ArrayType,
    BinaryType,
    BooleanType,
    CalendarIntervalType,
    DecimalType,
    IntegerType,
    LongType,
    MapType,
    NullType,
    SparkType,
    StringType,
    StructType,
    UnknownType,
    arrow_type,
)

__all__ = ["encode_rows", "encode_row_values", "to_row_values"]

_PACK = {"u1": "<B", "<i1": "<b", "<i2": "<h", "<i4": "<i", "<i8": "<q", "<f4": "<f",
         "<f8": "<d"}


def encode_rows(table_or_struct: pa.StructArray | pa.Table | pa.RecordBatch,
                schema: StructType) -> pa.BinaryArray:
    """Encode every row; a null row of a StructArray becomes a null binary value."""
    arr = _as_struct(table_or_struct)
    expected = arrow_type(schema)
    if arr.type != expected:
        try:
            arr = arr.cast(expected)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
            raise TypeError(f"cannot encode {arr.type} as {schema.simple_string()}: {exc}") \
                from None
    values = to_row_values(arr, schema)
    return pa.array([None if v is None else encode_row_values(v, schema) for v in values],
                    type=pa.binary())


def _as_struct(obj: Any) -> pa.StructArray:
    if isinstance(obj, pa.Table):
        obj = obj.combine_chunks().to_batches()
        obj = obj[0] if obj else None
        if obj is None:
            raise TypeError("encode_rows of an empty table needs a StructArray")
    if isinstance(obj, pa.RecordBatch):
        return pa.StructArray.from_arrays(obj.columns, fields=list(obj.schema))
    if isinstance(obj, pa.ChunkedArray):
        obj = obj.combine_chunks()
    if not isinstance(obj, pa.StructArray):
        raise TypeError(f"encode_rows needs a StructArray, Table or RecordBatch, not {type(obj)}")
    return obj


# ------------------------------------------------------------------------------------------
# Arrow columns -> plain Python values in the engine's physical form


def to_row_values(arr: pa.Array, t: SparkType) -> list[Any]:
    """Python values in physical form: ints for dates/times/intervals, unscaled ints for
    decimals, bytes for strings, (months, days, micros) for calendar intervals, lists for
    arrays, lists of (key, value) for maps, tuples for structs; None for null."""
    n = len(arr)
    valid = [True] * n if arr.null_count == 0 else arr.is_valid().to_pylist()
    if isinstance(t, UnknownType):
        raise Unsupported(f"cannot encode a column of unknown type {t.raw}")
    if isinstance(t, NullType):
        return [None] * n
    if isinstance(t, DecimalType):
        words = np.frombuffer(arr.buffers()[1], dtype="<u8")[2 * arr.offset:2 * (arr.offset + n)]
        lo, hi = words[0::2].tolist(), words[1::2].view(np.int64).tolist()
        return [(h << 64) | l if ok else None for l, h, ok in zip(lo, hi, valid)]
    dtype = FIXED_DTYPES.get(type(t))
    if dtype is not None:
        if isinstance(t, BooleanType):
            return arr.to_pylist()
        physical = pa.from_numpy_dtype(np.dtype(dtype).newbyteorder("="))
        raw = arr if arr.type == physical else arr.view(physical)
        vals = raw.fill_null(0).to_numpy(zero_copy_only=False).tolist()
        return [v if ok else None for v, ok in zip(vals, valid)]
    if isinstance(t, StringType):
        return [None if v is None else v.encode("utf-8") for v in arr.to_pylist()]
    if isinstance(t, BinaryType):
        return arr.to_pylist()
    if isinstance(t, CalendarIntervalType):
        parts = [to_row_values(arr.field(i), f) for i, f in
                 enumerate((IntegerType(), IntegerType(), LongType()))]
        return [tuple(p) if ok else None for p, ok in zip(zip(*parts), valid)]
    if isinstance(t, StructType):
        cols = [to_row_values(arr.field(i), f.data_type) for i, f in enumerate(t.fields)]
        rows = zip(*cols) if cols else iter([()] * n)
        return [tuple(r) if ok else None for r, ok in zip(rows, valid)]
    if isinstance(t, ArrayType):
        offsets = arr.offsets.to_numpy().tolist()
        base = offsets[0]
        child = to_row_values(arr.values.slice(base, offsets[-1] - base), t.element_type)
        return [child[a - base:b - base] if ok else None
                for a, b, ok in zip(offsets, offsets[1:], valid)]
    if isinstance(t, MapType):
        offsets = arr.offsets.to_numpy().tolist()
        base = offsets[0]
        size = offsets[-1] - base
        keys = to_row_values(arr.keys.slice(base, size), t.key_type)
        items = to_row_values(arr.items.slice(base, size), t.value_type)
        pairs = list(zip(keys, items))
        return [pairs[a - base:b - base] if ok else None
                for a, b, ok in zip(offsets, offsets[1:], valid)]
    raise AssertionError(f"no writer for {t!r}")


# ------------------------------------------------------------------------------------------
# Python values -> bytes


def _big_decimal_bytes(unscaled: int) -> bytes:
    """Java BigInteger.toByteArray: minimal big-endian two's complement (at least one byte)."""
    bits = unscaled.bit_length() if unscaled >= 0 else (~unscaled).bit_length()
    return unscaled.to_bytes(bits // 8 + 1, "big", signed=True)


def _variable(value: Any, t: SparkType) -> bytes:
    """The unpadded variable-length bytes of a non-null value."""
    if isinstance(t, (StringType, BinaryType)):
        return bytes(value)
    if isinstance(t, DecimalType):
        return _big_decimal_bytes(value)
    if isinstance(t, CalendarIntervalType):
        return struct.pack("<iiq", *value)
    if isinstance(t, StructType):
        return encode_row_values(value, t)
    if isinstance(t, ArrayType):
        return _array_bytes(value, t.element_type)
    if isinstance(t, MapType):
        keys = _array_bytes([k for k, _ in value], t.key_type)
        vals = _array_bytes([v for _, v in value], t.value_type)
        return struct.pack("<q", len(keys)) + keys + vals
    raise Unsupported(f"cannot encode a value of type {t.simple_string()}")


def _fixed(value: Any, t: SparkType) -> bytes:
    if isinstance(t, DecimalType):
        return struct.pack("<q", value)
    if isinstance(t, BooleanType):
        return b"\x01" if value else b"\x00"
    return struct.pack(_PACK[FIXED_DTYPES[type(t)]], value)


def _is_fixed(t: SparkType) -> bool:
    return (isinstance(t, DecimalType) and t.is_compact) or type(t) in FIXED_DTYPES


def encode_row_values(values: tuple | list, t: StructType) -> bytes:
    """One row (a tuple of physical values, see ``to_row_values``) as UnsafeRow bytes."""
    n = len(t.fields)
    head = bitset_bytes(n) + 8 * n
    nulls = bytearray(bitset_bytes(n))
    slots = bytearray(8 * n)
    var = bytearray()
    for j, (f, v) in enumerate(zip(t.fields, values)):
        dt = f.data_type
        if v is None or isinstance(dt, NullType):
            nulls[j // 8] |= 1 << (j % 8)
            if isinstance(dt, DecimalType) and not dt.is_compact:
                slots[8 * j:8 * j + 8] = struct.pack("<Q", (head + len(var)) << 32)
                var += bytes(16)
            continue
        if _is_fixed(dt):
            slots[8 * j:8 * j + 8] = _fixed(v, dt).ljust(8, b"\x00")
            continue
        data = _variable(v, dt)
        slots[8 * j:8 * j + 8] = struct.pack("<Q", (head + len(var)) << 32 | len(data))
        reserve = 16 if isinstance(dt, DecimalType) else round_up8(len(data))
        var += data.ljust(reserve, b"\x00")
    return bytes(nulls) + bytes(slots) + bytes(var)


def _array_bytes(values: list, et: SparkType) -> bytes:
    count = len(values)
    esize = element_size(et)
    head = 8 + bitset_bytes(count)
    fixed_len = round_up8(count * esize)
    nulls = bytearray(bitset_bytes(count))
    slots = bytearray(fixed_len)
    var = bytearray()
    for k, v in enumerate(values):
        if v is None or isinstance(et, NullType):
            nulls[k // 8] |= 1 << (k % 8)
            continue
        if _is_fixed(et):
            slots[k * esize:(k + 1) * esize] = _fixed(v, et)
            continue
        data = _variable(v, et)
        slots[k * 8:k * 8 + 8] = struct.pack("<Q", (head + fixed_len + len(var)) << 32 | len(data))
        var += data.ljust(round_up8(len(data)), b"\x00")
    return struct.pack("<q", count) + bytes(nulls) + bytes(slots) + bytes(var)
