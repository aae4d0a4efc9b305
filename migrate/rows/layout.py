"""Layout facts of the engine's binary rows (UnsafeRow, UnsafeArrayData, UnsafeMapData).

Shared by the decoder (``unsafe_row``) and the reference writer (``writer``). Common practice,
from memory, checked against engine-written state by tests/engine/test_row_decoding_matches_engine:

* Row: a null bitset of ``ceil(n/64)`` 8-byte little-endian words, one 8-byte slot per field,
  then the variable-length region. A fixed-width value sits little-endian at the start of its
  slot (the rest of the slot is zero); a variable-length value's slot is
  ``offset << 32 | size`` with ``offset`` counted from the start of the row; every
  variable-length value is padded with zeros to a multiple of 8 bytes.
* Decimal with precision <= 18: the unscaled value as an inline long. Larger: the unscaled
  value as minimal big-endian two's complement bytes (Java ``BigInteger.toByteArray``) in the
  variable region; inside a row a 16-byte area is always reserved, also for null.
* Calendar interval: 16 bytes in the variable region (int months, int days, long micros).
* Array: 8-byte element count, a null bitset of ``ceil(count/64)`` words, the element region
  of ``count * element_size`` bytes rounded up to 8, then variable-length element data (offsets
  counted from the start of the array).
* Map: an 8-byte size of the key array, the key array, then the value array.
"""

from __future__ import annotations

from migrate.rows.schema import (
    BooleanType,
    ByteType,
    DateType,
    DayTimeIntervalType,
    DecimalType,
    DoubleType,
    FloatType,
    IntegerType,
    LongType,
    NullType,
    ShortType,
    SparkType,
    TimestampNTZType,
    TimestampType,
    YearMonthIntervalType,
)

#: numpy dtype (little-endian) of each fixed-width type's value.
FIXED_DTYPES: dict[type, str] = {
    BooleanType: "u1",
    ByteType: "<i1",
    ShortType: "<i2",
    IntegerType: "<i4",
    DateType: "<i4",
    YearMonthIntervalType: "<i4",
    FloatType: "<f4",
    LongType: "<i8",
    TimestampType: "<i8",
    TimestampNTZType: "<i8",
    DayTimeIntervalType: "<i8",
    DoubleType: "<f8",
}


def is_fixed(t: SparkType) -> bool:
    """True when the value lives inside its 8-byte slot (no variable-length part)."""
    if isinstance(t, DecimalType):
        return t.is_compact
    return type(t) in FIXED_DTYPES or isinstance(t, NullType)


def element_size(t: SparkType) -> int:
    """Bytes per element slot in an array of ``t`` (primitive default size, else 8)."""
    if isinstance(t, DecimalType):
        return 8
    dtype = FIXED_DTYPES.get(type(t))
    if dtype is None:
        return 8  # offset-and-size word (NullType too: from memory, not engine-verified)
    return int(dtype[-1])


def bitset_bytes(n: int) -> int:
    """Size of the null bitset for ``n`` fields or elements."""
    return ((n + 63) // 64) * 8


def round_up8(n: int) -> int:
    return (n + 7) & ~7
