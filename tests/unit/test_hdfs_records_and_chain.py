"""Heap-map layout: record framing byte vectors, delta chains, gaps and removals."""

import struct

import pyarrow as pa
import pytest

from migrate.codecs import codec_for
from migrate.codecs.hadoop_crc import make_crc
from migrate.errors import CorruptInput
from migrate.providers.base import ROW_SCHEMA, ReadContext, StoreDir, WriteContext
from migrate.providers.hdfs import HDFSProvider, frame_records, parse_records
from migrate.storage import open_location


def rec(key: bytes, value: bytes | None) -> bytes:
    # record layout: int32 BE key length, key, int32 BE value length (-1 = removal), value
    if value is None:
        return struct.pack(">i", len(key)) + key + struct.pack(">i", -1)
    return struct.pack(">i", len(key)) + key + struct.pack(">i", len(value)) + value


END = struct.pack(">i", -1)


def _batch(rows):
    return pa.RecordBatch.from_arrays(
        [pa.array([k for k, _ in rows], pa.binary()), pa.array([v for _, v in rows], pa.binary())], schema=ROW_SCHEMA
    )


def test_frame_records_matches_hand_built_bytes():
    rows = [(b"k1" * 4, b"v" * 16), (b"\x00" * 8, b""), (b"abc", b"xyz")]
    expected = b"".join(rec(k, v) for k, v in rows) + END
    assert frame_records([_batch(rows[:1]), _batch([]), _batch(rows[1:])]) == expected


def test_parse_records_handles_removals_and_end_marker():
    data = rec(b"a", b"1") + rec(b"b", None) + rec(b"c", b"") + END
    assert list(parse_records(data, "x.delta", allow_removals=True)) == [(b"a", b"1"), (b"b", None), (b"c", b"")]
    with pytest.raises(CorruptInput, match="bad value length -1"):
        list(parse_records(data, "x.snapshot", allow_removals=False))


@pytest.mark.parametrize(
    "data, problem",
    [
        (rec(b"a", b"1"), "without the end marker"),
        (struct.pack(">i", 1) + b"a" + struct.pack(">i", 10) + b"xy", "runs past the end"),
        (struct.pack(">i", -7) + END, "bad key length -7"),
        (rec(b"a", b"1") + END + b"\x00", "unexpected bytes after the end marker"),
        (struct.pack(">i", 4) + b"ab", "bad key length 4"),
    ],
)
def test_parse_records_refuses_truncated_or_garbled_input(data, problem):
    with pytest.raises(CorruptInput, match=problem) as err:
        list(parse_records(data, "/c/state/0/1/4.delta", allow_removals=True))
    assert str(err.value).startswith("/c/state/0/1/4.delta: ")


def _store(tmp_path, files: dict[str, bytes]):
    loc = open_location(str(tmp_path), readonly=False)
    for name, raw in files.items():
        data = codec_for("lz4").compress(raw)
        loc.write_bytes(f"state/0/0/{name}", data)
        loc.write_bytes(f"state/0/0/.{name}.crc", make_crc(data))
    return StoreDir(loc, "state/0/0", 0, 0)


def _read(store, version):
    out = {}
    for b in HDFSProvider().read(store, version, ReadContext()):
        out.update(zip(b.column("key").to_pylist(), b.column("value").to_pylist()))
    return out


def test_version_is_newest_snapshot_plus_later_deltas(tmp_path):
    store = _store(
        tmp_path,
        {
            "1.delta": rec(b"a", b"1") + rec(b"b", b"1") + END,
            "2.delta": rec(b"a", b"2") + END,
            "2.snapshot": rec(b"a", b"2") + rec(b"b", b"1") + END,
            "3.delta": rec(b"b", None) + rec(b"c", b"3") + END,
            "4.delta": rec(b"d", b"4") + END,
        },
    )
    assert _read(store, 1) == {b"a": b"1", b"b": b"1"}
    assert _read(store, 3) == {b"a": b"2", b"c": b"3"}
    assert _read(store, 4) == {b"a": b"2", b"c": b"3", b"d": b"4"}
    files = HDFSProvider().source_files(store, 4, ReadContext())
    assert [f.rel.rsplit("/", 1)[1] for f in files] == ["2.snapshot", "3.delta", "4.delta"]


def test_a_gap_in_the_delta_chain_is_an_error_not_a_partial_state(tmp_path):
    store = _store(tmp_path, {"1.delta": rec(b"a", b"1") + END, "3.delta": rec(b"b", b"2") + END})
    with pytest.raises(CorruptInput, match="2.delta is missing"):
        _read(store, 3)


def test_a_bad_checksum_sidecar_is_refused(tmp_path):
    store = _store(tmp_path, {"1.delta": rec(b"a", b"1") + END})
    store.location.write_bytes("state/0/0/.1.delta.crc", make_crc(b"something else"))
    with pytest.raises(CorruptInput, match="1.delta"):
        _read(store, 1)


def test_write_then_read_back_and_no_stale_crc(tmp_path):
    store = _store(tmp_path, {"1.delta": rec(b"a", b"1") + END})
    rows = [(bytes([i]) * 16, bytes([255 - i]) * 8) for i in range(200)]
    provider = HDFSProvider()
    written = provider.write(store, 1, [_batch(rows)], WriteContext())
    assert sorted(w.rel for w in written) == ["state/0/0/.1.snapshot.crc", "state/0/0/1.snapshot"]
    assert _read(store, 1) == dict(rows)  # snapshot 1 wins over delta 1
    provider.write(store, 1, [_batch(rows[:3])], WriteContext(write_crc=False))
    assert not (tmp_path / "state/0/0/.1.snapshot.crc").exists()
    assert _read(store, 1) == dict(rows[:3])
