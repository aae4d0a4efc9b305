"""RocksDB prefix-key encoding: split a full key row into prefix and rest, and join them back.

Stores that scan by a key prefix (``numColsPrefixKey = k > 0``; session windows, observed on
Spark 4.3.0) are kept in RocksDB under a key made of two rows. Observed byte layout::

    int32 LE  1 + len(prefix row)       (the JVM's native order on x86: little-endian)
    0x00      encoding-version byte
    prefix    UnsafeRow of the first k key fields
    0x00      encoding-version byte
    rest      UnsafeRow of the remaining key fields

e.g. a session-window key (bay="north", sessionStartTime=t) is
``19000000 00 <24-byte row of "north"> 00 <16-byte row of t>`` in RocksDB, while the heap map
stores the one 32-byte row of both fields. The canonical batches always carry that full row, so
the two providers' rows compare byte for byte.

Splitting and joining rows moves field slots and variable-length data between rows, rewriting
the ``offset << 32 | size`` words of variable-length fields (layout: ``migrate.rows.layout``;
nested values keep their own relative offsets, so their bytes move verbatim). It needs the key
schema (which top-level fields are variable-length). Everything is numpy over whole batches.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import CorruptInput, Unsupported
from ..rows.layout import bitset_bytes, is_fixed
from ..rows.schema import CalendarIntervalType, DecimalType, StructType, UnknownType

ENCODING_VERSION = 0
HEADER_BYTES = 4  # the int32 length of the (version byte + prefix row) part


@dataclass(frozen=True)
class FieldLayout:
    """How one top-level field of a row sits in it."""

    variable: bool  # slot holds offset << 32 | size and the bytes live in the variable region
    reserved: int = 0  # bytes the variable region always holds for it (16 for wide decimals), else 0


def field_layouts(schema: StructType, where: str) -> tuple[FieldLayout, ...]:
    """The layout of each top-level field of ``schema``."""
    out = []
    for f in schema.fields:
        t = f.data_type
        if isinstance(t, UnknownType):
            raise Unsupported(f"key field {f.name!r} has type {t.simple_string()}, whose row layout is unknown", where)
        if is_fixed(t):
            out.append(FieldLayout(False))
        elif isinstance(t, (DecimalType, CalendarIntervalType)):  # wide decimals keep 16 bytes even when null
            out.append(FieldLayout(True, 16))
        else:
            out.append(FieldLayout(True))
    return tuple(out)


# ------------------------------------------------------------------------ buffers
@dataclass(frozen=True)
class _Rows:
    """Rows inside a byte buffer: row i is ``data[base[i] : base[i] + length[i]]``."""

    data: np.ndarray  # uint8
    base: np.ndarray  # int64
    length: np.ndarray  # int64
    fields: int


def _buffers(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(int64 offsets of n + 1, uint8 data) of a binary array."""
    if pa.types.is_binary(arr.type):
        arr = arr.cast(pa.large_binary())
    if not pa.types.is_large_binary(arr.type):
        raise TypeError(f"expected a binary array, got {arr.type}")
    _, off_buf, data_buf = arr.buffers()
    offs = np.frombuffer(off_buf, dtype=np.int64, count=len(arr) + 1, offset=arr.offset * 8)
    data = np.frombuffer(data_buf, dtype=np.uint8) if data_buf is not None else np.zeros(0, np.uint8)
    return offs, data


def _gather(data: np.ndarray, pos: np.ndarray, width: int) -> np.ndarray:
    """``width`` bytes at each position, as an (n, width) uint8 array."""
    return data[(pos[:, None] + np.arange(width)).ravel()].reshape(-1, width)


def _u64(data: np.ndarray, pos: np.ndarray) -> np.ndarray:
    return _gather(data, pos, 8).copy().view("<u8").ravel()


def _copy_ranges(dst: np.ndarray, dst_pos: np.ndarray, src: np.ndarray, src_pos: np.ndarray, lengths: np.ndarray) -> None:
    """dst[dst_pos[i] : + lengths[i]] = src[src_pos[i] : + lengths[i]] for every i, in one gather."""
    total = int(lengths.sum())
    if total == 0:
        return
    starts = np.cumsum(lengths) - lengths
    within = np.arange(total, dtype=np.int64) - np.repeat(starts, lengths)
    dst[np.repeat(dst_pos, lengths) + within] = src[np.repeat(src_pos, lengths) + within]


def _binary_array(lengths: np.ndarray, data: np.ndarray) -> pa.Array:
    offs = np.zeros(len(lengths) + 1, dtype=np.int64)
    np.cumsum(lengths, out=offs[1:])
    if offs[-1] < 2**31:
        return pa.Array.from_buffers(pa.binary(), len(lengths), [None, pa.py_buffer(offs.astype(np.int32)), pa.py_buffer(data)])
    return pa.Array.from_buffers(pa.large_binary(), len(lengths), [None, pa.py_buffer(offs), pa.py_buffer(data)]).cast(pa.binary())


# ------------------------------------------------------------------------ moving fields between rows
def _project(sources: Sequence[_Rows], picks: Sequence[tuple[int, int, FieldLayout]], where: str) -> tuple[np.ndarray, np.ndarray]:
    """New rows made of the picked fields, in pick order: (row lengths, row bytes).

    A pick is (source index, field index in that source's rows, layout). Null bits and fixed
    slots are copied; variable-length values are laid out in pick order, each padded to 8 bytes
    (or its reserved width), as the engine's row writer does.
    """
    n = len(sources[0].base)
    m = len(picks)
    fixed_end = bitset_bytes(m) + 8 * m
    for s in sources:
        short = np.flatnonzero(s.length < bitset_bytes(s.fields) + 8 * s.fields)
        if short.size:
            raise CorruptInput(
                f"a key row of {int(s.length[short[0]])} bytes is shorter than the fixed part of its "
                f"{s.fields} fields (row {int(short[0])} of the batch)",
                where,
            )
    slots: list[np.ndarray] = []
    nulls: list[np.ndarray] = []
    var_src: list[np.ndarray] = []
    var_len: list[np.ndarray] = []
    for si, fi, layout in picks:
        s = sources[si]
        slot = _u64(s.data, s.base + bitset_bytes(s.fields) + 8 * fi)
        word = _u64(s.data, s.base + 8 * (fi // 64))
        nulls.append(((word >> np.uint64(fi % 64)) & np.uint64(1)).astype(bool))
        slots.append(slot)
        if layout.variable:
            off = (slot >> np.uint64(32)).astype(np.int64)
            size = (slot & np.uint64(0xFFFFFFFF)).astype(np.int64)
            width = np.full(n, layout.reserved, np.int64) if layout.reserved else (size + 7) & ~7
            width = np.where(slot == 0, 0, np.maximum(width, size))
            lo = bitset_bytes(s.fields) + 8 * s.fields
            bad = np.flatnonzero((width > 0) & ((off < lo) | (off + width > s.length)))
            if bad.size:
                i = int(bad[0])
                raise CorruptInput(
                    f"key field {fi} points at bytes {int(off[i])}..{int(off[i] + width[i])} outside its "
                    f"{int(s.length[i])}-byte row (row {i} of the batch)",
                    where,
                )
            var_src.append(s.base + off)
            var_len.append(width)
        else:
            var_src.append(np.zeros(0, np.int64))
            var_len.append(np.zeros(n, np.int64))
    lengths = np.full(n, fixed_end, np.int64) + sum(var_len, np.zeros(n, np.int64))
    row_start = np.cumsum(lengths) - lengths
    out = np.zeros(int(lengths.sum()), dtype=np.uint8)
    words = out.view("<u8")  # every row starts at a multiple of 8 (all widths are)
    for w in range(bitset_bytes(m) // 8):
        bits = np.zeros(n, np.uint64)
        for j in range(w * 64, min(m, w * 64 + 64)):
            bits |= nulls[j].astype(np.uint64) << np.uint64(j % 64)
        words[row_start // 8 + w] = bits
    cursor = np.full(n, fixed_end, np.int64)
    for j, (si, _, layout) in enumerate(picks):
        slot = slots[j]
        if layout.variable:
            size = slot & np.uint64(0xFFFFFFFF)
            slot = np.where(slot == 0, np.uint64(0), (cursor.astype(np.uint64) << np.uint64(32)) | size)
            _copy_ranges(out, row_start + cursor, sources[si].data, var_src[j], var_len[j])
            cursor = cursor + var_len[j]
        words[(row_start + bitset_bytes(m)) // 8 + j] = slot
    return lengths, out


def _rows_of(arr: pa.Array, fields: int) -> _Rows:
    offs, data = _buffers(arr)
    return _Rows(data, offs[:-1].astype(np.int64), np.diff(offs), fields)


def split_rows(full: pa.Array, layouts: tuple[FieldLayout, ...], k: int, where: str) -> tuple[pa.Array, pa.Array]:
    """(rows of the first ``k`` fields, rows of the others) of each full key row."""
    src = _rows_of(full, len(layouts))
    p_len, p_data = _project([src], [(0, i, layouts[i]) for i in range(k)], where)
    r_len, r_data = _project([src], [(0, i, layouts[i]) for i in range(k, len(layouts))], where)
    return _binary_array(p_len, p_data), _binary_array(r_len, r_data)


def join_rows(prefix: pa.Array, rest: pa.Array, layouts: tuple[FieldLayout, ...], k: int, where: str) -> pa.Array:
    """The full key rows of ``prefix`` rows (first ``k`` fields) and ``rest`` rows (the others)."""
    return _join(_rows_of(prefix, k), _rows_of(rest, len(layouts) - k), layouts, k, where)


def _join(p: _Rows, r: _Rows, layouts: tuple[FieldLayout, ...], k: int, where: str) -> pa.Array:
    picks = [(0, i, layouts[i]) for i in range(k)] + [(1, i - k, layouts[i]) for i in range(k, len(layouts))]
    lengths, data = _project([p, r], picks, where)
    return _binary_array(lengths, data)


# ------------------------------------------------------------------------ RocksDB key bytes
def _check_k(layouts: tuple[FieldLayout, ...], k: int, where: str) -> None:
    if not 0 < k < len(layouts):
        raise Unsupported(
            f"numColsPrefixKey={k} does not split a key of {len(layouts)} fields into a prefix and a rest", where
        )


def encode_prefix_keys(full: pa.Array, layouts: tuple[FieldLayout, ...], k: int, where: str) -> pa.Array:
    """RocksDB keys (as observed, see the module docstring) of full canonical key rows."""
    _check_k(layouts, k, where)
    src = _rows_of(full, len(layouts))
    p_len, p_data = _project([src], [(0, i, layouts[i]) for i in range(k)], where)
    r_len, r_data = _project([src], [(0, i, layouts[i]) for i in range(k, len(layouts))], where)
    n = len(p_len)
    lengths = HEADER_BYTES + 1 + p_len + 1 + r_len
    start = np.cumsum(lengths) - lengths
    out = np.zeros(int(lengths.sum()), dtype=np.uint8)
    header = (p_len + 1).astype("<i4").view(np.uint8).reshape(n, 4)
    out[(start[:, None] + np.arange(4)).ravel()] = header.ravel()
    out[start + HEADER_BYTES] = ENCODING_VERSION
    p_start = np.cumsum(p_len) - p_len
    r_start = np.cumsum(r_len) - r_len
    _copy_ranges(out, start + HEADER_BYTES + 1, p_data, p_start, p_len)
    out[start + HEADER_BYTES + 1 + p_len] = ENCODING_VERSION
    _copy_ranges(out, start + HEADER_BYTES + 2 + p_len, r_data, r_start, r_len)
    return _binary_array(lengths, out)


def decode_prefix_keys(keys: pa.Array, layouts: tuple[FieldLayout, ...], k: int, where: str) -> pa.Array:
    """Full canonical key rows of RocksDB prefix keys (the reverse of :func:`encode_prefix_keys`)."""
    _check_k(layouts, k, where)
    offs, data = _buffers(keys)
    base = offs[:-1].astype(np.int64)
    length = np.diff(offs)
    n = len(base)
    if n == 0:
        return pa.array([], pa.binary())
    short = np.flatnonzero(length < HEADER_BYTES + 2)
    if short.size:
        raise CorruptInput(f"a prefix-key RocksDB key of {int(length[short[0]])} bytes has no room for its header", where)
    plen = _gather(data, base, 4).copy().view("<i4").ravel().astype(np.int64)
    bad = np.flatnonzero((plen < 1) | (HEADER_BYTES + plen + 1 > length))
    if bad.size:
        i = int(bad[0])
        raise CorruptInput(f"a prefix-key RocksDB key of {int(length[i])} bytes records a prefix of {int(plen[i])} bytes", where)
    for at in (base + HEADER_BYTES, base + HEADER_BYTES + plen):
        bad = np.flatnonzero(data[at] != ENCODING_VERSION)
        if bad.size:
            raise Unsupported(
                f"a prefix-key RocksDB key carries encoding-version byte {int(data[at[bad[0]]])}; only "
                f"{ENCODING_VERSION} (the plain row encoding) is supported",
                where,
            )
    p = _Rows(data, base + HEADER_BYTES + 1, plen - 1, k)
    r_base = base + HEADER_BYTES + plen + 1
    r = _Rows(data, r_base, base + length - r_base, len(layouts) - k)
    return _join(p, r, layouts, k, where)


# ------------------------------------------------------------------------ plain rows and the codecs
_VERSION_BYTE = bytes([ENCODING_VERSION])
_NO_SEPARATOR = pa.scalar(b"", pa.binary())


def as_binary(arr: pa.Array) -> pa.Array:
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if pa.types.is_binary(arr.type):
        return arr
    if pa.types.is_large_binary(arr.type):
        return arr.cast(pa.binary())
    raise TypeError(f"expected a binary array, got {arr.type}")


def strip_version_byte(arr: pa.Array, where: str) -> pa.Array:
    """Drop the leading encoding-version byte of every element (it must be 0x00)."""
    arr = as_binary(arr)
    if len(arr) == 0:
        return arr
    lengths = pc.binary_length(arr)
    if pc.min(lengths).as_py() < 1:
        raise CorruptInput("a RocksDB key or value is empty (no encoding-version byte)", where)
    _, off_buf, data_buf = arr.buffers()
    offs = np.frombuffer(off_buf, dtype=np.int32, count=len(arr), offset=arr.offset * 4)
    firsts = np.frombuffer(data_buf, dtype=np.uint8)[offs]
    bad = np.flatnonzero(firsts != ENCODING_VERSION)
    if bad.size:
        raise Unsupported(
            f"a RocksDB key or value starts with encoding-version byte {int(firsts[bad[0]])}; only "
            f"{ENCODING_VERSION} (the plain row encoding) is supported",
            where,
        )
    # an explicit stop: the kernel's open-ended default fails on some pyarrow versions (seen on 26)
    return pc.binary_slice(arr, 1, pc.max(lengths).as_py() + 1)


def add_version_byte(arr: pa.Array) -> pa.Array:
    """Prefix every element with the encoding-version byte 0x00."""
    return prefix_each(arr, _VERSION_BYTE)


def prefix_each(arr: pa.Array, prefix: bytes) -> pa.Array:
    """Every element of a binary array with ``prefix`` in front (an empty prefix: the array as
    binary, unchanged)."""
    if not prefix:
        return as_binary(arr)
    return pc.binary_join_element_wise(pa.scalar(prefix, pa.binary()), as_binary(arr), _NO_SEPARATOR)


def family_ids(keys: pa.Array, where: str) -> np.ndarray:
    """The column-family id of each RocksDB key: its first two bytes, little-endian (observed)."""
    offs, data = _buffers(as_binary(keys))
    base = offs[:-1].astype(np.int64)
    short = np.flatnonzero(np.diff(offs) < 2)
    if short.size:
        raise CorruptInput("a RocksDB key of a store with column families is shorter than its 2-byte family id", where)
    return _gather(data, base, 2).copy().view("<u2").ravel()


@dataclass(frozen=True)
class RowCodec:
    """Canonical rows <-> RocksDB key/value bytes for one store.

    * plain (no prefix key, no column families): one leading 0x00 on key and value;
    * prefix key (``k > 0``): the key as in the module docstring, the value as plain;
    * column families: the RocksDB bytes unchanged (there is no heap-map form of these stores;
      the key keeps its 2-byte family id and the family's own encoding; list-state values are
      the merged element list), each key's family id checked against ``family_ids``.
    """

    prefix_layouts: tuple[FieldLayout, ...] | None = None
    k: int = 0
    known_families: frozenset[int] | None = None

    def check_families(self, keys: pa.Array, where: str) -> np.ndarray:
        assert self.known_families is not None
        ids = family_ids(keys, where)
        unknown = sorted(set(np.unique(ids).tolist()) - self.known_families)
        if unknown:
            raise CorruptInput(f"a RocksDB key carries column-family id {unknown[0]}, which the column-family table does not list", where)
        return ids

    def from_rocksdb(self, keys: pa.Array, values: pa.Array, where: str) -> tuple[pa.Array, pa.Array]:
        """Canonical rows of RocksDB keys and values: :meth:`write_prefixes` checked and taken
        off, then :meth:`from_rocksdb_bare`."""
        if self.known_families is not None:
            return self.from_rocksdb_bare(keys, values, where)
        if self.prefix_layouts is not None:
            return self.from_rocksdb_bare(keys, strip_version_byte(values, where), where)
        return strip_version_byte(keys, where), strip_version_byte(values, where)

    def from_rocksdb_bare(self, keys: pa.Array, values: pa.Array, where: str) -> tuple[pa.Array, pa.Array]:
        """Canonical rows of RocksDB keys and values whose :meth:`write_prefixes` the reader has
        already checked and taken off (``rocksdb_db.iterate`` does, as it collects the rows)."""
        if self.known_families is not None:
            self.check_families(keys, where)
            return as_binary(keys), as_binary(values)
        if self.prefix_layouts is not None:
            return decode_prefix_keys(keys, self.prefix_layouts, self.k, where), as_binary(values)
        return as_binary(keys), as_binary(values)

    def to_rocksdb(self, keys: pa.Array, values: pa.Array, where: str) -> tuple[pa.Array, pa.Array]:
        """The RocksDB keys and values of canonical rows: :meth:`to_rocksdb_bare` with
        :meth:`write_prefixes` put in front."""
        k, v = self.to_rocksdb_bare(keys, values, where)
        key_prefix, value_prefix = self.write_prefixes()
        return prefix_each(k, key_prefix), prefix_each(v, value_prefix)

    def write_prefixes(self) -> tuple[bytes, bytes]:
        """The bytes every RocksDB key and every value of this store starts with (the encoding-
        version byte), which :meth:`to_rocksdb_bare` leaves for the writer to put in front: the
        same for every row, so the rows sort and compare without them as they do with them."""
        if self.known_families is not None:
            return b"", b""
        if self.prefix_layouts is not None:
            return b"", _VERSION_BYTE
        return _VERSION_BYTE, _VERSION_BYTE

    def to_rocksdb_bare(self, keys: pa.Array, values: pa.Array, where: str) -> tuple[pa.Array, pa.Array]:
        """The RocksDB keys and values of canonical rows without :meth:`write_prefixes`."""
        if self.known_families is not None:
            self.check_families(keys, where)
            return as_binary(keys), as_binary(values)
        if self.prefix_layouts is not None:
            return encode_prefix_keys(keys, self.prefix_layouts, self.k, where), as_binary(values)
        return as_binary(keys), as_binary(values)
