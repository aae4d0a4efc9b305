"""Which shuffle partition the engine assigns a state key to (hash partitioning).

The engine places a stateful operator's key in partition
``pmod(murmur3(key columns, seed 42), numPartitions)`` (common practice). The hash is
Murmur3 x86_32, chained over the key columns: the running hash is the seed of the next column
and a null column leaves it unchanged. Per type (from memory, checked against engine
checkpoints in tests/engine/test_row_decoding_matches_engine.py):

* boolean (as 1/0), byte, short, int, date, year-month interval: ``hashInt`` of the int value;
* long, timestamp, timestamp_ntz, day-time interval: ``hashLong`` (low word, then high word);
* float/double: the IEEE bits (canonical NaN; -0.0 as 0), as int/long;
* decimal with precision <= 18: ``hashLong`` of the unscaled value; larger: the bytes of
  ``BigInteger.toByteArray`` of the unscaled value;
* string and binary: the engine's *own* byte hash, which differs from standard Murmur3 in the
  tail: after the 4-byte words, each remaining byte is mixed as a full (sign-extended) word
  instead of being packed into one final word;
* struct: fields in order; array: elements in order; map: key then value of each entry; nulls
  inside are skipped.

``murmur3_x86_32`` (standard, scalar) and ``hash_unsafe_bytes`` (the engine's variant, scalar)
are references for tests; the batch functions are vectorised with numpy over the batch and loop
only over word positions, element positions and nesting levels.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from migrate.errors import Unsupported
from migrate.rows.schema import (
    ArrayType,
    BinaryType,
    BooleanType,
    ByteType,
    DateType,
    DayTimeIntervalType,
    DecimalType,
    DoubleType,
    FloatType,
    IntegerType,
    LongType,
    MapType,
    NullType,
    ShortType,
    SparkType,
    StringType,
    StructType,
    TimestampNTZType,
    TimestampType,
    YearMonthIntervalType,
    arrow_type,
)

__all__ = ["SEED", "murmur3_x86_32", "hash_unsafe_bytes", "spark_hash", "partition_ids",
           "partition_ids_of_rows"]

#: The seed of the engine's hash partitioning (common practice).
SEED = 42

_C1, _C2 = 0xCC9E2D51, 0x1B873593
_M32 = 0xFFFFFFFF


# ------------------------------------------------------------------------------------------
# scalar references


def _rotl(x: int, r: int) -> int:
    return ((x << r) | (x >> (32 - r))) & _M32


def _mix_k1(k: int) -> int:
    return (_rotl((k * _C1) & _M32, 15) * _C2) & _M32


def _mix_h1(h: int, k: int) -> int:
    return (_rotl(h ^ k, 13) * 5 + 0xE6546B64) & _M32


def _fmix(h: int, length: int) -> int:
    h ^= length
    h ^= h >> 16
    h = (h * 0x85EBCA6B) & _M32
    h ^= h >> 13
    h = (h * 0xC2B2AE35) & _M32
    return h ^ (h >> 16)


def _signed(h: int) -> int:
    return h - (1 << 32) if h & 0x80000000 else h


def murmur3_x86_32(data: bytes, seed: int = 0) -> int:
    """Standard MurmurHash3_x86_32 (as published with SMHasher), as a signed 32-bit int."""
    h = seed & _M32
    n = len(data) - len(data) % 4
    for i in range(0, n, 4):
        h = _mix_h1(h, _mix_k1(int.from_bytes(data[i:i + 4], "little")))
    tail = data[n:]
    if tail:
        h ^= _mix_k1(int.from_bytes(tail, "little"))
    return _signed(_fmix(h, len(data)))


def hash_unsafe_bytes(data: bytes, seed: int = SEED) -> int:
    """The engine's byte hash (strings, binaries, large decimals), as a signed 32-bit int."""
    h = seed & _M32
    n = len(data) - len(data) % 4
    for i in range(0, n, 4):
        h = _mix_h1(h, _mix_k1(int.from_bytes(data[i:i + 4], "little")))
    for b in data[n:]:
        h = _mix_h1(h, _mix_k1((b - 256 if b > 127 else b) & _M32))
    return _signed(_fmix(h, len(data)))


# ------------------------------------------------------------------------------------------
# vectorised primitives (uint32 arrays; numpy integer arithmetic wraps modulo 2**32)


def _vrotl(x: np.ndarray, r: int) -> np.ndarray:
    return (x << np.uint32(r)) | (x >> np.uint32(32 - r))


def _vmix_k1(k: np.ndarray) -> np.ndarray:
    return _vrotl(k * np.uint32(_C1), 15) * np.uint32(_C2)


def _vmix_h1(h: np.ndarray, k: np.ndarray) -> np.ndarray:
    return _vrotl(h ^ k, 13) * np.uint32(5) + np.uint32(0xE6546B64)


def _vfmix(h: np.ndarray, length: np.ndarray | int) -> np.ndarray:
    h = h ^ np.asarray(length).astype(np.uint32)
    h = h ^ (h >> np.uint32(16))
    h = h * np.uint32(0x85EBCA6B)
    h = h ^ (h >> np.uint32(13))
    h = h * np.uint32(0xC2B2AE35)
    return h ^ (h >> np.uint32(16))


def _hash_int(v: np.ndarray, seed: np.ndarray) -> np.ndarray:
    return _vfmix(_vmix_h1(seed, _vmix_k1(v.astype(np.int32).view(np.uint32))), 4)


def _hash_long(v: np.ndarray, seed: np.ndarray) -> np.ndarray:
    u = v.astype(np.int64).view(np.uint64)
    low = (u & np.uint64(_M32)).astype(np.uint32)
    high = (u >> np.uint64(32)).astype(np.uint32)
    return _vfmix(_vmix_h1(_vmix_h1(seed, _vmix_k1(low)), _vmix_k1(high)), 8)


def _hash_bytes(offsets: np.ndarray, data: np.ndarray, seed: np.ndarray) -> np.ndarray:
    """The engine's byte hash over ranges ``data[offsets[i]:offsets[i+1]]``."""
    start = offsets[:-1].astype(np.int64)
    length = np.diff(offsets).astype(np.int64)
    words = length // 4
    padded = np.concatenate([data, np.zeros(4, np.uint8)])
    h = seed.copy()
    for w in range(int(words.max(initial=0))):
        rows = np.flatnonzero(words > w)
        pos = start[rows] + 4 * w
        k = padded[pos[:, None] + np.arange(4)].view("<u4").reshape(-1)
        h[rows] = _vmix_h1(h[rows], _vmix_k1(k))
    for t in range(3):
        rows = np.flatnonzero(length % 4 > t)
        b = padded[start[rows] + 4 * words[rows] + t].view(np.int8).astype(np.int32)
        h[rows] = _vmix_h1(h[rows], _vmix_k1(b.view(np.uint32)))
    return _vfmix(h, length)


# ------------------------------------------------------------------------------------------
# by type


def _valid(arr: pa.Array) -> np.ndarray:
    if arr.null_count == 0:
        return np.ones(len(arr), bool)
    return np.asarray(arr.is_valid().to_numpy(zero_copy_only=False), bool)


def _numbers(arr: pa.Array, dtype: str) -> np.ndarray:
    physical = pa.from_numpy_dtype(np.dtype(dtype))
    raw = arr if arr.type == physical else arr.view(physical)
    return raw.fill_null(0).to_numpy(zero_copy_only=False)


_INT_LIKE = (ByteType, ShortType, IntegerType, DateType, YearMonthIntervalType)
_LONG_LIKE = (LongType, TimestampType, TimestampNTZType, DayTimeIntervalType)


def _hash_values(arr: pa.Array, t: SparkType, seed: np.ndarray) -> np.ndarray:
    """Hash of each non-null value with its row's seed; null rows keep their seed."""
    valid = _valid(arr)
    if isinstance(t, NullType) or not valid.any():
        return seed.copy()
    if isinstance(t, BooleanType):
        h = _hash_int(arr.fill_null(False).to_numpy(zero_copy_only=False).astype(np.int32), seed)
    elif isinstance(t, _INT_LIKE):
        h = _hash_int(_numbers(arr, {ByteType: "i1", ShortType: "i2"}.get(type(t), "i4")), seed)
    elif isinstance(t, _LONG_LIKE):
        h = _hash_long(_numbers(arr, "i8"), seed)
    elif isinstance(t, FloatType):
        f = _numbers(arr, "f4")
        bits = np.where(f == 0, np.int32(0), f.view(np.int32))
        bits = np.where(np.isnan(f), np.int32(0x7FC00000), bits)
        h = _hash_int(bits, seed)
    elif isinstance(t, DoubleType):
        d = _numbers(arr, "f8")
        bits = np.where(d == 0, np.int64(0), d.view(np.int64))
        bits = np.where(np.isnan(d), np.int64(0x7FF8000000000000), bits)
        h = _hash_long(bits, seed)
    elif isinstance(t, DecimalType):
        words = np.frombuffer(arr.buffers()[1], "<u8")[2 * arr.offset:2 * (arr.offset + len(arr))]
        if t.is_compact:
            h = _hash_long(words[0::2].view(np.int64), seed)
        else:
            h = _hash_big_decimals(words, valid, seed)
    elif isinstance(t, (StringType, BinaryType)):
        if isinstance(t, StringType) and t.collation not in (None, "UTF8_BINARY"):
            raise Unsupported(f"hash partitioning of strings with collation {t.collation} is "
                              f"not supported")
        arr = arr.cast(pa.binary()) if not pa.types.is_binary(arr.type) else arr
        offsets = np.frombuffer(arr.buffers()[1], np.int32)[arr.offset:arr.offset + len(arr) + 1]
        data = (np.frombuffer(arr.buffers()[2], np.uint8) if arr.buffers()[2] is not None
                else np.zeros(0, np.uint8))
        h = _hash_bytes(offsets, data, seed)
    elif isinstance(t, StructType):
        h = seed.copy()
        for i, f in enumerate(t.fields):
            h = _hash_values(arr.field(i), f.data_type, h)
    elif isinstance(t, ArrayType):
        h = _hash_sequence(arr, [(t.element_type, arr.values)], seed)
    elif isinstance(t, MapType):
        h = _hash_sequence(arr, [(t.key_type, arr.keys), (t.value_type, arr.items)], seed)
    else:
        raise Unsupported(f"hash partitioning of {t.simple_string()} keys is not supported")
    return np.where(valid, h, seed)


def _hash_big_decimals(words: np.ndarray, valid: np.ndarray, seed: np.ndarray) -> np.ndarray:
    """Large decimals hash the minimal big-endian two's complement of the unscaled value.

    Per row in Python: such keys are rare and the byte length varies per value."""
    out = seed.copy()
    lo, hi = words[0::2].tolist(), words[1::2].view(np.int64).tolist()
    for i in np.flatnonzero(valid):
        v = (hi[i] << 64) | lo[i]
        bits = v.bit_length() if v >= 0 else (~v).bit_length()
        raw = v.to_bytes(bits // 8 + 1, "big", signed=True)
        out[i] = hash_unsafe_bytes(raw, int(seed[i])) & _M32
    return out


def _hash_sequence(arr: pa.Array, parts: list[tuple[SparkType, pa.Array]],
                   seed: np.ndarray) -> np.ndarray:
    """Arrays (one part) and maps (key and value parts): chain over entries in order."""
    offsets = arr.offsets.to_numpy().astype(np.int64)
    length = np.diff(offsets)
    valid = _valid(arr)
    length = np.where(valid, length, 0)
    h = seed.copy()
    for k in range(int(length.max(initial=0))):
        rows = np.flatnonzero(length > k)
        take = pa.array(offsets[rows] + k)
        hk = h[rows]
        for t, values in parts:
            hk = _hash_values(values.take(take), t, hk)
        h[rows] = hk
    return h


# ------------------------------------------------------------------------------------------
# public


def spark_hash(keys: pa.StructArray, schema: StructType, seed: int = SEED) -> np.ndarray:
    """The engine's Murmur3 hash of each row's columns (int32 per row)."""
    if keys.type != arrow_type(schema):
        keys = keys.cast(arrow_type(schema))
    h = np.full(len(keys), seed & _M32, np.uint32)
    with np.errstate(over="ignore"):
        for i, f in enumerate(schema.fields):
            h = _hash_values(keys.field(i), f.data_type, h)
    return h.view(np.int32)


def partition_ids(keys: pa.StructArray, schema: StructType, num_partitions: int) -> np.ndarray:
    """``pmod(hash, num_partitions)`` for each decoded key row (int32 per row)."""
    if num_partitions <= 0:
        raise ValueError("num_partitions must be positive")
    return np.mod(spark_hash(keys, schema).astype(np.int64), num_partitions).astype(np.int32)


def partition_ids_of_rows(key_rows: pa.Array, schema: StructType, num_partitions: int,
                          where: str = "") -> np.ndarray:
    """Partition of each key given as UnsafeRow bytes (decoded with ``decode_rows``)."""
    from migrate.rows.unsafe_row import decode_rows_report

    return partition_ids(decode_rows_report(key_rows, schema, where,
                                            unsupported="error").rows, schema, num_partitions)
