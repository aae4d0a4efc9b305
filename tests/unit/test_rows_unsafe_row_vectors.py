"""Hand-built UnsafeRow byte vectors decode to the right values and encode back byte for byte.

Each vector is written out with ``struct.pack`` from the layout (common practice, see
``migrate.rows.layout``): null bitset words, 8-byte slots, ``offset << 32 | size`` words,
8-byte aligned variable data. None of them is produced by the code under test.
"""

from __future__ import annotations

import datetime as dt
import struct
import warnings
from decimal import Context, Decimal

import pyarrow as pa
import pytest

from migrate.errors import CorruptInput, Unsupported
from migrate.rows.schema import (
    ArrayType, BinaryType, BooleanType, ByteType, CalendarIntervalType, DateType,
    DayTimeIntervalType, DecimalType, DoubleType, FloatType, IntegerType, LongType, MapType,
    NullType, ShortType, StringType, StructField, StructType, TimestampNTZType, TimestampType,
    UnknownType, YearMonthIntervalType, arrow_type,
)
from migrate.rows.unsafe_row import (
    UndecodedColumnsWarning, decode_rows, decode_rows_report, encode_rows,
)


def q(v: int) -> bytes:
    return struct.pack("<q", v)


def slot(offset: int, size: int) -> bytes:
    return struct.pack("<Q", offset << 32 | size)


def schema(*types, nullable=True) -> StructType:
    return StructType(tuple(StructField(f"c{i}", t, nullable) for i, t in enumerate(types)))


def check(t: StructType, rows: list[bytes | None], expected: list):
    """decode(rows) == expected, and encode(decode(rows)) == rows (byte identity)."""
    data = pa.array(rows, pa.binary())
    got = decode_rows(data, t, "vector")
    assert got.type == arrow_type(t)
    got.validate(full=True)
    assert got.to_pylist() == expected
    assert encode_rows(got, t).to_pylist() == rows


def test_fixed_width_fields_sit_little_endian_in_their_slots():
    t = schema(BooleanType(), ByteType(), ShortType(), IntegerType(), LongType(), FloatType(),
               DoubleType(), DateType(), TimestampType(), TimestampNTZType(),
               DayTimeIntervalType(), YearMonthIntervalType())
    row = (q(0)  # no nulls
           + b"\x01" + bytes(7) + struct.pack("<b", -2) + bytes(7)
           + struct.pack("<h", -300) + bytes(6) + struct.pack("<i", 70000) + bytes(4)
           + q(-(2 ** 40)) + struct.pack("<f", 1.5) + bytes(4) + struct.pack("<d", -0.25)
           + struct.pack("<i", -1) + bytes(4) + q(1_000_000) + q(-1) + q(90_061_000_001)
           + struct.pack("<i", -14) + bytes(4))
    check(t, [row], [{
        "c0": True, "c1": -2, "c2": -300, "c3": 70000, "c4": -(2 ** 40), "c5": 1.5,
        "c6": -0.25, "c7": dt.date(1969, 12, 31),
        "c8": dt.datetime(1970, 1, 1, 0, 0, 1, tzinfo=dt.timezone.utc),
        "c9": dt.datetime(1969, 12, 31, 23, 59, 59, 999999),
        "c10": dt.timedelta(days=1, hours=1, minutes=1, seconds=1, microseconds=1),
        "c11": -14,
    }])


def test_null_bits_and_zero_slots():
    t = schema(IntegerType(), StringType(), LongType())
    row = q(0b101) + q(0) + slot(32, 2) + q(0) + b"hi" + bytes(6)
    check(t, [row, None], [{"c0": None, "c1": "hi", "c2": None}, None])


def test_more_than_64_fields_use_a_second_bitset_word():
    t = schema(*[IntegerType()] * 70)
    bits = (1 << 3) | (1 << 65)
    slots = b"".join(bytes(8) if i in (3, 65) else struct.pack("<i", i) + bytes(4)
                     for i in range(70))
    row = struct.pack("<QQ", bits & (2 ** 64 - 1), bits >> 64) + slots
    expected = {f"c{i}": (None if i in (3, 65) else i) for i in range(70)}
    check(t, [row], [expected])


def test_strings_and_binaries_are_offset_and_size_with_padding():
    t = schema(StringType(), BinaryType(), BinaryType())
    word = "z\u00fcrich-\U0001F600".encode()  # 12 bytes
    row = (q(0) + slot(32, len(word)) + slot(48, 0) + slot(48, 9) + word + bytes(4)
           + b"\x00\xffabcdefg" + bytes(7))
    check(t, [row], [{"c0": "z\u00fcrich-\U0001F600", "c1": b"", "c2": b"\x00\xffabcdefg"}])


def test_compact_decimals_are_inline_unscaled_longs():
    t = schema(DecimalType(10, 2), DecimalType(18, 0))
    row = q(0) + q(-12345) + q(10 ** 18 - 1)
    check(t, [row], [{"c0": Decimal("-123.45"), "c1": Decimal(10 ** 18 - 1)}])


def test_large_decimals_are_big_endian_twos_complement_in_16_reserved_bytes():
    t = schema(DecimalType(38, 10), DecimalType(38, 10), DecimalType(20, 0))
    neg = (-(10 ** 30) - 7).to_bytes(13, "big", signed=True)  # minimal length: 13 bytes
    row = (q(0b010) + slot(32, 13) + slot(48, 0) + slot(64, 1)
           + neg + bytes(3)          # 13 bytes + zero fill of the 16-byte area
           + bytes(16)               # the null decimal still reserves its area
           + b"\x80" + bytes(15))    # -128 in one byte
    check(t, [row], [{"c0": Decimal(-(10 ** 30) - 7).scaleb(-10, Context(prec=60)), "c1": None,
                      "c2": Decimal(-128)}])


def test_calendar_interval_is_16_bytes_months_days_micros():
    t = schema(CalendarIntervalType(), CalendarIntervalType())
    row = q(0b10) + slot(24, 16) + q(0) + struct.pack("<iiq", -3, 40, -5_000_001)
    check(t, [row], [{"c0": {"months": -3, "days": 40, "microseconds": -5_000_001},
                      "c1": None}])


def test_array_of_ints_has_count_bits_and_packed_elements():
    t = schema(ArrayType(IntegerType()))
    arr = q(3) + q(0b010) + struct.pack("<iii", 7, 0, -9) + bytes(4)  # 12 -> 16 bytes
    row = q(0) + slot(16, len(arr)) + arr
    check(t, [row], [{"c0": [7, None, -9]}])


@pytest.mark.parametrize("et,fmt,values", [
    (BooleanType(), "<?", [True, False]),
    (ByteType(), "<b", [-1, 5]),
    (ShortType(), "<h", [-2, 300]),
    (FloatType(), "<f", [0.5, -2.0]),
    (LongType(), "<q", [-(2 ** 50), 1]),
    (DoubleType(), "<d", [1e300, -0.0]),
])
def test_array_element_width_follows_the_element_type(et, fmt, values):
    width = struct.calcsize(fmt)
    body = b"".join(struct.pack(fmt, v) for v in values)
    body += bytes(-len(body) % 8)
    arr = q(len(values)) + q(0) + body
    assert len(body) == ((len(values) * width + 7) // 8) * 8
    check(schema(ArrayType(et)), [q(0) + slot(16, len(arr)) + arr], [{"c0": values}])


def test_array_of_strings_offsets_count_from_the_array_start():
    t = schema(ArrayType(StringType()))
    # header 16, element slots 3*8=24 -> data starts at 40 inside the array
    arr = (q(3) + q(0b100) + slot(40, 3) + slot(48, 9) + q(0)
           + b"ein" + bytes(5) + b"zweizweiz" + bytes(7))
    row = q(0) + slot(16, len(arr)) + arr
    check(t, [row], [{"c0": ["ein", "zweizweiz", None]}])


def test_empty_array_and_empty_map():
    t = schema(ArrayType(LongType()), MapType(StringType(), IntegerType()))
    empty = q(0)
    emap = q(8) + q(0) + q(0)
    row = q(0) + slot(24, 8) + slot(32, 24) + empty + emap
    check(t, [row], [{"c0": [], "c1": []}])


def test_map_is_key_array_size_then_key_array_then_value_array():
    t = schema(MapType(StringType(), IntegerType()))
    keys = q(2) + q(0) + slot(32, 1) + slot(40, 2) + b"a" + bytes(7) + b"bb" + bytes(6)
    vals = q(2) + q(0b10) + struct.pack("<ii", 41, 0)
    body = q(len(keys)) + keys + vals
    row = q(0) + slot(16, len(body)) + body
    check(t, [row], [{"c0": [("a", 41), ("bb", None)]}])


def test_nested_struct_and_array_of_structs_and_large_decimal_in_array():
    inner = StructType((StructField("x", IntegerType()), StructField("y", StringType())))
    t = schema(inner, ArrayType(inner), ArrayType(DecimalType(38, 0)))
    s1 = q(0) + struct.pack("<i", 5) + bytes(4) + slot(24, 3) + b"abc" + bytes(5)  # 32 bytes
    s2 = q(0b10) + struct.pack("<i", -1) + bytes(4) + q(0)                          # 24 bytes
    arr = q(2) + q(0b10) + slot(32, 24) + q(0) + s2
    big = (10 ** 20).to_bytes(9, "big", signed=True)
    darr = q(2) + q(0) + slot(32, 9) + slot(48, 1) + big + bytes(7) + b"\xff" + bytes(7)
    fixed = 8 + 3 * 8
    row = (q(0) + slot(fixed, len(s1)) + slot(fixed + len(s1), len(arr))
           + slot(fixed + len(s1) + len(arr), len(darr)) + s1 + arr + darr)
    check(t, [row], [{"c0": {"x": 5, "y": "abc"}, "c1": [{"x": -1, "y": None}, None],
                      "c2": [Decimal(10 ** 20), Decimal(-1)]}])


def test_null_type_columns_are_always_null():
    check(schema(NullType()), [q(1) + q(0)], [{"c0": None}])


def test_batch_offsets_slices_chunks_and_large_binary_are_honoured():
    t = schema(LongType(), StringType())
    rows = [q(0) + q(i) + slot(24, 1) + bytes([97 + i]) + bytes(7) for i in range(5)]
    expected = [{"c0": i, "c1": chr(97 + i)} for i in range(5)]
    arr = pa.array(rows, pa.binary())
    assert decode_rows(arr.slice(2, 2), t).to_pylist() == expected[2:4]
    assert decode_rows(pa.chunked_array([arr[:2], arr[2:]]), t).to_pylist() == expected
    assert decode_rows(arr.cast(pa.large_binary()), t).to_pylist() == expected
    assert decode_rows(pa.array([], pa.binary()), t).to_pylist() == []


# --------------------------------------------------------------------------------------------
# malformed bytes


@pytest.mark.parametrize("t,row,fragment", [
    (schema(LongType(), LongType()), q(0) + q(1), "needs at least 24 bytes"),
    (schema(StringType()), q(0) + slot(16, 9) + b"abcdefgh", "past the end"),
    (schema(StringType()), q(0) + slot(16, 2) + b"\xc3\x28" + bytes(6), "not valid UTF-8"),
    (schema(DecimalType(38, 2)), q(0) + slot(16, 17) + bytes(24), "1 to 16 bytes"),
    (schema(CalendarIntervalType()), q(0) + slot(16, 8) + bytes(8), "needs 16 bytes"),
    (schema(ArrayType(LongType())), q(0) + slot(16, 16) + q(5) + q(0), "element count"),
    (schema(ArrayType(LongType())), q(0) + slot(16, 8) + q(-1), "element count"),
    (schema(ArrayType(LongType(), False)), q(0) + slot(16, 24) + q(1) + q(1) + q(0),
     "declared without nulls"),
    (schema(MapType(IntegerType(), IntegerType())), q(0) + slot(16, 8) + q(99), "key-array"),
    (schema(MapType(IntegerType(), IntegerType())),
     q(0) + slot(16, 48) + q(24) + q(1) + q(0) + q(7) + q(0) + q(0), "differ in length"),
    (schema(MapType(IntegerType(), IntegerType())),
     q(0) + slot(16, 48) + q(24) + q(1) + q(1) + q(7) + q(1) + q(0) + q(0), "without nulls"),
], ids=["short-row", "slot-out-of-row", "bad-utf8", "decimal-too-long", "short-interval",
        "count-too-big", "negative-count", "null-in-non-null-array", "map-key-size",
        "map-length-mismatch", "null-map-key"])
def test_malformed_rows_raise_corrupt_input_naming_the_file(t, row, fragment):
    good = encode_rows(pa.nulls(1, arrow_type(t)), t).to_pylist()
    with pytest.raises(CorruptInput) as info:
        decode_rows(pa.array(good + [row], pa.binary()), t, "/cp/state/0/3/7.delta")
    message = str(info.value)
    assert "/cp/state/0/3/7.delta" in message and fragment in message
    assert "row 1 of the batch" in message  # the first bad row is named (row 0 is null)


# --------------------------------------------------------------------------------------------
# unsupported types


def test_unknown_types_are_left_raw_reported_and_warned_once():
    t = StructType((StructField("id", LongType()), StructField("v", UnknownType('"variant"')),
                    StructField("vs", ArrayType(UnknownType('"variant"')))))
    vs = q(1) + q(0) + b"opaque!!"
    row = q(0) + q(7) + q(0x1122334455667788) + slot(32, len(vs)) + vs
    data = pa.array([row, row], pa.binary())
    report = decode_rows_report(data, t, "w")
    assert report.undecoded == ('v ("variant")', "vs (array<unknown<\"variant\">>)")
    assert report.rows.type == arrow_type(t)
    assert report.rows.to_pylist()[0] == {"id": 7, "v": q(0x1122334455667788), "vs": vs}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("default")
        for _ in range(3):
            decode_rows(data, t, "w")
    assert [w.category for w in caught] == [UndecodedColumnsWarning]
    with pytest.raises(Unsupported):
        decode_rows(data, t, "w", unsupported="error")
    with pytest.raises(Unsupported):
        encode_rows(report.rows, t)


def test_wrong_arguments_are_type_errors():
    with pytest.raises(TypeError):
        decode_rows(pa.array([1]), schema(LongType()))
    with pytest.raises(ValueError):
        decode_rows(pa.array([], pa.binary()), schema(LongType()), unsupported="maybe")


def test_a_row_without_fields_is_empty_bytes():
    # the key of an aggregation without grouping columns (layout rule: 0 bitset words, 0 slots)
    check(StructType(()), [b"", None], [{}, None])


def test_java_modified_utf8_nul_and_surrogates_decode():
    from migrate.rows.schema import _modified_utf8

    assert _modified_utf8(b"a\xc0\x80b\xed\xa0\xbd\xed\xb8\x80", "w") == "a\x00b\U0001F600"


@pytest.mark.parametrize("pads", [(0, 3, 0), (1, 2, 5), (7, 0, 4), (4, 4, 4)])
def test_rows_starting_at_mixed_byte_remainders_decode_alike(pads):
    """Rows whose lengths are not multiples of 8 (trailing bytes the layout ignores) put the next
    row's fields at another remainder modulo their width: each remainder is its own gather. Null
    rows and null fields are mixed in, so positions that are not read are replaced too."""
    t = schema(ShortType(), IntegerType(), LongType(), DoubleType(), StringType())
    text = "abé".encode()  # 4 bytes
    rows = [  # null bitset, five 8-byte slots, then the string's bytes at offset 48
        q(0) + struct.pack("<h", -7) + bytes(6) + struct.pack("<i", 123456) + bytes(4) + q(-(2 ** 50))
        + struct.pack("<d", 2.5) + slot(48, len(text)) + text + bytes(4),
        q(1 << 1 | 1 << 3) + struct.pack("<h", 9) + bytes(6) + bytes(8) + q(5) + bytes(8) + slot(48, 0),
        q(0) + struct.pack("<h", 1) + bytes(6) + struct.pack("<i", -1) + bytes(4) + q(7)
        + struct.pack("<d", -1.0) + slot(48, 8) + b"12345678",
    ]
    expected = [
        {"c0": -7, "c1": 123456, "c2": -(2 ** 50), "c3": 2.5, "c4": "abé"},
        {"c0": 9, "c1": None, "c2": 5, "c3": None, "c4": ""},
        {"c0": 1, "c1": -1, "c2": 7, "c3": -1.0, "c4": "12345678"},
    ]
    padded = [r + b"\xee" * p for r, p in zip(rows, pads)]
    data = pa.array(padded[:1] + [None] + padded[1:], pa.binary())
    got = decode_rows(data, t, "vector")
    got.validate(full=True)
    assert got.to_pylist() == expected[:1] + [None] + expected[1:]
    for r, e in zip(padded, expected):  # each row alone: one remainder
        assert decode_rows(pa.array([r], pa.binary()), t, "vector").to_pylist() == [e]


def test_array_elements_whose_bytes_are_not_in_element_order():
    """The layout lets an element's slot point anywhere in its array; the bytes of element 1 placed
    before those of element 0 still decode in element order (the gather's fallback for ranges
    that are not in buffer order)."""
    t = schema(ArrayType(StringType(), True))
    row = (q(0) + slot(16, 48)  # null bits, the array at byte 16, 48 bytes long
           + q(2) + q(0)  # two elements, no nulls
           + slot(40, 3) + slot(32, 2)  # element 0 "abc" at array byte 40, element 1 "xy" at 32
           + b"xy" + bytes(6) + b"abc" + bytes(5))
    got = decode_rows(pa.array([row, row], pa.binary()), t, "vector")
    got.validate(full=True)
    assert got.to_pylist() == [{"c0": ["abc", "xy"]}, {"c0": ["abc", "xy"]}]
