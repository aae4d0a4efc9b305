"""The compiled record walk and gather (``migrate.providers._framing``) agree with the Python
reference walk and gather.

Both walks must give the same record offsets for every well-formed file and both must call every
other input irregular, so that ``record_starts`` returns the same offsets, or raises the same
error, whichever walk runs; on every well-formed file both gathers must give the same keys,
values and removal flags, so that ``record_arrays`` returns the same arrays either way. Inputs: the engine-written heap-map files under ``tests/fixtures``,
files generated from random keys and values (whose offsets are known from their construction),
arbitrary bytes from hypothesis, seeded mutations and truncations of valid files, and a buffer
larger than 2 GiB (mapped, not filled, so it costs no memory).

Outside CI a missing extension skips these tests; under ``CI=true`` it fails them, since CI
installs the project with a C compiler and must not pass by skipping (the same rule the engine
and S3 tests follow in the conftest files).
"""

from __future__ import annotations

import mmap
import random
import struct
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from types import ModuleType

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from compiled_extensions import load
from migrate.codecs import codec_of_stream
from migrate.errors import CorruptInput
from migrate.providers import hdfs
from migrate.providers.hdfs import _record_arrays_py, _record_starts_py, parse_records, record_arrays, record_starts

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures"
FIXTURE_FILES = sorted(p for p in FIXTURES.rglob("*") if p.suffix in (".delta", ".snapshot"))
END = struct.pack(">i", -1)
INT32_MIN, INT32_MAX = -(2**31), 2**31 - 1


@pytest.fixture(scope="module")
def framing() -> ModuleType:
    return load("migrate.providers._framing", "the compiled record walk")


def test_extension_is_built_and_used(framing: ModuleType) -> None:
    assert hdfs._framing is framing  # record_starts dispatches to it


# --- the two walks, as "offsets or irregular" ------------------------------------------------


def compiled_starts(framing: ModuleType, data, allow_removals: bool) -> np.ndarray | None:
    out = framing.record_starts(data, allow_removals)
    if out is None:
        return None
    assert isinstance(out, bytes) and len(out) % 8 == 0
    return np.frombuffer(out, dtype=np.int64)


def python_starts(data, allow_removals: bool) -> np.ndarray | None:
    try:
        return _record_starts_py(data, "f", allow_removals)
    except CorruptInput:
        return None


def error_of(data, allow_removals: bool) -> str | None:
    try:
        record_starts(data, "x/1.delta", allow_removals)
    except CorruptInput as exc:
        return str(exc)
    return None


def assert_gathers_agree(framing: ModuleType, data, starts: np.ndarray) -> None:
    """The compiled gather gives the reference gather's keys, values and removal flags, with
    32-bit and with 64-bit offsets, and record_arrays returns them."""
    for large in (False, True):
        keys, values, removed = _record_arrays_py(data, starts, large)
        koff, kdata, voff, vdata, flags = framing.gather_records(data, starts, large)
        width = np.int64 if large else np.int32
        assert [kdata[a:b] for a, b in zip(np.frombuffer(koff, width)[:-1], np.frombuffer(koff, width)[1:])] == keys.to_pylist()
        assert [vdata[a:b] for a, b in zip(np.frombuffer(voff, width)[:-1], np.frombuffer(voff, width)[1:])] == values.to_pylist()
        assert np.frombuffer(flags, np.bool_).tolist() == removed.tolist()
        assert len(koff) == len(voff) == (len(starts) + 1) * np.dtype(width).itemsize
        assert np.frombuffer(koff, width)[0] == 0 and np.frombuffer(koff, width)[-1] == len(kdata)
    k, v, r = record_arrays(data, "f", True)
    keys, values, removed = _record_arrays_py(data, starts, False)
    assert k.equals(keys) and v.equals(values) and r.tolist() == removed.tolist()


def assert_agree(framing: ModuleType, data, allow_removals: bool, monkeypatch: pytest.MonkeyPatch) -> np.ndarray | None:
    """Both walks give the same offsets or both call the input irregular, and record_starts then
    raises the same error with the extension as without it; where the walks accept, both gathers
    agree (:func:`assert_gathers_agree`). Returns the offsets (None: irregular)."""
    expected = python_starts(data, allow_removals)
    got = compiled_starts(framing, data, allow_removals)
    if expected is None:
        assert got is None, f"compiled walk accepted what the Python walk refuses: {got[:8]}"
        with_ext = error_of(data, allow_removals)
        with monkeypatch.context() as m:
            m.setattr(hdfs, "_framing", None)
            without_ext = error_of(data, allow_removals)
        assert with_ext is not None and with_ext == without_ext
        return None
    assert got is not None, "compiled walk refused what the Python walk accepts"
    assert got.dtype == np.int64 and np.array_equal(got, expected)
    assert np.array_equal(record_starts(data, "f", allow_removals), expected)
    assert_gathers_agree(framing, data, expected)
    return expected


# --- (a) files the engine wrote ----------------------------------------------------------------


def decompressed(path: Path) -> bytes:
    """A fixture state file's records, decompressed as HDFSProvider.read_file does."""
    raw = path.read_bytes()
    where = str(path.relative_to(FIXTURES))
    return codec_of_stream(raw, "lz4", where).decompress(raw, where)


def test_fixture_files_exist() -> None:
    assert len(FIXTURE_FILES) >= 40
    assert any(p.suffix == ".snapshot" for p in FIXTURE_FILES) and any(p.suffix == ".delta" for p in FIXTURE_FILES)


@pytest.mark.parametrize("path", FIXTURE_FILES, ids=[str(p.relative_to(FIXTURES)) for p in FIXTURE_FILES])
def test_engine_files_give_the_same_offsets(framing: ModuleType, path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    data = decompressed(path)
    allow = path.suffix == ".delta"
    starts = assert_agree(framing, data, allow, monkeypatch)
    assert starts is not None
    assert len(starts) == sum(1 for _ in parse_records(data, str(path), allow))
    # the same bytes from every kind of buffer the C side accepts
    for view in (bytearray(data), memoryview(data), memoryview(b"pad" + data)[3:]):
        assert np.array_equal(compiled_starts(framing, view, allow), starts)
    assert_agree(framing, data, not allow, monkeypatch)  # a delta read as a snapshot: removals refused


def test_engine_files_hold_records_and_removals() -> None:
    """The fixture set exercises the walk: many records, and deltas that remove keys."""
    total = removals = 0
    for path in FIXTURE_FILES:
        for _, value in parse_records(decompressed(path), str(path), allow_removals=True):
            total += 1
            removals += value is None
    assert total > 100 and removals > 0


# --- (b) generated records ----------------------------------------------------------------------


def build(records: list[tuple[bytes, bytes | None]]) -> tuple[bytes, list[int]]:
    """The framed records and the offset of each, computed while framing."""
    out, starts, pos = [], [], 0
    for key, value in records:
        starts.append(pos)
        part = struct.pack(">i", len(key)) + key
        part += struct.pack(">i", -1) if value is None else struct.pack(">i", len(value)) + value
        out.append(part)
        pos += len(part)
    return b"".join(out) + END, starts


def random_records(rng: random.Random, count: int, removals: bool) -> list[tuple[bytes, bytes | None]]:
    sizes = [0, 0, 1, 3, 4, 7, 8, 16, 33, 300]
    return [
        (
            rng.randbytes(rng.choice(sizes)),
            None if removals and rng.random() < 0.3 else rng.randbytes(rng.choice(sizes)),
        )
        for _ in range(count)
    ]


@pytest.mark.parametrize("seed", range(40))
def test_generated_files_give_their_offsets(framing: ModuleType, seed: int, monkeypatch: pytest.MonkeyPatch) -> None:
    rng = random.Random(seed)
    count = [0, 1, 2, rng.randrange(3, 50), rng.randrange(50, 3000)][seed % 5]
    removals = seed % 2 == 1
    records = random_records(rng, count, removals)
    data, expected = build(records)
    starts = assert_agree(framing, data, removals, monkeypatch)
    assert starts is not None and starts.tolist() == expected
    as_snapshot = assert_agree(framing, data, False, monkeypatch)  # removals are refused in a snapshot
    assert (as_snapshot is None) == any(value is None for _, value in records)


@pytest.mark.parametrize(
    "records",
    [
        [],
        [(b"", b"")],
        [(b"", None)],
        [(b"k", b"v")],
        [(b"\xff\xff\xff\xff", b"\xff\xff\xff\xff")],  # key and value that look like end markers
        [(b"", b"")] * 1500,  # more records than the first allocation holds
    ],
    ids=["zero-records", "empty-key-and-value", "empty-removal", "single", "marker-bytes", "many-empty"],
)
def test_edge_files_give_their_offsets(framing: ModuleType, records, monkeypatch: pytest.MonkeyPatch) -> None:
    data, expected = build(records)
    starts = assert_agree(framing, data, True, monkeypatch)
    assert starts is not None and starts.tolist() == expected


@pytest.mark.parametrize(
    "data",
    [
        b"",
        b"\xff\xff\xff",  # a cut end marker
        b"\x00\x00\x00\x00",  # a key length and nothing more
        END + b"\x00",  # trailing byte
        END + END,
        struct.pack(">i", -2),
        struct.pack(">i", INT32_MIN),
        struct.pack(">i", INT32_MAX) + b"k" * 16 + END,
        struct.pack(">ii", 1, 2) + b"k" + b"vv",  # no end marker
        struct.pack(">i", 1) + b"k" + struct.pack(">i", -2) + END,
        struct.pack(">i", 1) + b"k" + struct.pack(">i", INT32_MIN) + END,
        struct.pack(">i", 1) + b"k" + struct.pack(">i", INT32_MAX) + END,
        struct.pack(">i", 1) + b"k" + struct.pack(">i", 5) + b"vvvv",  # value one byte short, no marker
        struct.pack(">i", 1) + b"k" + struct.pack(">i", 4) + b"vvvv" + b"\xff\xff\xff",
    ],
)
@pytest.mark.parametrize("allow", [True, False])
def test_irregular_inputs_are_refused_by_both(framing: ModuleType, data: bytes, allow: bool, monkeypatch) -> None:
    assert assert_agree(framing, data, allow, monkeypatch) is None
    assert framing.record_starts(data, allow) is None


def test_removal_needs_permission(framing: ModuleType, monkeypatch: pytest.MonkeyPatch) -> None:
    data, expected = build([(b"a", b"1"), (b"b", None)])
    assert assert_agree(framing, data, True, monkeypatch).tolist() == expected
    assert assert_agree(framing, data, False, monkeypatch) is None
    # record 1 takes bytes 0..9 (4 + 1 + 4 + 1); record 2's key length is at 10, its key at 14
    with pytest.raises(CorruptInput, match=r"^x/2\.snapshot: bad value length -1 at byte 15$"):
        record_starts(data, "x/2.snapshot", allow_removals=False)


def test_argument_errors_are_python_errors(framing: ModuleType) -> None:
    with pytest.raises(TypeError):
        framing.record_starts("not bytes", True)
    with pytest.raises(TypeError):
        framing.record_starts(END)
    with pytest.raises(BufferError):
        framing.record_starts(memoryview(END + END)[::2], True)  # not contiguous
    with pytest.raises(TypeError):
        framing.gather_records(END, "not a buffer", False)
    with pytest.raises(BufferError):
        framing.gather_records(memoryview(END + END)[::2], b"", False)


def test_gather_refuses_starts_that_hold_no_record(framing: ModuleType) -> None:
    """Starts that did not come from the walk are refused whole (ValueError, nothing returned),
    never read past the end of the data."""
    data, expected = build([(b"ab", b"xyz"), (b"c", None)])
    assert framing.gather_records(data, np.array(expected, np.int64), False)[1] == b"abc"
    for bad in ([len(data) - 4], [len(data)], [-1], [1], [0, 10**12]):
        with pytest.raises(ValueError, match="does not hold a record"):
            framing.gather_records(data, np.array(bad, np.int64), False)
    with pytest.raises(ValueError, match="int64"):
        framing.gather_records(data, b"\x00" * 7, False)
    # an unaligned buffer of starts is read correctly
    raw = b"\x00" + np.array(expected, np.int64).tobytes()
    assert framing.gather_records(data, memoryview(raw)[1:], False)[1] == b"abc"


# --- (c) arbitrary bytes and mutations of valid files -------------------------------------------


@settings(max_examples=400, deadline=None)
@given(data=st.binary(max_size=64), allow=st.booleans())
def test_arbitrary_bytes_agree(framing: ModuleType, data: bytes, allow: bool) -> None:
    with pytest.MonkeyPatch.context() as m:
        assert_agree(framing, data, allow, m)


length = st.one_of(st.integers(-3, 40), st.sampled_from([INT32_MIN, INT32_MIN + 1, INT32_MAX, INT32_MAX - 7]))


@settings(max_examples=400, deadline=None)
@given(
    parts=st.lists(st.one_of(length.map(lambda n: struct.pack(">i", n)), st.binary(max_size=12)), max_size=12),
    allow=st.booleans(),
)
def test_length_shaped_bytes_agree(framing: ModuleType, parts: list[bytes], allow: bool) -> None:
    """Inputs made of plausible length fields and short runs, so many walk several records."""
    with pytest.MonkeyPatch.context() as m:
        assert_agree(framing, b"".join(parts), allow, m)


def mutations(data: bytes, starts: list[int], rng: random.Random, count: int) -> Iterator[bytes]:
    """Seeded damage: truncation, trailing bytes, bit flips, and rewritten length fields."""
    for _ in range(count):
        b = bytearray(data)
        kind = rng.randrange(5)
        if kind == 0:
            b = b[: rng.randrange(len(b) + 1)]
        elif kind == 1:
            b += rng.randbytes(rng.randint(1, 9))
        elif kind == 2:
            for _ in range(rng.randint(1, 3)):
                i = rng.randrange(len(b))
                b[i] ^= 1 << rng.randrange(8)
        else:  # a key length (kind 3) or a value length (kind 4) set to a nearby or extreme value
            if not starts:
                b[0:4] = struct.pack(">i", rng.choice([-2, 0, 1, INT32_MAX]))
            else:
                s = rng.choice(starts)
                at = s if kind == 3 else s + 4 + struct.unpack_from(">i", b, s)[0]
                old = struct.unpack_from(">i", b, at)[0]
                new = rng.choice([old - 1, old + 1, old + rng.randint(-8, 8), -1, -2, 0, INT32_MIN, INT32_MAX,
                                  len(b) - at - 4, len(b) - at - 8])
                b[at : at + 4] = struct.pack(">i", max(INT32_MIN, min(INT32_MAX, new)))
        yield bytes(b)


@pytest.mark.parametrize("seed", range(6))
def test_mutated_files_agree(framing: ModuleType, seed: int, monkeypatch: pytest.MonkeyPatch) -> None:
    rng = random.Random(1000 + seed)
    valid = [build(random_records(rng, rng.randrange(0, 30), removals=True)) for _ in range(4)]
    for path in rng.sample(FIXTURE_FILES, 3):
        data = decompressed(path)
        valid.append((data, _record_starts_py(data, "f", True).tolist()))
    outcomes = {"walked": 0, "irregular": 0}
    for data, starts in valid:
        for damaged in mutations(data, starts, rng, 80):
            for allow in (True, False):
                result = assert_agree(framing, damaged, allow, monkeypatch)
                outcomes["irregular" if result is None else "walked"] += 1
    assert outcomes["walked"] > 0 and outcomes["irregular"] > 0  # the mutations reach both outcomes


# --- buffers of 2 GiB and more ------------------------------------------------------------------


def test_offsets_past_2_gib(framing: ModuleType, monkeypatch: pytest.MonkeyPatch) -> None:
    """A key of 2**31 - 1 bytes puts the second record past 2 GiB. The buffer is an anonymous
    mapping, whose pages get memory only when first touched (mmap(2) on Linux; common practice
    elsewhere): only the pages holding lengths are touched, so this needs no 2 GiB of memory."""
    if sys.maxsize < 2**32:
        pytest.skip("a 32-bit Python cannot address a buffer of 2 GiB")
    first_key = INT32_MAX
    second = 4 + first_key + 4  # first record: key length, key, value length 0
    tail = struct.pack(">i", 3) + b"key" + struct.pack(">i", 2) + b"va" + END
    size = second + len(tail)
    try:
        buf = mmap.mmap(-1, size)
    except (OSError, OverflowError, MemoryError) as exc:
        pytest.skip(f"cannot map {size} bytes here: {exc}")
    with buf:
        buf[0:4] = struct.pack(">i", first_key)
        buf[4 + first_key : second] = struct.pack(">i", 0)
        buf[second:size] = tail
        assert compiled_starts(framing, buf, False).tolist() == [0, second]
        assert _record_starts_py(buf, "f", False).tolist() == [0, second]
        buf[size - 4 : size] = b"\x00\x00\x00\x00"  # no end marker: refused, with no read past the end
        assert framing.record_starts(buf, False) is None
        # (parse_records would copy the 2 GiB key to explain the error; only the verdict matters here)
        monkeypatch.setattr(hdfs, "parse_records", lambda *_: iter(()))
        with pytest.raises(CorruptInput, match="records cannot be walked"):
            _record_starts_py(buf, "f", False)


# --- the fallback --------------------------------------------------------------------------------


def test_python_walk_runs_when_the_extension_is_missing(monkeypatch: pytest.MonkeyPatch) -> None:
    """Without the extension record_starts and record_arrays are the Python walk and gather
    (offsets, arrays and errors); needs no build."""
    data, expected = build([(b"a", b"1"), (b"", None), (b"ccc", b"")])
    monkeypatch.setattr(hdfs, "_framing", None)
    assert record_starts(data, "f", True).tolist() == expected
    keys, values, removed = record_arrays(data, "f", True)
    assert keys.to_pylist() == [b"a", b"", b"ccc"] and values.to_pylist() == [b"1", b"", b""]
    assert removed.tolist() == [False, True, False]
    with pytest.raises(CorruptInput, match=r"^x/1\.delta: 1 unexpected bytes after the end marker$"):
        record_starts(data + b"\x00", "x/1.delta", True)


def test_hdfs_imports_without_the_extension() -> None:
    """A Python where the extension cannot be imported still imports hdfs and walks in Python."""
    code = (
        "import sys; sys.modules['migrate.providers._framing'] = None\n"  # import of it raises ImportError
        "from migrate.providers import hdfs\n"
        "assert hdfs._framing is None\n"
        "print(hdfs.record_starts(b'\\x00\\x00\\x00\\x01k\\xff\\xff\\xff\\xff\\xff\\xff\\xff\\xff', 'f', True).tolist())\n"
    )
    repo = Path(__file__).resolve().parents[2]
    out = subprocess.run([sys.executable, "-c", code], cwd=repo, capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[0]"
