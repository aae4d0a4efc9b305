"""Key partitioning: Murmur3 x86_32 against published vectors, the engine's byte-hash variant,
and the vectorised per-type hashing against a plain scalar reference.

Sources: the standard algorithm is checked against the ``mmh3`` package (a binding of the
SMHasher reference code) and against SMHasher's own verification value for MurmurHash3_x86_32
(0xB0F57EE3, from memory; it is computed the SMHasher way below). Engine values of the SQL
``hash`` function quoted from memory of the engine's documentation are marked as such; the
engine test tests/engine/test_row_decoding_matches_engine.py checks every type against the real
engine.
"""

from __future__ import annotations

import random
import struct
from decimal import Context, Decimal

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from migrate.errors import Unsupported
from migrate.rows.partitioning import (
    SEED, hash_unsafe_bytes, murmur3_x86_32, partition_ids, partition_ids_of_rows, spark_hash,
)
from migrate.rows.schema import (
    ArrayType, BinaryType, BooleanType, ByteType, CalendarIntervalType, DateType, DecimalType,
    DoubleType, FloatType, IntegerType, LongType, MapType, ShortType, StringType, StructField,
    StructType, TimestampType, arrow_type,
)
from migrate.rows.unsafe_row import encode_rows

# Widely published MurmurHash3_x86_32 test vectors (from memory; each is also checked against
# the mmh3 reference binding in the next test when it is installed).
VECTORS = [
    (b"", 0, 0x00000000), (b"", 1, 0x514E28B7), (b"", 0xFFFFFFFF, 0x81F16F39),
    (b"\xff\xff\xff\xff", 0, 0x76293B50), (b"\x21\x43\x65\x87", 0, 0xF55B516B),
    (b"\x21\x43\x65\x87", 0x5082EDEE, 0x2362F9DE), (b"\x21\x43\x65", 0, 0x7E4A8634),
    (b"\x21\x43", 0, 0xA0F7B07A), (b"\x21", 0, 0x72661CF4), (b"\x00\x00\x00\x00", 0, 0x2362F9DE),
    (b"\x00\x00\x00", 0, 0x85F0B427), (b"\x00\x00", 0, 0x30F4C306), (b"\x00", 0, 0x514E28B7),
    (b"aaaa", 0x9747B28C, 0x5A97808A), (b"Hello, world!", 0x9747B28C, 0x24884CBA),
    (b"The quick brown fox jumps over the lazy dog", 0x9747B28C, 0x2FA826CD),
]


@pytest.mark.parametrize("data,seed,expected", VECTORS)
def test_standard_murmur3_matches_published_vectors(data, seed, expected):
    assert murmur3_x86_32(data, seed) & 0xFFFFFFFF == expected


def test_standard_murmur3_passes_the_smhasher_verification():
    # SMHasher: hash keys {}, {0}, {0,1}, ... {0..254} with seed 256 - len, concatenate the
    # little-endian hashes, hash that with seed 0.
    blob = b"".join(struct.pack("<I", murmur3_x86_32(bytes(range(n)), 256 - n) & 0xFFFFFFFF)
                    for n in range(256))
    assert murmur3_x86_32(blob, 0) & 0xFFFFFFFF == 0xB0F57EE3


def test_standard_murmur3_matches_the_mmh3_reference_binding():
    mmh3 = pytest.importorskip("mmh3")
    rng = random.Random(7)
    for n in range(64):
        data = rng.randbytes(n)
        seed = rng.getrandbits(32)
        assert murmur3_x86_32(data, seed) == mmh3.hash(data, seed, signed=True)


def test_engine_byte_hash_equals_standard_on_whole_words_and_differs_in_the_tail():
    rng = random.Random(3)
    differs = 0
    for n in range(40):
        data = rng.randbytes(n)
        if n % 4 == 0:
            assert hash_unsafe_bytes(data, 42) == murmur3_x86_32(data, 42)
        else:
            differs += hash_unsafe_bytes(data, 42) != murmur3_x86_32(data, 42)
    assert differs == 30  # every length with a tail hashes differently


def test_engine_sql_hash_values_from_its_documentation():
    # From memory of the engine's function docs: hash('Spark', array(123), 2) = -1321691492,
    # and hash(1) = -559580957. 'Spark' has a one-byte tail, so this pins the variant.
    t = StructType((StructField("a", StringType()), StructField("b", ArrayType(IntegerType())),
                    StructField("c", IntegerType())))
    arr = pa.array([{"a": "Spark", "b": [123], "c": 2}], arrow_type(t))
    assert spark_hash(arr, t).tolist() == [-1321691492]
    one = StructType((StructField("x", IntegerType()),))
    assert spark_hash(pa.array([{"x": 1}], arrow_type(one)), one).tolist() == [-559580957]


# --------------------------------------------------------------------------------------------
# vectorised per-type hashing vs a scalar reference written from the rules in the module doc


def _ref(value, t, seed: int) -> int:
    """Scalar reference: the running hash after ``value`` of type ``t`` (unsigned)."""
    u = seed & 0xFFFFFFFF
    if value is None:
        return u
    if isinstance(t, BooleanType):
        return murmur3_x86_32(struct.pack("<i", int(value)), u) & 0xFFFFFFFF
    if isinstance(t, (ByteType, ShortType, IntegerType)):
        return murmur3_x86_32(struct.pack("<i", value), u) & 0xFFFFFFFF
    if isinstance(t, DateType):
        return murmur3_x86_32(struct.pack("<i", value.toordinal() - 719163), u) & 0xFFFFFFFF
    if isinstance(t, LongType):
        return murmur3_x86_32(struct.pack("<q", value), u) & 0xFFFFFFFF
    if isinstance(t, FloatType):
        bits = 0x7FC00000 if value != value else (0 if value == 0 else
                                                   struct.unpack("<i", struct.pack("<f", value))[0])
        return murmur3_x86_32(struct.pack("<i", bits), u) & 0xFFFFFFFF
    if isinstance(t, DoubleType):
        bits = 0x7FF8000000000000 if value != value else (
            0 if value == 0 else struct.unpack("<q", struct.pack("<d", value))[0])
        return murmur3_x86_32(struct.pack("<q", bits), u) & 0xFFFFFFFF
    if isinstance(t, DecimalType):
        unscaled = int(value.scaleb(t.scale, Context(prec=60)))
        if t.precision <= 18:
            return murmur3_x86_32(struct.pack("<q", unscaled), u) & 0xFFFFFFFF
        raw = unscaled.to_bytes(max(1, (unscaled.bit_length() + 8) // 8), "big", signed=True)
        # minimal two's complement, as Java's BigInteger.toByteArray
        while len(raw) > 1 and ((raw[0] == 0 and raw[1] < 0x80) or
                                (raw[0] == 0xFF and raw[1] >= 0x80)):
            raw = raw[1:]
        return hash_unsafe_bytes(raw, u) & 0xFFFFFFFF
    if isinstance(t, (StringType, BinaryType)):
        raw = value.encode() if isinstance(value, str) else value
        return hash_unsafe_bytes(raw, u) & 0xFFFFFFFF
    if isinstance(t, StructType):
        for f in t.fields:
            u = _ref(value[f.name], f.data_type, u)
        return u
    if isinstance(t, ArrayType):
        for v in value:
            u = _ref(v, t.element_type, u)
        return u
    if isinstance(t, MapType):
        for k, v in value:
            u = _ref(v, t.value_type, _ref(k, t.key_type, u))
        return u
    raise AssertionError(t)


KEY_TYPE = StructType((
    StructField("flag", BooleanType()), StructField("b", ByteType()), StructField("s", ShortType()),
    StructField("i", IntegerType()), StructField("l", LongType()), StructField("f", FloatType()),
    StructField("d", DoubleType()), StructField("dec", DecimalType(12, 3)),
    StructField("big", DecimalType(30, 5)), StructField("name", StringType()),
    StructField("raw", BinaryType()), StructField("day", DateType()),
    StructField("inner", StructType((StructField("x", IntegerType()),
                                     StructField("y", ArrayType(StringType()))))),
    StructField("tags", MapType(StringType(), LongType())),
))


def _opt(s):
    return st.none() | s


key_rows = st.fixed_dictionaries({
    "flag": _opt(st.booleans()), "b": _opt(st.integers(-128, 127)),
    "s": _opt(st.integers(-32768, 32767)), "i": _opt(st.integers(-(2 ** 31), 2 ** 31 - 1)),
    "l": _opt(st.integers(-(2 ** 63), 2 ** 63 - 1)),
    "f": _opt(st.floats(width=32) | st.sampled_from([0.0, -0.0, float("nan")])),
    "d": _opt(st.floats() | st.sampled_from([0.0, -0.0, float("nan")])),
    "dec": _opt(st.integers(-(10 ** 12) + 1, 10 ** 12 - 1).map(lambda u: Decimal(u).scaleb(-3))),
    "big": _opt(st.integers(-(10 ** 30) + 1, 10 ** 30 - 1).map(
        lambda u: Decimal(u).scaleb(-5, Context(prec=40)))),
    "name": _opt(st.text(max_size=30)), "raw": _opt(st.binary(max_size=30)),
    "day": _opt(st.dates()),
    "inner": _opt(st.fixed_dictionaries({"x": _opt(st.integers(-5, 5)),
                                         "y": _opt(st.lists(_opt(st.text(max_size=6)),
                                                            max_size=4))})),
    "tags": _opt(st.lists(st.tuples(st.text(max_size=5), _opt(st.integers(-9, 9))),
                          max_size=3)),
})


@settings(max_examples=200, deadline=None)
@given(st.lists(key_rows, min_size=1, max_size=20))
def test_vectorised_hash_matches_the_scalar_reference(rows):
    arr = pa.array(rows, arrow_type(KEY_TYPE))
    expected = []
    for row in rows:
        h = SEED
        for f in KEY_TYPE.fields:
            h = _ref(row[f.name], f.data_type, h)
        expected.append(h - (1 << 32) if h >= 1 << 31 else h)
    assert spark_hash(arr, KEY_TYPE).tolist() == expected
    parts = partition_ids(arr, KEY_TYPE, 7).tolist()
    assert parts == [h % 7 for h in expected]  # Python % is pmod for a positive divisor
    # the same from the row bytes
    assert partition_ids_of_rows(encode_rows(arr, KEY_TYPE), KEY_TYPE, 7).tolist() == parts


def test_sliced_inputs_hash_like_the_whole():
    rows = [{"x": [str(i) * i, None]} for i in range(10)]
    t = StructType((StructField("x", ArrayType(StringType())),))
    arr = pa.array(rows, arrow_type(t))
    whole = spark_hash(arr, t)
    assert spark_hash(arr.slice(3, 4), t).tolist() == whole[3:7].tolist()


def test_types_the_engine_cannot_partition_by_are_refused():
    t = StructType((StructField("c", CalendarIntervalType()),))
    arr = pa.array([{"c": {"months": 1, "days": 2, "microseconds": 3}}], arrow_type(t))
    with pytest.raises(Unsupported):
        spark_hash(arr, t)
    collated = StructType((StructField("s", StringType(collation="UTF8_LCASE")),))
    with pytest.raises(Unsupported):
        spark_hash(pa.array([{"s": "A"}], arrow_type(collated)), collated)
    with pytest.raises(ValueError):
        partition_ids(pa.array([{"s": "A"}], arrow_type(collated)), collated, 0)


def test_timestamps_hash_as_longs_of_micros():
    t = StructType((StructField("ts", TimestampType()),))
    arr = pa.array([{"ts": 1_234_567}], arrow_type(t))
    expected = murmur3_x86_32(struct.pack("<q", 1_234_567), SEED)
    assert spark_hash(arr, t).tolist() == [expected]
    assert np.asarray(partition_ids(arr, t, 200)).dtype == np.int32
