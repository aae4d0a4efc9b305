"""Vectorised decoding of the engine's binary rows (UnsafeRow) into typed Arrow columns.

``decode_rows(binary_array, schema)`` turns a whole batch of row bytes into a
``pyarrow.StructArray`` with one child per schema field, typed by ``schema.arrow_type``. A flat
schema (fixed-width, string and binary fields) over rows without nulls is decoded by the compiled
``_flatrows`` when it is built (:func:`_flat`); everything else, and every malformed row, by numpy
over the batch's concatenated data buffer, the reference: fixed-width fields are gathered
with one fancy-index per field, strings and binaries are built from offset arithmetic, and
nested structs, arrays and maps recurse once per nesting level (never once per row). The byte
layout is described in ``migrate.rows.layout``.

Types the model does not know (``UnknownType``: variant, geometry, ...) are not guessed at:

* an unknown field of a struct becomes a ``binary`` column holding its raw 8-byte slot;
* an array whose element type, or a map whose key or value type, is unknown becomes a
  ``binary`` column holding the container's raw bytes (its element width is unknown).

``decode_rows_report`` also returns the dotted paths of those columns; ``decode_rows`` warns
(``UndecodedColumnsWarning``, shown once per distinct message by Python's default filter) or,
with ``unsupported="error"``, raises ``migrate.errors.Unsupported``.

Malformed bytes (slots pointing outside their row, impossible counts, non-UTF-8 strings) raise
``migrate.errors.CorruptInput`` naming ``where`` and the first bad row; nothing is returned
partially. ``encode_rows`` (the reverse, per row, for tests and benchmarks) lives in
``migrate.rows.writer`` and is re-exported here.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from migrate.errors import CorruptInput, Unsupported
from migrate.rows.layout import FIXED_DTYPES, bitset_bytes, element_size
from migrate.rows.schema import (
    ArrayType,
    BinaryType,
    CalendarIntervalType,
    DecimalType,
    MapType,
    NullType,
    SparkType,
    StringType,
    StructType,
    UnknownType,
    arrow_type,
)
from migrate.rows.writer import encode_rows

try:  # the compiled decode of flat rows (setup.py builds it when a C compiler is there)
    from migrate.rows import _flatrows
except ImportError:  # not built: every batch takes the numpy way below
    _flatrows = None

__all__ = ["decode_rows", "decode_rows_report", "DecodeResult", "UndecodedColumnsWarning",
           "encode_rows"]


class UndecodedColumnsWarning(UserWarning):
    """Some columns were returned as raw bytes because their type is not supported."""


@dataclass(frozen=True)
class DecodeResult:
    rows: pa.StructArray
    undecoded: tuple[str, ...]  # dotted paths of columns left as raw bytes


@dataclass
class _Ctx:
    buf: np.ndarray  # uint8, the batch's data buffer (padded so 16-byte reads never overrun)
    where: str
    rows: np.ndarray  # for each item of the level being decoded: its row in the batch
    undecoded: list[str] = field(default_factory=list)
    _views: dict = field(default_factory=dict)

    def view(self, dtype: np.dtype, start: int) -> np.ndarray:
        """The buffer from byte ``start`` on, as an array of ``dtype`` (cached per call)."""
        key = (dtype.str, start)
        if key not in self._views:
            count = (len(self.buf) - start) // dtype.itemsize
            self._views[key] = np.frombuffer(self.buf, dtype=dtype, count=count, offset=start)
        return self._views[key]

    def fail(self, message: str, bad: np.ndarray, path: str) -> None:
        """Raise CorruptInput naming the batch row of the first True of ``bad``."""
        first = int(self.rows[np.flatnonzero(bad)[0]])
        raise CorruptInput(f"row bytes are malformed at {path or 'row'} (row {first} of the "
                           f"batch): {message}", self.where)


# ------------------------------------------------------------------------------------------
# public entry points


def decode_rows(data: pa.Array | pa.ChunkedArray, schema: StructType, where: str = "", *,
                unsupported: str = "raw") -> pa.StructArray:
    """Decode a batch of UnsafeRow bytes (``binary``/``large_binary``) into a StructArray.

    ``unsupported``: ``"raw"`` (default) leaves columns of unknown types as binary (see the
    module docstring) and warns; ``"error"`` raises ``Unsupported`` instead.
    """
    result = decode_rows_report(data, schema, where, unsupported=unsupported)
    if result.undecoded:
        warnings.warn(f"row columns of types the decoder does not support were left as raw "
                      f"bytes: {', '.join(result.undecoded)}", UndecodedColumnsWarning,
                      stacklevel=2)
    return result.rows


def decode_rows_report(data: pa.Array | pa.ChunkedArray, schema: StructType, where: str = "",
                       *, unsupported: str = "raw") -> DecodeResult:
    """Like ``decode_rows`` but silent, and returns which columns were left undecoded."""
    if unsupported not in ("raw", "error"):
        raise ValueError(f"unsupported= must be 'raw' or 'error', not {unsupported!r}")
    if not isinstance(schema, StructType):
        raise TypeError("schema must be a StructType")
    if isinstance(data, pa.ChunkedArray):
        data = data.combine_chunks() if data.num_chunks != 1 else data.chunk(0)
    if pa.types.is_binary(data.type):
        offsets_dtype = np.int32
    elif pa.types.is_large_binary(data.type):
        offsets_dtype = np.int64
    else:
        raise TypeError(f"decode_rows needs a binary array, not {data.type}")
    flat = _flat(data, schema)
    if flat is not None:
        return DecodeResult(flat, ())
    n = len(data)
    bufs = data.buffers()
    offsets = np.frombuffer(bufs[1], dtype=offsets_dtype)[data.offset:data.offset + n + 1]
    offsets = offsets.astype(np.int64) if n else np.zeros(1, np.int64)
    raw = np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None else np.zeros(0, np.uint8)
    ctx = _Ctx(_padded(raw, int(offsets[-1])), where, np.arange(n))
    starts = offsets[:-1]
    lengths = np.diff(offsets)
    valid = _valid_mask(data)
    rows = _struct(ctx, starts, lengths, valid, schema, "")
    if ctx.undecoded and unsupported == "error":
        raise Unsupported(f"row columns of unsupported types: {', '.join(ctx.undecoded)}",
                          where)
    return DecodeResult(rows, tuple(ctx.undecoded))


# ------------------------------------------------------------------------------------------
# flat rows, compiled

# the field kinds of migrate/rows/_flatrows.c: a fixed-width value copied from the first bytes of
# its slot (its width), a boolean, or a string or binary (offset and size in the slot)
_FLAT_KINDS = {"u1": b"z", "<i1": b"1", "<i2": b"2", "<i4": b"4", "<f4": b"4", "<i8": b"8", "<f8": b"8"}


def _flat_kinds(schema: StructType) -> bytes | None:
    kinds = []
    for f in schema.fields:
        t = f.data_type
        if isinstance(t, (StringType, BinaryType)):
            kinds.append(b"v")
        elif type(t) in FIXED_DTYPES:
            kinds.append(_FLAT_KINDS[FIXED_DTYPES[type(t)]])
        else:
            return None
    return b"".join(kinds) or None


def _flat(data: pa.Array, schema: StructType) -> pa.StructArray | None:
    """The rows decoded by the compiled :mod:`._flatrows`, for a schema of fixed-width, string and
    binary fields only and rows without nulls; None otherwise, and None for rows it finds
    malformed or strings that are not UTF-8, which the numpy way then decodes or reports (naming
    the row): it is the reference. Measured on four 10M-key benchmark partitions (a string and a
    long in the key, four longs in the value; the archive's typed columns of both), three rounds
    alternating in one process: 0.217-0.231 -> 0.085-0.088 CPU us per row."""
    kinds = _flat_kinds(schema) if _flatrows is not None and data.null_count == 0 and len(data) else None
    if kinds is None:
        return None
    bufs = data.buffers()
    got = _flatrows.decode(bufs[1], bufs[2] if bufs[2] is not None else b"", data.offset,
                           pa.types.is_large_binary(data.type), len(data), kinds)
    if got is None:
        return None
    n = len(data)
    children = []
    for f, part in zip(schema.fields, got):
        nulls, validity = part[0], pa.py_buffer(part[1]) if part[0] else None
        if len(part) == 4:
            atype = pa.string() if isinstance(f.data_type, StringType) else pa.binary()
            child = pa.Array.from_buffers(atype, n, [validity, pa.py_buffer(part[2]), pa.py_buffer(part[3])], null_count=nulls)
            if isinstance(f.data_type, StringType):
                try:
                    child.validate(full=True)
                except pa.ArrowInvalid:
                    return None
        else:
            child = pa.Array.from_buffers(arrow_type(f.data_type), n, [validity, pa.py_buffer(part[2])], null_count=nulls)
        children.append(child)
    atype = pa.struct([pa.field(f.name, c.type, f.nullable) for f, c in zip(schema.fields, children)])
    return pa.Array.from_buffers(atype, n, [None], null_count=0, children=children)


# ------------------------------------------------------------------------------------------
# numpy helpers


def _padded(raw: np.ndarray, used: int) -> np.ndarray:
    """The data buffer with at least 16 readable bytes past the last row (copy only if short)."""
    if len(raw) >= used + 16:
        return raw
    out = np.zeros(used + 16, np.uint8)
    out[:min(len(raw), used)] = raw[:used]
    return out


def _valid_mask(arr: pa.Array) -> np.ndarray:
    if arr.null_count == 0:
        return np.ones(len(arr), dtype=bool)
    return np.asarray(arr.is_valid().to_numpy(zero_copy_only=False), dtype=bool)


def _read(ctx: _Ctx, pos: np.ndarray, dtype: str, valid: np.ndarray) -> np.ndarray:
    """Read one little-endian value of ``dtype`` at each position (0 where not valid).

    Positions are grouped by their remainder modulo the value width; each group is one
    fancy-index into a typed (possibly unaligned) view of the buffer. Inside a row almost every
    read shares the row start's remainder, so this is usually a single gather.
    """
    dt = np.dtype(dtype)
    width = dt.itemsize
    everywhere = bool(valid.all())
    if everywhere:
        safe = pos
    else:  # read a valid position in place of the others (same remainder), zeroed below
        first = np.flatnonzero(valid)
        safe = np.where(valid, pos, pos[first[0]] if len(first) else 0)
    if width == 1:
        out = ctx.buf[safe].view(dt)
    elif len(safe) and not width & (width - 1):  # 2, 4, 8 bytes: remainders by a mask, one check
        shift = width.bit_length() - 1
        residue = safe & (width - 1)
        r = int(residue[0])
        if (residue == r).all():
            out = ctx.view(dt, r)[(safe - r) >> shift]
        else:
            out = _read_by_remainder(ctx, safe, residue, dt)
    else:
        out = _read_by_remainder(ctx, safe, safe % width, dt)
    if not everywhere:
        out = np.where(valid, out, np.zeros(1, dt))
    return out


def _read_by_remainder(ctx: _Ctx, safe: np.ndarray, residue: np.ndarray, dt: np.dtype) -> np.ndarray:
    """:func:`_read` for positions of several remainders modulo the width: one gather each."""
    width = dt.itemsize
    out = np.empty(len(safe), dt)
    for r in np.flatnonzero(np.bincount(residue, minlength=width)).tolist():
        m = residue == r
        out[m] = ctx.view(dt, r)[(safe[m] - r) // width]
    return out


def _bit(ctx: _Ctx, start: np.ndarray, index: np.ndarray | int, valid: np.ndarray) -> np.ndarray:
    """The null bit ``index`` of bitsets starting at ``start`` (False where not valid)."""
    byte = _read(ctx, start + index // 8, "u1", valid)
    return ((byte >> (np.asarray(index) % 8).astype(np.uint8)) & 1).astype(bool) & valid


def _bitmap(valid: np.ndarray) -> pa.Buffer | None:
    if valid.all():
        return None
    return pa.py_buffer(np.packbits(valid, bitorder="little"))


def _from_numpy(atype: pa.DataType, values: np.ndarray, valid: np.ndarray) -> pa.Array:
    n = len(valid)
    nulls = int(n - np.count_nonzero(valid))
    if pa.types.is_boolean(atype):
        data = pa.py_buffer(np.packbits(values.astype(bool), bitorder="little"))
    else:
        data = pa.py_buffer(np.ascontiguousarray(values))
    return pa.Array.from_buffers(atype, n, [_bitmap(valid), data], null_count=nulls)


def _var_slots(ctx: _Ctx, slot: np.ndarray, base: np.ndarray, end: np.ndarray,
               valid: np.ndarray, path: str) -> tuple[np.ndarray, np.ndarray]:
    """Absolute start and size of variable-length values from their ``offset<<32|size`` slots."""
    word = _read(ctx, slot, "<u8", valid)
    size = (word & 0xFFFFFFFF).astype(np.int64)
    start = base + (word >> 32).astype(np.int64)
    bad = valid & (start + size > end)
    if bad.any():
        ctx.fail("a variable-length value points past the end of its row", bad, path)
    return start, np.where(valid, size, 0)


def _gather_bytes(ctx: _Ctx, start: np.ndarray, size: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Concatenate byte ranges: returns (int64 offsets of length n+1, uint8 values).

    When the ranges come in buffer order (each one starts at or after the end of the one before:
    the values of one field over the rows of a batch always do), the buffer is viewed as one
    Arrow binary array whose elements alternate range / gap, and Arrow's ``take`` of the ranges
    copies them in C; else (elements of nested arrays may point anywhere in their row) one numpy
    fancy-index over every byte. Measured on four 10M-key benchmark partitions (a string and a
    long in the key, four longs in the value), one run each: the whole decode 0.28 -> 0.19-0.20
    CPU us per row; with the single-gather reads of :func:`_read` and the one read of the null
    bits per struct, 0.33-0.39 -> 0.19-0.22 (both versions alternating in one process, twice)."""
    n = len(size)
    out_offsets = np.zeros(n + 1, np.int64)
    np.cumsum(size, out=out_offsets[1:])
    total = int(out_offsets[-1])
    if total == 0:
        return out_offsets, np.zeros(0, np.uint8)
    bounds = np.empty(2 * n, np.int64)
    bounds[0::2] = start
    bounds[1::2] = start + size
    if n > 1 and bool((bounds[1:] >= bounds[:-1]).all()):
        ranges = pa.Array.from_buffers(pa.large_binary(), 2 * n - 1, [None, pa.py_buffer(bounds), pa.py_buffer(ctx.buf)])
        taken = ranges.take(pa.array(np.arange(0, 2 * n, 2, dtype=np.int64)))
        assert taken.offset == 0  # a fresh array: its data buffer starts with the first range
        data = taken.buffers()[2]
        return out_offsets, np.frombuffer(data, np.uint8, count=total, offset=0) if data is not None else np.zeros(0, np.uint8)
    idx = np.repeat(start - out_offsets[:-1], size) + np.arange(total, dtype=np.int64)
    return out_offsets, ctx.buf[idx]


# ------------------------------------------------------------------------------------------
# decoding by type


def _struct(ctx: _Ctx, start: np.ndarray, length: np.ndarray, valid: np.ndarray,
            t: StructType, path: str) -> pa.StructArray:
    nfields = len(t.fields)
    null_bytes = bitset_bytes(nfields)
    fixed = null_bytes + 8 * nfields
    bad = valid & (length < fixed)
    if bad.any():
        ctx.fail(f"a row of {nfields} fields needs at least {fixed} bytes", bad, path)
    end = start + length
    children = []
    # the first 64 null bits in one read (the bitset is little-endian 64-bit words), not one per field
    first_word = _read(ctx, start, "<u8", valid) if nfields else None
    for j, f in enumerate(t.fields):
        child_path = f"{path}.{f.name}" if path else f.name
        if j < 64:
            field_valid = valid & (((first_word >> np.uint64(j)) & np.uint64(1)) == 0)
        else:
            field_valid = valid & ~_bit(ctx, start, j, valid)
        slot = start + null_bytes + 8 * j
        children.append(_value(ctx, slot, start, end, field_valid, f.data_type, 8, child_path))
    atype = pa.struct([pa.field(f.name, c.type, f.nullable or isinstance(f.data_type, NullType))
                       for f, c in zip(t.fields, children)])
    nulls = int(len(valid) - np.count_nonzero(valid))
    return pa.Array.from_buffers(atype, len(valid), [_bitmap(valid)], null_count=nulls,
                                 children=children)


def _value(ctx: _Ctx, slot: np.ndarray, base: np.ndarray, end: np.ndarray, valid: np.ndarray,
           t: SparkType, width: int, path: str) -> pa.Array:
    """Decode the values whose slots are at ``slot`` (containers start at ``base``)."""
    dtype = FIXED_DTYPES.get(type(t))
    if dtype is not None:
        return _from_numpy(arrow_type(t), _read(ctx, slot, dtype, valid), valid)
    if isinstance(t, NullType):
        return pa.nulls(len(valid))
    if isinstance(t, DecimalType) and t.is_compact:
        unscaled = _read(ctx, slot, "<i8", valid)
        pairs = np.empty((len(unscaled), 2), np.int64)
        pairs[:, 0] = unscaled
        pairs[:, 1] = unscaled >> 63
        return _from_numpy(arrow_type(t), pairs, valid)
    if isinstance(t, UnknownType):
        ctx.undecoded.append(f"{path} ({t.raw})")
        offsets, data = _gather_bytes(ctx, np.where(valid, slot, 0), np.where(valid, width, 0))
        return _binary(pa.binary(), offsets, data, valid)
    start, size = _var_slots(ctx, slot, base, end, valid, path)
    if isinstance(t, (StringType, BinaryType)):
        offsets, data = _gather_bytes(ctx, start, size)
        if isinstance(t, StringType):
            return _string(ctx, offsets, data, valid, path)
        return _binary(pa.binary(), offsets, data, valid)
    if isinstance(t, DecimalType):
        return _big_decimal(ctx, start, size, valid, t, path)
    if isinstance(t, CalendarIntervalType):
        return _calendar(ctx, start, size, valid, path)
    if isinstance(t, StructType):
        return _struct(ctx, start, size, valid, t, path)
    if isinstance(t, ArrayType):
        if isinstance(t.element_type, UnknownType):
            return _raw_container(ctx, start, size, valid, t, path)
        return _array(ctx, start, size, valid, t, path)
    if isinstance(t, MapType):
        if isinstance(t.key_type, UnknownType) or isinstance(t.value_type, UnknownType):
            return _raw_container(ctx, start, size, valid, t, path)
        return _map(ctx, start, size, valid, t, path)
    raise AssertionError(f"no decoder for {t!r}")  # every model type is handled above


def _binary(atype: pa.DataType, offsets: np.ndarray, data: np.ndarray,
            valid: np.ndarray) -> pa.Array:
    n = len(valid)
    if offsets[-1] > np.iinfo(np.int32).max:
        raise Unsupported("a batch holds more than 2 GiB of one string/binary column; "
                          "decode it in smaller batches")
    return pa.Array.from_buffers(atype, n, [_bitmap(valid), pa.py_buffer(offsets.astype(np.int32)),
                                            pa.py_buffer(data)],
                                 null_count=int(n - np.count_nonzero(valid)))


def _string(ctx: _Ctx, offsets: np.ndarray, data: np.ndarray, valid: np.ndarray,
            path: str) -> pa.Array:
    out = _binary(pa.string(), offsets, data, valid)
    try:
        out.validate(full=True)
    except pa.ArrowInvalid:
        bad = np.zeros(len(valid), bool)
        for i in np.flatnonzero(valid):  # error path only: find the first bad row
            try:
                bytes(data[offsets[i]:offsets[i + 1]]).decode("utf-8")
            except UnicodeDecodeError:
                bad[i] = True
                break
        if not bad.any():
            raise
        ctx.fail("a string is not valid UTF-8", bad, path)
    return out


def _raw_container(ctx: _Ctx, start: np.ndarray, size: np.ndarray, valid: np.ndarray,
                   t: SparkType, path: str) -> pa.Array:
    ctx.undecoded.append(f"{path} ({t.simple_string()})")
    offsets, data = _gather_bytes(ctx, start, size)
    return _binary(pa.binary(), offsets, data, valid)


def _big_decimal(ctx: _Ctx, start: np.ndarray, size: np.ndarray, valid: np.ndarray,
                 t: DecimalType, path: str) -> pa.Array:
    bad = valid & ((size < 1) | (size > 16))
    if bad.any():
        ctx.fail(f"a decimal({t.precision},{t.scale}) needs 1 to 16 bytes", bad, path)
    n = len(valid)
    negative = (_read(ctx, start, "u1", valid) & 0x80) != 0
    out = np.zeros((n, 16), np.uint8)
    out[negative] = 0xFF
    offsets = np.zeros(n + 1, np.int64)
    np.cumsum(size, out=offsets[1:])
    total = int(offsets[-1])
    if total:
        rows = np.repeat(np.arange(n), size)
        j = np.arange(total, dtype=np.int64) - offsets[rows]
        # big-endian byte j lands at little-endian position size-1-j
        out[rows, size[rows] - 1 - j] = ctx.buf[start[rows] + j]
    return _from_numpy(arrow_type(t), out, valid)


def _calendar(ctx: _Ctx, start: np.ndarray, size: np.ndarray, valid: np.ndarray,
              path: str) -> pa.Array:
    bad = valid & (size < 16)
    if bad.any():
        ctx.fail("a calendar interval needs 16 bytes", bad, path)
    everywhere = np.ones(len(valid), bool)
    months = _from_numpy(pa.int32(), _read(ctx, start, "<i4", valid), everywhere)
    days = _from_numpy(pa.int32(), _read(ctx, start + 4, "<i4", valid), everywhere)
    micros = _from_numpy(pa.int64(), _read(ctx, start + 8, "<i8", valid), everywhere)
    atype = arrow_type(CalendarIntervalType())
    return pa.Array.from_buffers(atype, len(valid), [_bitmap(valid)],
                                 null_count=int(len(valid) - np.count_nonzero(valid)),
                                 children=[months, days, micros])


def _elements(ctx: _Ctx, start: np.ndarray, size: np.ndarray, valid: np.ndarray,
              t: ArrayType, path: str) -> tuple[np.ndarray, pa.Array]:
    """Decode arrays: returns (int64 list offsets, flattened decoded elements)."""
    bad = valid & (size < 8)
    if bad.any():
        ctx.fail("an array needs at least 8 bytes", bad, path)
    count = _read(ctx, start, "<i8", valid)
    esize = element_size(t.element_type)
    bad = valid & ((count < 0) | (count > size))
    if not bad.any():
        header = 8 + ((count + 63) // 64) * 8
        bad = valid & (header + count * esize > size)
    if bad.any():
        ctx.fail("an array's element count does not fit its size", bad, path)
    list_offsets = np.zeros(len(count) + 1, np.int64)
    np.cumsum(count, out=list_offsets[1:])
    total = int(list_offsets[-1])
    owner = np.repeat(np.arange(len(count)), count)
    k = np.arange(total, dtype=np.int64) - list_offsets[owner]
    a_start = start[owner]
    everywhere = np.ones(total, bool)
    outer_rows = ctx.rows
    ctx.rows = outer_rows[owner]  # errors below name the batch row of the element
    try:
        elem_valid = ~_bit(ctx, a_start + 8, k, everywhere)
        if not t.contains_null and not isinstance(t.element_type, NullType) \
                and not elem_valid.all():
            ctx.fail("a null element in an array declared without nulls", ~elem_valid, path)
        slot = a_start + header[owner] + k * esize
        elems = _value(ctx, slot, a_start, a_start + size[owner], elem_valid, t.element_type,
                       esize, f"{path}[]")
    finally:
        ctx.rows = outer_rows
    return list_offsets, elems


def _array(ctx: _Ctx, start: np.ndarray, size: np.ndarray, valid: np.ndarray, t: ArrayType,
           path: str) -> pa.Array:
    offsets, elems = _elements(ctx, start, size, valid, t, path)
    if offsets[-1] > np.iinfo(np.int32).max:
        raise Unsupported("a batch holds more than 2**31 array elements in one column; decode "
                          "it in smaller batches", ctx.where)
    atype = pa.list_(pa.field("element", elems.type,
                              t.contains_null or isinstance(t.element_type, NullType)))
    return pa.Array.from_buffers(atype, len(valid), [_bitmap(valid),
                                                     pa.py_buffer(offsets.astype(np.int32))],
                                 null_count=int(len(valid) - np.count_nonzero(valid)),
                                 children=[elems])


def _map(ctx: _Ctx, start: np.ndarray, size: np.ndarray, valid: np.ndarray, t: MapType,
         path: str) -> pa.Array:
    bad = valid & (size < 8)
    if bad.any():
        ctx.fail("a map needs at least 8 bytes", bad, path)
    key_bytes = _read(ctx, start, "<i8", valid)
    bad = valid & ((key_bytes < 0) | (key_bytes > size - 8))
    if bad.any():
        ctx.fail("a map's key-array size does not fit the map", bad, path)
    key_bytes = np.where(valid, key_bytes, 0)
    koff, keys = _elements(ctx, start + 8, key_bytes, valid, ArrayType(t.key_type, False),
                           f"{path}.key")
    voff, values = _elements(ctx, start + 8 + key_bytes, np.where(valid, size - 8 - key_bytes, 0),
                             valid, ArrayType(t.value_type, t.value_contains_null),
                             f"{path}.value")
    bad = (koff[1:] - koff[:-1]) != (voff[1:] - voff[:-1])
    if bad.any():
        ctx.fail("a map's key and value arrays differ in length", bad, path)
    atype = pa.map_(pa.field("key", keys.type, False),
                    pa.field("value", values.type,
                             t.value_contains_null or isinstance(t.value_type, NullType)))
    entries = pa.StructArray.from_arrays([keys, values], fields=[atype.key_field, atype.item_field])
    return pa.Array.from_buffers(atype, len(valid), [_bitmap(valid),
                                                     pa.py_buffer(koff.astype(np.int32))],
                                 null_count=int(len(valid) - np.count_nonzero(valid)),
                                 children=[entries])
