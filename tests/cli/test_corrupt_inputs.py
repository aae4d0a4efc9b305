"""Corrupt and hostile input: each case gives a one-line error naming the file, a documented exit
code, leaves the source untouched and leaves nothing usable-looking at the target."""

import json
import os
import shutil
import struct

import pytest

from helpers import demo_copy, stateshift, tree_digest

CORRUPT, UNSUPPORTED, UNSAFE = 3, 4, 6


def _part(src, p=0):
    return src / "state" / "0" / str(p)


def _newest(src, suffix, p=0):
    return max(_part(src, p).glob(f"*.{suffix}"), key=lambda f: int(f.name.split(".")[0]))


def _drop_crc(f):
    crc = f.with_name(f".{f.name}.crc")
    if crc.exists():
        crc.unlink()


def truncated_delta(src):
    f = _newest(src, "delta")
    _drop_crc(f)
    f.write_bytes(f.read_bytes()[:-7])
    return f.name


def block_checksum_mismatch(src):
    f = _newest(src, "delta")
    _drop_crc(f)
    data = bytearray(f.read_bytes())
    # lz4-java block header: magic(8) token(1) compressed(4) original(4) checksum(4), little-endian
    (checksum,) = struct.unpack_from("<i", data, 17)
    struct.pack_into("<i", data, 17, checksum ^ 0x1)
    f.write_bytes(bytes(data))
    return "checksum"


def crc_sidecar_mismatch(src):
    f = _newest(src, "delta")
    data = bytearray(f.read_bytes())
    data[-14] ^= 0xFF  # inside the final empty block's zero fields: the sidecar no longer matches
    f.write_bytes(bytes(data))
    return f.name


def gap_in_delta_chain(src):
    f = sorted(_part(src).glob("*.delta"), key=lambda f: int(f.name.split(".")[0]))[1]
    _drop_crc(f)
    f.unlink()
    return f"{f.name} is missing"


def snapshot_newer_than_commit_log(src):
    f = _newest(src, "delta")
    v = int(f.name.split(".")[0])
    shutil.copyfile(f, f.with_name(f"{v + 5}.snapshot"))
    os.utime(f.with_name(f"{v + 5}.snapshot"), (1, 1))
    return f"{v + 5}.snapshot"


def malformed_offsets_json(src):
    f = max((p for p in (src / "offsets").iterdir() if p.name.isdigit()), key=lambda p: int(p.name))
    _drop_crc(f)
    f.write_text(f.read_text().replace('"conf":{', '"conf":{{', 1))
    return f"offsets/{f.name}"


def malformed_commits_json(src):
    f = max((p for p in (src / "commits").iterdir() if p.name.isdigit()), key=lambda p: int(p.name))
    _drop_crc(f)
    f.write_text("v1\n{nextBatchWatermarkMs:0}")
    return f"commits/{f.name}"


def unknown_offsets_log_format(src):
    f = max((p for p in (src / "offsets").iterdir() if p.name.isdigit()), key=lambda p: int(p.name))
    _drop_crc(f)
    f.write_text("v9" + f.read_text()[2:])  # a format from a future engine: not rewritten blindly
    return f"offsets/{f.name}: offsets entry format v9 is not one"


def unknown_commits_log_format(src):
    f = min((p for p in (src / "commits").iterdir() if p.name.isdigit()), key=lambda p: int(p.name))
    _drop_crc(f)
    f.write_text("v3" + f.read_text()[2:])
    return f"commits/{f.name}: commits entry format v3"


def stray_partition_directory(src):
    shutil.copytree(_part(src, 1), _part(src, 5))  # the query has 2 partitions (pinned)
    return "state/0/5: partition directory 5 is outside the 2 partitions"


def unknown_provider_class(src):
    for f in (src / "offsets").iterdir():
        if f.name.isdigit():
            f.write_text(f.read_text().replace("HDFSBackedStateStoreProvider", "TapeDriveStateStoreProvider"))
            _drop_crc(f)
    return "TapeDriveStateStoreProvider"


def not_a_checkpoint(src):
    shutil.rmtree(src)
    (src / "notes").mkdir(parents=True)
    (src / "notes" / "readme.txt").write_text("just some files")
    return "not a streaming checkpoint"


def empty_directory(src):
    shutil.rmtree(src)
    src.mkdir()
    return "empty"


def unreadable_schema_file(src):
    f = _part(src) / "_metadata" / "schema"
    _drop_crc(f)
    f.write_bytes(f.read_bytes()[:40])
    return "_metadata/schema"


def garbage_schema_file(src):
    f = _part(src) / "_metadata" / "schema"
    _drop_crc(f)
    f.write_bytes(b"\x00\x02v2\xff\xff\xff\xffnot a schema")
    return "_metadata/schema"


CASES = [
    (unreadable_schema_file, CORRUPT),
    (garbage_schema_file, CORRUPT),
    (truncated_delta, CORRUPT),
    (block_checksum_mismatch, CORRUPT),
    (crc_sidecar_mismatch, CORRUPT),
    (gap_in_delta_chain, CORRUPT),
    (snapshot_newer_than_commit_log, CORRUPT),
    (malformed_offsets_json, CORRUPT),
    (malformed_commits_json, CORRUPT),
    (unknown_provider_class, UNSUPPORTED),
    (stray_partition_directory, CORRUPT),
    (unknown_offsets_log_format, UNSUPPORTED),
    (unknown_commits_log_format, UNSUPPORTED),
    (not_a_checkpoint, CORRUPT),
    (empty_directory, CORRUPT),
]


@pytest.mark.parametrize("damage, code", CASES, ids=[c[0].__name__ for c in CASES])
def test_bad_source_is_refused_cleanly(tmp_path, damage, code):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    expected = damage(src)
    before = tree_digest(src)
    dst = tmp_path / "out"
    archive = tmp_path / "archive"
    for args in (["convert", str(src), str(dst), "--to", "rocksdb"], ["convert", str(src), str(tmp_path / "plan"), "--to", "rocksdb", "--dry-run"],
                 ["export", str(src), str(archive)]):
        r = stateshift(*args)
        assert r.returncode == code, (r.returncode, r.stderr)
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("stateshift: error: "), r.stderr
        assert expected in lines[0]
        assert str(src) in lines[0] or "stateshift: error: " in lines[0]
        assert "Traceback" not in r.stderr
    assert tree_digest(src) == before
    assert not (archive / "manifest.json").exists()  # an archive without its manifest is refused by import
    # nothing usable at the target: absent, or marked incomplete (metadata is not JSON)
    if (dst / "metadata").exists():
        with pytest.raises(json.JSONDecodeError):
            json.loads((dst / "metadata").read_text())


def test_target_equal_to_or_inside_the_source_is_refused(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    before = tree_digest(src)
    for dst, words in ((src, "the source itself"), (src / "state" / "copy", "inside the source"), (tmp_path, "contains the source")):
        r = stateshift("convert", str(src), str(dst), "--to", "rocksdb", "--overwrite")
        assert r.returncode == UNSAFE and words in r.stderr, r.stderr
    assert tree_digest(src) == before


def test_non_empty_target_needs_overwrite(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    dst = tmp_path / "busy"
    dst.mkdir()
    (dst / "keep.txt").write_text("someone's files")
    r = stateshift("convert", str(src), str(dst), "--to", "rocksdb")
    assert r.returncode == UNSAFE and "--overwrite" in r.stderr
    assert (dst / "keep.txt").read_text() == "someone's files"


def test_an_incomplete_target_is_not_a_valid_source(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    dst = tmp_path / "half"
    r = stateshift("convert", str(src), str(dst), "--to", "hdfs", "-j", "1", env={"STATESHIFT_CRASH_AT": "partition-written:1"})
    assert r.returncode == -9
    again = stateshift("convert", str(dst), str(tmp_path / "x"), "--to", "rocksdb")
    assert again.returncode == CORRUPT and "incomplete stateshift target" in again.stderr


def _newest_zip(src, p=0):
    return max(_part(src, p).glob("*.zip"), key=lambda f: int(f.stem))


def _sst_named_by_newest_zip(src):
    import zipfile

    z = _newest_zip(src)
    meta = zipfile.ZipFile(z).read("metadata").decode().split("\n", 1)[1]
    name = json.loads(meta)["sstFiles"][0]["dfsSstFileName"]
    return _part(src) / "SSTs" / name


def missing_sst(src):
    sst = _sst_named_by_newest_zip(src)
    _drop_crc(sst)
    sst.unlink()
    return sst.name


def sst_size_differs(src):
    sst = _sst_named_by_newest_zip(src)
    _drop_crc(sst)
    sst.write_bytes(sst.read_bytes() + b"\x00" * 9)
    return sst.name


def zip_entry_escapes(src):
    import zipfile

    z = _newest_zip(src)
    _drop_crc(z)
    members = {i.filename: zipfile.ZipFile(z).read(i) for i in zipfile.ZipFile(z).infolist()}
    with zipfile.ZipFile(z, "w") as out:
        for name, data in members.items():
            out.writestr(name, data)
        out.writestr("../../../escaped.txt", b"should never be written")
    return z.name


def zip_entry_absolute(src):
    import zipfile

    z = _newest_zip(src)
    _drop_crc(z)
    with zipfile.ZipFile(z, "a") as out:
        out.writestr("/tmp/stateshift-absolute-escape.txt", b"should never be written")
    return z.name


ROCKS_CASES = [(missing_sst, CORRUPT), (sst_size_differs, CORRUPT), (zip_entry_escapes, CORRUPT), (zip_entry_absolute, CORRUPT)]


@pytest.mark.parametrize("damage, code", ROCKS_CASES, ids=[c[0].__name__ for c in ROCKS_CASES])
def test_bad_rocksdb_source_is_refused_cleanly(tmp_path, damage, code):
    import pathlib

    src = demo_copy("greenhouse_totals_rocksdb", tmp_path / "deep" / "er")
    expected = damage(src)
    before = tree_digest(src)
    dst = tmp_path / "out"
    r = stateshift("convert", str(src), str(dst), "--to", "hdfs")
    assert r.returncode == code, (r.returncode, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and expected in lines[0], r.stderr
    assert tree_digest(src) == before
    assert not list(tmp_path.rglob("escaped.txt"))
    assert not pathlib.Path("/tmp/stateshift-absolute-escape.txt").exists()
    if (dst / "metadata").exists():
        with pytest.raises(json.JSONDecodeError):
            json.loads((dst / "metadata").read_text())


def test_a_target_that_is_a_file_is_refused_as_unsafe(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    dst = tmp_path / "report.txt"
    dst.write_text("someone's file")
    for args in (("convert", str(src), str(dst), "--to", "rocksdb"), ("export", str(src), str(dst)),
                 ("convert", str(src), str(dst), "--to", "rocksdb", "--overwrite", "--dry-run")):
        r = stateshift(*args)
        assert r.returncode == UNSAFE and "is not a directory" in r.stderr, r.stderr
    assert dst.read_text() == "someone's file"


def test_inspect_reports_every_partition_and_exits_3_when_one_cannot_be_rebuilt(tmp_path):
    """A pre-check script gets the full report and an exit code that says a convert would fail."""
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    assert stateshift("inspect", str(src)).returncode == 0
    gap_in_delta_chain(src)
    r = stateshift("inspect", str(src), "--json")
    assert r.returncode == CORRUPT, r.stderr
    parts = {p["partition"]: p for op in json.loads(r.stdout)["operators"] for st in op["stores"] for p in st["partitions"]}
    assert parts[0]["rebuildable"] is False and "is missing" in parts[0]["problem"] and parts[1]["rebuildable"] is True
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "1 store partition(s) cannot be rebuilt" in lines[0] and "partition 0" in lines[0], r.stderr
    assert stateshift("convert", str(src), str(tmp_path / "out"), "--to", "rocksdb").returncode == CORRUPT


def test_a_misspelt_provider_is_a_usage_error_and_an_unknown_class_unsupported(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    typo = stateshift("convert", str(src), str(tmp_path / "a"), "--to", "rocksbd")
    assert typo.returncode == 2 and "not a provider name (hdfs, rocksdb)" in typo.stderr, typo.stderr
    unknown = stateshift("convert", str(src), str(tmp_path / "b"), "--to", "org.example.TapeDriveStateStoreProvider")
    assert unknown.returncode == UNSUPPORTED and "unknown state-store provider" in unknown.stderr, unknown.stderr
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()


def test_with_json_an_error_is_also_a_json_document_on_stdout(tmp_path):
    r = stateshift("convert", str(tmp_path / "nowhere"), str(tmp_path / "out"), "--to", "rocksdb", "--json",
                   "-o", "secret=hunter2-very-secret")
    assert r.returncode == CORRUPT, r.stderr
    doc = json.loads(r.stdout)
    assert doc["command"] == "convert" and doc["error"]["exit_code"] == CORRUPT and doc["error"]["kind"] == "error"
    assert "checkpoint directory does not exist" in doc["error"]["message"]
    assert r.stderr.strip() == f"stateshift: error: {doc['error']['message']}"
    assert "hunter2" not in r.stdout + r.stderr
