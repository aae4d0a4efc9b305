"""The compiled decode of flat rows (migrate/rows/_flatrows.c) against the numpy decode, the
reference: the same arrays for generated flat schemas (every fixed-width type, strings and
binaries, nulls, more than 64 fields), for slices and large_binary input; malformed rows and
strings that are not UTF-8 fall back to the numpy way, which reports them as before.

Outside CI a missing extension skips these tests; under ``CI=true`` it fails them (as in
test_digest_compiled.py).
"""

from __future__ import annotations

import struct

import pyarrow as pa
import pytest
from compiled_extensions import load
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from migrate.errors import CorruptInput
from migrate.rows import unsafe_row
from migrate.rows.schema import (
    ArrayType, BinaryType, BooleanType, ByteType, DateType, DayTimeIntervalType, DoubleType,
    FloatType, IntegerType, LongType, ShortType, StringType, StructField, StructType,
    TimestampNTZType, TimestampType, YearMonthIntervalType, arrow_type,
)
from migrate.rows.unsafe_row import decode_rows_report, encode_rows



@pytest.fixture(autouse=True)
def compiled() -> None:
    load("migrate.rows._flatrows", "the compiled decode of flat rows")
    assert unsafe_row._flatrows is not None

FLAT = [BooleanType(), ByteType(), ShortType(), IntegerType(), LongType(), FloatType(), DoubleType(),
        StringType(), BinaryType(), DateType(), TimestampType(), TimestampNTZType(),
        DayTimeIntervalType(), YearMonthIntervalType()]


def _values(t):
    if isinstance(t, BooleanType):
        return st.booleans()
    if isinstance(t, ByteType):
        return st.integers(-128, 127)
    if isinstance(t, ShortType):
        return st.integers(-32768, 32767)
    if isinstance(t, (IntegerType, YearMonthIntervalType)):
        return st.integers(-(2**31), 2**31 - 1)
    if isinstance(t, (LongType, DayTimeIntervalType)):
        return st.integers(-(2**63), 2**63 - 1)
    if isinstance(t, FloatType):
        return st.floats(width=32, allow_nan=False)
    if isinstance(t, DoubleType):
        return st.floats(allow_nan=False)
    if isinstance(t, StringType):
        return st.text(max_size=24)
    if isinstance(t, BinaryType):
        return st.binary(max_size=24)
    if isinstance(t, DateType):
        return st.integers(-719_162, 2_932_896)
    return st.integers(-62_135_596_800_000_000, 253_402_300_799_999_999)  # timestamps


@st.composite
def flat_batches(draw, max_fields: int = 6):
    types = draw(st.lists(st.sampled_from(FLAT), min_size=1, max_size=max_fields))
    schema = StructType(tuple(StructField(f"f{i}", t, draw(st.booleans())) for i, t in enumerate(types)))
    row = st.fixed_dictionaries({f.name: (st.none() | _values(f.data_type)) if f.nullable else _values(f.data_type)
                                 for f in schema.fields})
    rows = draw(st.lists(row, max_size=40))
    return schema, encode_rows(pa.array(rows, type=arrow_type(schema)), schema)


def _both(encoded: pa.Array, schema: StructType, monkeypatch: pytest.MonkeyPatch):
    """(compiled decode, numpy decode) of the same rows."""
    calls = []
    real = unsafe_row._flatrows.decode
    monkeypatch.setattr(unsafe_row._flatrows, "decode", lambda *a: calls.append(1) or real(*a))
    fast = decode_rows_report(encoded, schema, "x").rows
    with monkeypatch.context() as m:
        m.setattr(unsafe_row, "_flatrows", None)
        reference = decode_rows_report(encoded, schema, "x").rows
    return fast, reference, bool(calls)


@settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(batch=flat_batches(), data=st.data())
def test_the_compiled_decode_gives_the_numpy_arrays(batch, data, monkeypatch):
    schema, encoded = batch
    if data.draw(st.booleans()):
        encoded = encoded.cast(pa.large_binary())
    start = data.draw(st.integers(0, len(encoded)))
    encoded = encoded.slice(start, data.draw(st.integers(0, len(encoded) - start)))
    fast, reference, compiled = _both(encoded, schema, monkeypatch)
    assert compiled == (len(encoded) > 0)
    fast.validate(full=True)
    assert fast.type == reference.type
    assert fast.equals(reference)


def test_more_than_64_fields_read_their_null_bits_from_the_second_word(monkeypatch):
    schema = StructType(tuple(StructField(f"c{i}", LongType() if i % 3 else StringType(), True) for i in range(70)))
    rows = [{f"c{i}": (None if (i + r) % 4 == 0 else (i * 1000 + r if i % 3 else f"v{i}-{r}")) for i in range(70)}
            for r in range(9)]
    encoded = encode_rows(pa.array(rows, type=arrow_type(schema)), schema)
    fast, reference, compiled = _both(encoded, schema, monkeypatch)
    assert compiled and fast.equals(reference)
    assert fast.field(66).to_pylist() == [None if (66 + r) % 4 == 0 else f"v66-{r}" for r in range(9)]


def _long_and_string_rows() -> tuple[StructType, pa.Array]:
    schema = StructType((StructField("n", LongType(), True), StructField("s", StringType(), True)))
    return schema, encode_rows(pa.array([{"n": 7, "s": "abc"}, {"n": 8, "s": "defgh"}], type=arrow_type(schema)), schema)


def _with_row(encoded: pa.Array, i: int, row: bytes) -> pa.Array:
    rows = encoded.to_pylist()
    rows[i] = row
    return pa.array(rows, pa.binary())


@pytest.mark.parametrize("damage, message, compiled_refuses", [
    (lambda row: row[:16], "needs at least 24 bytes", True),  # shorter than its null bits and slots
    (lambda row: row[:16] + struct.pack("<Q", (24 << 32) | 100) + row[24:], "points past the end of its row", True),
    (lambda row: row[:24] + b"\xff\xfe\xfd" + row[27:], "not valid UTF-8", False),  # Arrow's validation finds it
])
def test_malformed_rows_are_reported_by_the_reference_naming_the_row(damage, message, compiled_refuses):
    schema, encoded = _long_and_string_rows()
    bad = _with_row(encoded, 1, damage(encoded[1].as_py()))
    assert (unsafe_row._flatrows.decode(*_args(bad), b"8v") is None) == compiled_refuses
    assert unsafe_row._flat(bad, schema) is None
    with pytest.raises(CorruptInput, match=f"row 1 of the batch.*{message}"):
        decode_rows_report(bad, schema, "x")


def _args(arr: pa.Array):
    bufs = arr.buffers()
    return bufs[1], bufs[2], arr.offset, pa.types.is_large_binary(arr.type), len(arr)


def test_schemas_and_rows_it_does_not_take_go_the_numpy_way(monkeypatch):
    nested = StructType((StructField("a", ArrayType(LongType(), True), True),))
    assert unsafe_row._flat_kinds(nested) is None
    schema, encoded = _long_and_string_rows()
    with_null = pa.array([encoded[0].as_py(), None], pa.binary())
    calls = []
    monkeypatch.setattr(unsafe_row._flatrows, "decode", lambda *a: calls.append(1))
    out = decode_rows_report(with_null, schema, "x").rows  # a null row: the numpy way
    assert not calls and out.to_pylist() == [{"n": 7, "s": "abc"}, None]


def test_bad_arguments_are_refused_before_any_read():
    schema, encoded = _long_and_string_rows()
    offsets, data, offset, large, count = _args(encoded)
    with pytest.raises(ValueError):
        unsafe_row._flatrows.decode(offsets, data, offset, large, count, b"8q")  # unknown kind
    with pytest.raises(ValueError):
        unsafe_row._flatrows.decode(offsets, data, offset, large, count + 5, b"8v")  # past the offsets
    with pytest.raises(ValueError):
        unsafe_row._flatrows.decode(offsets, data[:10], offset, large, count, b"8v")  # data too short
