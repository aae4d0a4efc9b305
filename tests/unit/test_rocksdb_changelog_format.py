"""RocksDB changelog files: record framing (v1 and v2), the replay chain, and damaged files.

Byte vectors are built by hand from the record layout observed in engine files (documented in
migrate/providers/rocksdb_changelog.py: Java DataOutputStream big-endian ints, ``writeUTF`` header
for v2, one type byte per v2 record); the engine-written fixtures are checked in
test_rocksdb_changelog_rebuild.py.
"""

from __future__ import annotations

import struct

import pytest
from hypothesis import given
from hypothesis import strategies as st

from migrate.errors import CorruptInput, Unsupported
from migrate.providers.rocksdb_changelog import (
    DELETE,
    MERGE,
    PUT,
    Record,
    format_version,
    merge_delimiter,
    parse_changelog,
    render_changelog,
    replay_plan,
)


def be(n: int) -> bytes:
    return struct.pack(">i", n)


def test_v1_vector() -> None:
    data = be(2) + b"k1" + be(3) + b"abc" + be(2) + b"k2" + be(-1) + be(-1)
    assert parse_changelog(data, "f") == (1, [Record(PUT, b"k1", b"abc"), Record(DELETE, b"k2", None)])
    assert render_changelog([Record(PUT, b"k1", b"abc"), Record(DELETE, b"k2", None)]) == data
    assert parse_changelog(be(-1), "f") == (1, [])  # an empty version: only the end marker


def test_v2_vector() -> None:
    data = (b"\x00\x02v2" + b"\x01" + be(1) + b"a" + be(2) + b"xy" + b"\x11" + be(1) + b"a" + be(1) + b"z"
            + b"\x10" + be(1) + b"b" + be(-1) + b"\x00")
    records = [Record(PUT, b"a", b"xy"), Record(MERGE, b"a", b"z"), Record(DELETE, b"b", None)]
    assert parse_changelog(data, "f") == (2, records)
    assert render_changelog(records, 2) == data
    assert parse_changelog(b"\x00\x02v2\x00", "f") == (2, [])


records = st.lists(
    st.one_of(
        st.builds(Record, st.just(PUT), st.binary(max_size=40), st.binary(max_size=40)),
        st.builds(Record, st.just(DELETE), st.binary(max_size=40), st.none()),
        st.builds(Record, st.just(MERGE), st.binary(max_size=40), st.binary(max_size=40)),
    ),
    max_size=20,
)


@given(records)
def test_v2_round_trips(rs: list[Record]) -> None:
    assert parse_changelog(render_changelog(rs, 2), "f") == (2, rs)


@given(records.map(lambda rs: [r for r in rs if r.kind != MERGE]))
def test_v1_round_trips(rs: list[Record]) -> None:
    assert parse_changelog(render_changelog(rs, 1), "f") == (1, rs)


def test_headers_are_told_apart() -> None:
    assert format_version(be(-1)) == 1
    assert format_version(b"\x00\x02v2\x00") == 2
    assert format_version(b"\x00\x02v4" + be(0)) == 4
    assert format_version(be(5) + b"\x00abcd") == 1


@pytest.mark.parametrize(
    "data, message",
    [
        (be(2) + b"k1" + be(3) + b"ab", "value of 3 bytes .* runs past the end"),
        (be(2) + b"k1", "ends inside a value length"),
        (be(2) + b"k1" + be(-7), "bad value length -7"),
        (be(-5), "bad key length -5"),
        (be(-1) + b"xx", "2 unexpected bytes after its end marker"),
        (b"", "ends inside a key length"),
        (b"\x00\x02v2\x01" + be(1) + b"a" + be(1) + b"b", "ends without its end record"),
        (b"\x00\x02v2\x07" + be(1) + b"a", "unknown record type 0x07"),
        (b"\x00\x02v2\x10" + be(1) + b"a" + be(3) + b"abc\x00", "delete record .* has value length 3"),
        (b"\x00\x02v2\x00!", "1 unexpected bytes after its end record"),
    ],
)
def test_damaged_changelogs_are_corrupt(data: bytes, message: str) -> None:
    with pytest.raises(CorruptInput, match=message) as info:
        parse_changelog(data, "state/0/0/4.changelog")
    assert "4.changelog" in str(info.value)


def test_newer_formats_are_unsupported() -> None:
    # v3 (lineage header + v1 records) is read: tests/unit/test_checkpoint_format_2.py
    with pytest.raises(Unsupported, match="changelog format v4"):
        parse_changelog(b"\x00\x02v4" + be(0), "f")
    with pytest.raises(Unsupported, match="v1 has no merge records"):
        render_changelog([Record(MERGE, b"a", b"b")], 1)


def test_replay_plan() -> None:
    assert replay_plan(5, [2, 4], [1, 2, 3, 4, 5], "d") == (4, [5])
    assert replay_plan(4, [2, 4], [1, 2, 3, 4, 5], "d") == (4, [])
    assert replay_plan(3, [], [1, 2, 3], "d") == (None, [1, 2, 3])
    assert replay_plan(7, [5, 9], [6, 7, 8], "d") == (5, [6, 7])  # a newer zip never answers an older version
    with pytest.raises(CorruptInput, match=r"7\.changelog is missing \(gap in the changelog chain after snapshot 5\.zip\)"):
        replay_plan(8, [5], [6, 8], "d")
    with pytest.raises(CorruptInput, match=r"1\.changelog is missing .*no snapshot zip"):
        replay_plan(3, [], [2, 3], "d")


def test_merge_delimiter_follows_the_merge_operator_version() -> None:
    conf = "spark.sql.streaming.stateStore.rocksdb.mergeOperatorVersion"
    assert merge_delimiter({conf: "2"}) == b""
    assert merge_delimiter({conf: "1"}) == b","
    assert merge_delimiter({}) == b","
    with pytest.raises(Unsupported, match="mergeOperatorVersion='3'"):
        merge_delimiter({conf: "3"}, "offsets/4")
