"""Property: for generated schemas and values, decode(encode(x)) == x and the bytes are stable.

Schemas are generated recursively over every modelled type (structs, arrays, maps, nulls at
every level, non-nullable fields); values cover each type's full physical range (dates and
timestamps limited to what Python's datetime can show). Batches are also sliced and chunked so
the decoder's offset handling is exercised.
"""

from __future__ import annotations

import math
from decimal import Context, Decimal

import pyarrow as pa
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from migrate.rows.layout import bitset_bytes
from migrate.rows.schema import (
    ArrayType, BinaryType, BooleanType, ByteType, CalendarIntervalType, DateType,
    DayTimeIntervalType, DecimalType, DoubleType, FloatType, IntegerType, LongType, MapType,
    NullType, ShortType, StringType, StructField, StructType, TimestampNTZType, TimestampType,
    YearMonthIntervalType, arrow_type,
)
from migrate.rows.unsafe_row import decode_rows, encode_rows

I32 = st.integers(-(2 ** 31), 2 ** 31 - 1)
I64 = st.integers(-(2 ** 63), 2 ** 63 - 1)
MICROS = st.integers(-62_135_596_800_000_000, 253_402_300_799_999_999)  # datetime's range
DAYS = st.integers(-719_162, 2_932_896)

atoms = st.sampled_from([
    BooleanType(), ByteType(), ShortType(), IntegerType(), LongType(), FloatType(),
    DoubleType(), StringType(), BinaryType(), DateType(), TimestampType(), TimestampNTZType(),
    DayTimeIntervalType(), YearMonthIntervalType(), CalendarIntervalType(), NullType(),
]) | st.builds(lambda p, s: DecimalType(p, min(s, p)), st.integers(1, 38), st.integers(0, 38))


def _struct_of(children):
    return st.lists(st.tuples(children, st.booleans()), min_size=1, max_size=5).map(
        lambda fs: StructType(tuple(StructField(f"f{i}", t, nullable)
                                    for i, (t, nullable) in enumerate(fs))))


types = st.recursive(
    atoms,
    lambda children: (st.builds(ArrayType, children, st.booleans())
                      | st.builds(MapType, atoms.filter(lambda t: not isinstance(t, NullType)),
                                  children, st.booleans())
                      | _struct_of(children)),
    max_leaves=8,
)
schemas = _struct_of(types)


def values(t, nullable: bool):
    """Python values pyarrow accepts for ``arrow_type(t)``."""
    if isinstance(t, NullType):
        return st.none()
    if isinstance(t, BooleanType):
        base = st.booleans()
    elif isinstance(t, ByteType):
        base = st.integers(-128, 127)
    elif isinstance(t, ShortType):
        base = st.integers(-32768, 32767)
    elif isinstance(t, (IntegerType, YearMonthIntervalType)):
        base = I32
    elif isinstance(t, (LongType, DayTimeIntervalType)):
        base = I64
    elif isinstance(t, FloatType):
        base = st.floats(width=32)
    elif isinstance(t, DoubleType):
        base = st.floats()
    elif isinstance(t, DecimalType):
        limit = 10 ** t.precision - 1
        base = st.integers(-limit, limit).map(
            lambda u, s=t.scale: Decimal(u).scaleb(-s, Context(prec=80)))
    elif isinstance(t, StringType):
        base = st.text(max_size=20)
    elif isinstance(t, BinaryType):
        base = st.binary(max_size=20)
    elif isinstance(t, DateType):
        base = DAYS
    elif isinstance(t, (TimestampType, TimestampNTZType)):
        base = MICROS
    elif isinstance(t, CalendarIntervalType):
        base = st.fixed_dictionaries({"months": I32, "days": I32, "microseconds": I64})
    elif isinstance(t, ArrayType):
        base = st.lists(values(t.element_type, t.contains_null), max_size=5)
    elif isinstance(t, MapType):
        base = st.lists(st.tuples(values(t.key_type, False),
                                  values(t.value_type, t.value_contains_null)), max_size=4)
    elif isinstance(t, StructType):
        base = st.fixed_dictionaries({f.name: values(f.data_type, f.nullable) for f in t.fields})
    else:  # pragma: no cover
        raise AssertionError(t)
    return (st.none() | base) if nullable else base


@st.composite
def batches(draw):
    schema = draw(schemas)
    rows = draw(st.lists(values(schema, True), max_size=6))
    return schema, pa.array(rows, type=arrow_type(schema))


def canon(v):
    if isinstance(v, float):
        return ("nan",) if math.isnan(v) else v
    if isinstance(v, dict):
        return tuple((k, canon(x)) for k, x in v.items())
    if isinstance(v, (list, tuple)):
        return tuple(canon(x) for x in v)
    return v


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(batches())
def test_decode_inverts_encode(batch):
    schema, arr = batch
    encoded = encode_rows(arr, schema)
    assert encoded.null_count == arr.null_count
    for row in encoded.to_pylist():
        if row is not None:  # every row is 8-byte aligned and holds at least its fixed part
            assert len(row) % 8 == 0
            assert len(row) >= bitset_bytes(len(schema.fields)) + 8 * len(schema.fields)
    decoded = decode_rows(encoded, schema, "generated")
    decoded.validate(full=True)
    assert decoded.type == arr.type
    assert canon(decoded.to_pylist()) == canon(arr.to_pylist())
    assert encode_rows(decoded, schema).to_pylist() == encoded.to_pylist()


@settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(batches(), st.data())
def test_slices_and_chunks_decode_like_the_whole(batch, data):
    schema, arr = batch
    encoded = encode_rows(arr, schema)
    whole = canon(decode_rows(encoded, schema).to_pylist())
    start = data.draw(st.integers(0, len(encoded)))
    stop = data.draw(st.integers(start, len(encoded)))
    assert canon(decode_rows(encoded.slice(start, stop - start), schema).to_pylist()) == \
        whole[start:stop]
    chunked = pa.chunked_array([encoded.slice(0, start), encoded.slice(start)], pa.binary())
    assert canon(decode_rows(chunked, schema).to_pylist()) == whole
    # the writer also honours sliced input
    sliced = arr.slice(start, stop - start)
    assert encode_rows(sliced, schema).to_pylist() == encoded.to_pylist()[start:stop]
