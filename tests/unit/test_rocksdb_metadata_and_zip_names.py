"""The version zip's ``metadata`` member parses strictly, renders like the engine's, and zip
member names that could escape the working folder are refused."""

from __future__ import annotations

import io
import zipfile
from pathlib import Path

import pytest

from migrate.errors import CorruptInput, Unsupported
from migrate.providers.rocksdb_meta import (
    SharedFile,
    VersionMetadata,
    parse_metadata,
    render_metadata,
    unzip_members,
)

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "rocksdb"
GOOD = (
    b'v1\n{"sstFiles":[{"localFileName":"000008.sst","dfsSstFileName":"000008-aa.sst","sizeBytes":12}],'
    b'"numKeys":2,"numInternalKeys":0,"columnFamilyMapping":{},"columnFamilyTypeMap":{},"maxColumnFamilyId":0}'
)


def _zip(members: dict[str, bytes]) -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        for name, data in members.items():
            z.writestr(zipfile.ZipInfo(name), data)
    return buf.getvalue()


def test_engine_metadata_round_trips_byte_for_byte() -> None:
    with zipfile.ZipFile(FIXTURES / "agg_p0" / "3.zip") as z:
        engine = z.read("metadata")
    meta = parse_metadata(engine, "3.zip")
    assert meta.num_keys == 2 and len(meta.sst_files) == 3 and meta.log_files == ()
    assert render_metadata(meta) == engine


def test_empty_partition_metadata_renders_like_the_engine() -> None:
    with zipfile.ZipFile(FIXTURES / "empty_p0" / "3.zip") as z:
        engine = z.read("metadata")
    assert render_metadata(VersionMetadata(sst_files=(), num_keys=0)) == engine


def test_log_files_field_is_parsed_and_rendered() -> None:
    text = GOOD.replace(
        b'"numKeys"', b'"logFiles":[{"localFileName":"000004.log","dfsLogFileName":"000004-bb.log","sizeBytes":0}],"numKeys"'
    )
    meta = parse_metadata(text, "z")
    assert meta.log_files == (SharedFile("000004.log", "000004-bb.log", 0),)
    assert parse_metadata(render_metadata(meta), "z") == meta


@pytest.mark.parametrize(
    "data, message",
    [
        (b"v1", "no version line"),
        (b"xx\n{}", "expected 'v1'"),
        (b"v1\n{not json", "does not parse"),
        (b"v1\n[1]", "not an object"),
        (b"v1\n{\"numKeys\":1}", "no 'sstFiles'"),
        (GOOD.replace(b'"numKeys":2', b'"numKeys":-2'), "numKeys"),
        (GOOD.replace(b'"sizeBytes":12', b'"sizeBytes":"12"'), "sizeBytes"),
        (GOOD.replace(b'"000008.sst"', b'"../000008.sst"'), "not a plain file name"),
        (GOOD.replace(b'"000008-aa.sst"', b'"/etc/000008-aa.sst"'), "not a plain file name"),
        (GOOD.replace(b'"000008.sst"', b'"MANIFEST-000005"'), "not a RocksDB file name"),
        (GOOD.replace(b'"sstFiles":[', b'"sstFiles":[{"localFileName":"000008.sst","dfsSstFileName":"x.sst","sizeBytes":1},'), "twice"),
        (b"\xff\xfe", "not UTF-8"),
    ],
)
def test_bad_metadata_is_corrupt_input(data: bytes, message: str) -> None:
    with pytest.raises(CorruptInput, match=message) as info:
        parse_metadata(data, "state/0/1/3.zip")
    assert "state/0/1/3.zip" in str(info.value)


def test_newer_metadata_format_is_unsupported() -> None:
    with pytest.raises(Unsupported, match="v2"):
        parse_metadata(GOOD.replace(b"v1\n", b"v2\n"), "3.zip")


@pytest.mark.parametrize("name", ["../CURRENT", "/tmp/CURRENT", "sub/CURRENT", "..", "C:CURRENT", "a\\..\\CURRENT"])
def test_zip_members_that_could_escape_are_refused(name: str) -> None:
    with pytest.raises(CorruptInput, match="not a plain file name"):
        unzip_members(_zip({"CURRENT": b"MANIFEST-000005\n", name: b"x"}), "3.zip")


def test_unexpected_and_duplicate_members_are_refused() -> None:
    with pytest.raises(CorruptInput, match="unexpected zip member"):
        unzip_members(_zip({"CURRENT": b"", "000008.sst": b""}), "3.zip")
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        z.writestr("CURRENT", b"a")
        with pytest.warns(UserWarning, match="Duplicate name"):
            z.writestr("CURRENT", b"b")
    with pytest.raises(CorruptInput, match="twice"):
        unzip_members(buf.getvalue(), "3.zip")


def test_not_a_zip_is_corrupt_input() -> None:
    with pytest.raises(CorruptInput, match="not a zip"):
        unzip_members(b"PK\x03\x04 definitely not a zip", "3.zip")
