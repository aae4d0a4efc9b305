"""The vectorised heap-map reader gives the same map as replaying every record in a dict.

The reference is the plain replay: walk each file of the chain with ``parse_records`` and apply
puts and removals to a dict in order. The random chains repeat keys inside one file and across
files, remove keys that exist, keys that do not, and keys that come back, mix empty and
non-multiple-of-8 lengths, and are cut at random points to check the errors match too. The
replay step alone (``resolve_versions``) is held to an ordered dict replay on hypothesis inputs.
"""

import random
import struct
import subprocess
import sys

import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from compiled_extensions import load
from migrate.codecs import codec_for
from migrate.errors import CorruptInput
from migrate.providers import hdfs
from migrate.providers.base import ReadContext, StoreDir
from migrate.providers.hdfs import (
    HDFSProvider,
    _resolve_versions_dictionary,
    _resolve_versions_sorted,
    parse_records,
    record_arrays,
    record_starts,
    resolve_versions,
)
from migrate.storage import open_location

END = struct.pack(">i", -1)


def rec(key: bytes, value: bytes | None) -> bytes:
    if value is None:
        return struct.pack(">i", len(key)) + key + struct.pack(">i", -1)
    return struct.pack(">i", len(key)) + key + struct.pack(">i", len(value)) + value


def random_file(rng: random.Random, pool: list[bytes], removals: bool) -> bytes:
    out = []
    for _ in range(rng.randrange(0, 60)):
        key = rng.choice(pool)
        if removals and rng.random() < 0.25:
            out.append(rec(key, None))
        else:
            out.append(rec(key, bytes(rng.randrange(256) for _ in range(rng.choice([0, 1, 3, 8, 16, 21])))))
    return b"".join(out) + END


def replay(files: list[tuple[str, bytes]]) -> dict[bytes, bytes]:
    state: dict[bytes, bytes] = {}
    for name, data in files:
        for key, value in parse_records(data, name, allow_removals=name.endswith(".delta")):
            if value is None:
                state.pop(key, None)
            else:
                state[key] = value
    return state


def read_all(tmp_path, files: list[tuple[str, bytes]], version: int) -> list[tuple[bytes, bytes]]:
    loc = open_location(str(tmp_path), readonly=False)
    for name, raw in files:
        loc.write_bytes(f"state/0/0/{name}", codec_for("lz4").compress(raw))
    rows = []
    for batch in HDFSProvider().read(StoreDir(loc, "state/0/0", 0, 0), version, ReadContext()):
        rows += list(zip(batch.column("key").to_pylist(), batch.column("value").to_pylist()))
    return rows


@pytest.mark.parametrize("seed", range(12))
def test_snapshot_plus_deltas_equals_dict_replay(tmp_path, seed):
    rng = random.Random(seed)
    pool = [bytes(rng.randrange(256) for _ in range(rng.choice([0, 1, 4, 8, 24]))) for _ in range(30)]
    snap = random_file(rng, pool, removals=False)
    deltas = [random_file(rng, pool, removals=True) for _ in range(rng.randrange(1, 5))]
    files = [("3.snapshot", snap)] + [(f"{4 + i}.delta", d) for i, d in enumerate(deltas)]
    rows = read_all(tmp_path, files, 3 + len(deltas))
    assert len(rows) == len({k for k, _ in rows})  # every key once
    assert dict(rows) == replay(files)


@pytest.mark.parametrize("seed", range(8))
def test_record_arrays_match_parse_records_and_errors_match_when_cut(seed):
    rng = random.Random(100 + seed)
    pool = [bytes(rng.randrange(256) for _ in range(rng.choice([0, 2, 8, 13]))) for _ in range(20)]
    data = random_file(rng, pool, removals=True)
    expected = list(parse_records(data, "f.delta", allow_removals=True))
    keys, values, removed = record_arrays(data, "f.delta", allow_removals=True)
    got = [(k, None if r else v) for k, v, r in zip(keys.to_pylist(), values.to_pylist(), removed)]
    assert got == expected
    for cut in sorted(rng.sample(range(len(data)), min(15, len(data)))) + [len(data) + 1]:
        broken = data[:cut] if cut <= len(data) else data + b"\x00"
        with pytest.raises(CorruptInput) as want:
            list(parse_records(broken, "f.delta", allow_removals=True))
        with pytest.raises(CorruptInput) as have:
            record_starts(broken, "f.delta", allow_removals=True)
        assert str(have.value) == str(want.value)


def test_a_removal_in_a_snapshot_is_refused_with_the_same_message():
    data = rec(b"a", b"1") + rec(b"b", None) + END  # 10-byte first record, then 4 + 1 bytes of key "b"
    with pytest.raises(CorruptInput, match="bad value length -1 at byte 15"):
        record_starts(data, "x.snapshot", allow_removals=False)


def test_bad_negative_lengths_are_refused_with_the_same_message():
    bad_value = struct.pack(">i", 1) + b"a" + struct.pack(">i", -5) + END
    bad_key = struct.pack(">i", -9) + END
    for data, message in ((bad_value, "bad value length -5 at byte 5"), (bad_key, "bad key length -9 at byte 0")):
        with pytest.raises(CorruptInput, match=message):
            record_starts(data, "x.delta", allow_removals=True)


# --- the replay itself (resolve_versions), against an ordered dict replay -----------------------


def ordered_replay(files: list[list[tuple[bytes, bytes | None]]], key_order: bool) -> list[tuple[bytes, bytes]]:
    """Surviving (key, value) pairs of a dict replay, in the file order of each key's last write,
    or with ``key_order`` in byte-wise key order (Python compares bytes as unsigned bytes, the
    shorter first when one is a prefix of the other)."""
    last: dict[bytes, tuple[int, bytes | None]] = {}
    position = 0
    for records in files:
        for key, value in records:
            last[key] = (position, value)
            position += 1
    ordered = sorted(last.items()) if key_order else sorted(last.items(), key=lambda item: item[1][0])
    return [(k, v) for k, (_, v) in ordered if v is not None]


def as_arrays(records: list[tuple[bytes, bytes | None]], large: bool):
    import numpy as np
    import pyarrow as pa

    binary = pa.large_binary() if large else pa.binary()
    keys = pa.array([k for k, _ in records], binary)
    values = pa.array([b"" if v is None else v for _, v in records], binary)
    return keys, values, np.array([v is None for _, v in records], dtype=bool)


record = st.tuples(st.binary(max_size=3), st.one_of(st.none(), st.binary(max_size=4)))


REPLAYS = {
    "compiled: hash table in file order, sort in key order": resolve_versions,
    "compiled sort in both orders": _resolve_versions_sorted,
    "dictionary encoding": _resolve_versions_dictionary,
}


def test_the_compiled_replay_is_the_one_used():
    assert hdfs._keysort is load("migrate.providers._keysort", "the compiled key sort")


@pytest.mark.parametrize("replay", REPLAYS.values(), ids=REPLAYS.keys())
@settings(max_examples=300, deadline=None)
@given(files=st.lists(st.lists(record, max_size=12), max_size=5), large=st.booleans(), key_order=st.booleans())
def test_resolve_versions_is_the_ordered_replay(replay, files, large, key_order):
    """Last write wins, removals drop the key (also keys removed and written again, keys written
    twice in one file, keys removed that never existed), and the survivors come out in the file
    order of their last write, or in byte-wise key order when asked; with binary and large_binary
    arrays."""
    keys, values = replay([as_arrays(f, large) for f in files], key_order)
    assert list(zip(keys.to_pylist(), values.to_pylist())) == ordered_replay(files, key_order)


@pytest.mark.parametrize("replay", REPLAYS.values(), ids=REPLAYS.keys())
@pytest.mark.parametrize("seed", range(4))
def test_long_histories_replay_in_order(replay, seed):
    """Thousands of records over a pool of engine-length keys (groups far above the compiled
    sort's 32-key insertion sort, many writes and removals of each key)."""
    rng = random.Random(seed)
    pool = [b"\x00" * 8 + struct.pack("<q", rng.randrange(-(2**40), 2**40)) + rng.randbytes(rng.randrange(0, 20)) for _ in range(300)]
    files = [
        [(rng.choice(pool), None if rng.random() < 0.15 else rng.randbytes(rng.randrange(0, 12))) for _ in range(rng.randrange(0, 3000))]
        for _ in range(rng.randrange(1, 7))
    ]
    for key_order in (False, True):
        keys, values = replay([as_arrays(f, seed % 2 == 1) for f in files], key_order)
        assert list(zip(keys.to_pylist(), values.to_pylist())) == ordered_replay(files, key_order)


@pytest.mark.parametrize("replay", REPLAYS.values(), ids=REPLAYS.keys())
def test_resolve_versions_without_overwrites_keeps_the_order_asked_for_and_the_type(replay):
    files = [as_arrays(f, False) for f in [[(b"b", b"2"), (b"\xff", b"9"), (b"a", b"1")], [(b"c", b"3")]]]
    keys, values = replay(files)
    assert keys.to_pylist() == [b"b", b"\xff", b"a", b"c"] and values.to_pylist() == [b"2", b"9", b"1", b"3"]
    assert keys.type == values.type == pa.binary()
    keys, values = replay(files, True)
    assert keys.to_pylist() == [b"a", b"b", b"c", b"\xff"] and values.to_pylist() == [b"1", b"2", b"3", b"9"]
    assert keys.type == values.type == pa.binary()
    for key_order in (False, True):
        keys, values = replay([], key_order)
        assert len(keys) == len(values) == 0


@pytest.mark.parametrize("replay", REPLAYS.values(), ids=REPLAYS.keys())
def test_resolve_versions_of_sorted_files_without_overwrites_returns_them_as_they_are(replay):
    files = [as_arrays([(b"a", b"1"), (b"b", b"2")], False), as_arrays([(b"c", b"3")], False)]
    for key_order in (False, True):
        keys, values = replay(files, key_order)
        assert keys.to_pylist() == [b"a", b"b", b"c"] and values.to_pylist() == [b"1", b"2", b"3"]
        keys, values = replay(files[:1], key_order)
        assert keys.equals(files[0][0]) and values.equals(files[0][1])


def test_the_reader_gives_key_order_when_asked(tmp_path):
    """``ReadContext.key_order`` reaches the replay: the same files read in file order by default,
    in byte-wise key order with the hint (what a RocksDB target asks for: Provider.wants_key_order)."""
    from migrate.providers.rocksdb import RocksDBProvider

    assert RocksDBProvider.wants_key_order and not HDFSProvider.wants_key_order
    loc = open_location(str(tmp_path), readonly=False)
    snapshot = rec(b"m", b"1") + rec(b"\x80", b"2") + rec(b"a", b"3") + rec(b"z", b"4") + END
    delta = rec(b"a", b"5") + rec(b"z", None) + rec(b"b", b"6") + END
    loc.write_bytes("state/0/0/1.snapshot", codec_for("lz4").compress(snapshot))
    loc.write_bytes("state/0/0/2.delta", codec_for("lz4").compress(delta))
    store = StoreDir(loc, "state/0/0", 0, 0)

    def rows(ctx):
        return [(r["key"], r["value"]) for b in HDFSProvider().read(store, 2, ctx) for r in b.to_pylist()]

    assert rows(ReadContext()) == [(b"m", b"1"), (b"\x80", b"2"), (b"a", b"5"), (b"b", b"6")]
    assert rows(ReadContext(key_order=True)) == [(b"a", b"5"), (b"b", b"6"), (b"m", b"1"), (b"\x80", b"2")]


def test_reading_the_heap_map_uses_no_acero(tmp_path):
    """The replay is no Acero query: a read in a fresh interpreter leaves ``pyarrow.acero`` and the
    ``pyarrow.dataset`` it imports (15 MB per process) unimported."""
    loc = open_location(str(tmp_path), readonly=False)
    loc.write_bytes("state/0/0/1.delta", codec_for("lz4").compress(rec(b"k", b"v") + rec(b"k", b"w") + END))
    code = (
        "import sys\n"
        "from migrate.providers.base import ReadContext, StoreDir\n"
        "from migrate.providers.hdfs import HDFSProvider\n"
        "from migrate.storage import open_location\n"
        f"loc = open_location({str(tmp_path)!r})\n"
        "rows = [r for b in HDFSProvider().read(StoreDir(loc, 'state/0/0', 0, 0), 1, ReadContext()) for r in b.to_pylist()]\n"
        "assert rows == [{'key': b'k', 'value': b'w'}], rows\n"
        "print(sorted(m for m in ('pyarrow.acero', 'pyarrow.dataset') if m in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
