"""A damaged or edited archive is refused before anything is written: one-line error naming the
file, non-zero exit, nothing usable at DST (absent, or marked incomplete)."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest
from helpers import demo_copy, stateshift, tree_digest

CORRUPT, VERIFICATION = 3, 5


def _data_file(archive: Path) -> Path:
    return min((archive / "state").rglob("*.parquet"))


def flip_byte_in_data_file(archive: Path) -> str:
    f = _data_file(archive)
    data = bytearray(f.read_bytes())
    data[len(data) // 2] ^= 0x01
    f.write_bytes(bytes(data))
    return str(f.relative_to(archive))


def truncate_data_file(archive: Path) -> str:
    f = _data_file(archive)
    f.write_bytes(f.read_bytes()[:-9])
    return str(f.relative_to(archive))


def delete_data_file(archive: Path) -> str:
    f = _data_file(archive)
    f.unlink()
    return str(f.relative_to(archive))


def flip_byte_in_kept_offsets(archive: Path) -> str:
    f = archive / "checkpoint" / "offsets" / "0"
    data = bytearray(f.read_bytes())
    data[-3] ^= 0x01  # same size: only the SHA-256 can tell
    f.write_bytes(bytes(data))
    return "checkpoint/offsets/0"


def edit_manifest_rows(archive: Path) -> str:
    m = archive / "manifest.json"
    body = json.loads(m.read_text())
    body["data_files"][0]["rows"] += 1
    body["data_files"][0]["state_digest"]["rows"] += 1
    m.write_text(json.dumps(body, indent=2))
    return "manifest.json"


def edit_manifest_provider(archive: Path) -> str:
    m = archive / "manifest.json"
    m.write_text(m.read_text().replace("HDFSBackedStateStoreProvider", "RocksDBStateStoreProvider"))
    return "manifest.json"


def truncate_manifest(archive: Path) -> str:
    m = archive / "manifest.json"
    m.write_bytes(m.read_bytes()[:200])
    return "manifest.json"


def delete_manifest(archive: Path) -> str:
    (archive / "manifest.json").unlink()
    return "no manifest.json"


def add_unlisted_data_file(archive: Path) -> str:
    f = _data_file(archive)
    extra = f.parent.parent / "partition=9" / "part-0.parquet"
    extra.parent.mkdir()
    extra.write_bytes(f.read_bytes())
    return str(extra.relative_to(archive))


CASES = [
    flip_byte_in_data_file, truncate_data_file, delete_data_file, flip_byte_in_kept_offsets,
    edit_manifest_rows, edit_manifest_provider, truncate_manifest, delete_manifest, add_unlisted_data_file,
]


@pytest.fixture(scope="module")
def pristine(tmp_path_factory) -> Path:
    tmp = tmp_path_factory.mktemp("tamper")
    src = demo_copy("greenhouse_totals_hdfs", tmp)
    archive = tmp / "archive"
    proc = stateshift("export", str(src), str(archive), "-j", "1")
    assert proc.returncode == 0, proc.stderr
    return archive


def _nothing_usable(dst: Path) -> None:
    if not dst.exists():
        return
    meta = dst / "metadata"
    assert meta.exists(), f"{dst} exists without a metadata file"
    with pytest.raises(json.JSONDecodeError):
        json.loads(meta.read_text())  # the incomplete marker, which the engine refuses


@pytest.mark.parametrize("damage", CASES, ids=[c.__name__ for c in CASES])
def test_tampered_archive_is_refused(tmp_path, pristine, damage):
    import shutil

    archive = tmp_path / "archive"
    shutil.copytree(pristine, archive)
    named = damage(archive)
    before = tree_digest(archive)
    dst = tmp_path / "restored"
    for extra in ([], ["--dry-run"]):
        proc = stateshift("import", str(archive), str(dst), "--to", "rocksdb", "-j", "1", *extra)
        assert proc.returncode == CORRUPT, (proc.returncode, proc.stdout, proc.stderr)
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("stateshift: error: "), proc.stderr
        assert named in lines[0], lines[0]
        assert "Traceback" not in proc.stderr
        assert not dst.exists(), "a refused archive left files at DST"
    assert tree_digest(archive) == before, "import wrote to the archive"


def test_a_sealed_manifest_with_a_wrong_digest_fails_verification_and_stays_incomplete(tmp_path, pristine):
    """Someone rewrote the manifest and resealed it: the files check out, but the rows read from
    the Parquet file do not match the recorded state digest, so DST is never published."""
    import hashlib
    import shutil

    archive = tmp_path / "archive"
    shutil.copytree(pristine, archive)
    m = archive / "manifest.json"
    body = json.loads(m.read_text())
    target = max(body["data_files"], key=lambda d: d["rows"])
    h = target["state_digest"]["hash"]
    target["state_digest"]["hash"] = ("0" if h[0] != "0" else "1") + h[1:]
    body.pop("manifest_sha256")
    body["manifest_sha256"] = hashlib.sha256(
        json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
    ).hexdigest()
    m.write_text(json.dumps(body, indent=2))

    dst = tmp_path / "restored"
    proc = stateshift("import", str(archive), str(dst), "--to", "hdfs", "-j", "1")
    assert proc.returncode == VERIFICATION, proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "does not match the archive" in proc.stderr
    # the rows read from the Parquet file are digested once the target does not match: they and
    # the target agree with each other, so the manifest's digest is the odd one out
    found = re.search(r"archive (\d+) rows (\w+), read (\d+) rows (\w+), written (\d+) rows (\w+)\)", proc.stderr)
    assert found, proc.stderr
    assert found[2] == ("0" if h[0] != "0" else "1") + h[1:]
    assert found[3] == found[5] == str(target["rows"]) and found[4] == found[6] == h
    _nothing_usable(dst)
    assert dst.exists() and not (dst / "commits").exists() and not (dst / "offsets").exists()


def test_a_write_that_loses_a_row_is_caught_and_the_read_is_shown_to_be_right(tmp_path, pristine, monkeypatch):
    """The archive is sound but the target loses a row as it is written: the read-back does not
    match, and the message shows the Parquet read matching the archive, so the write is to blame."""
    import shutil

    from migrate.providers.hdfs import HDFSProvider

    real_write = HDFSProvider.write

    def lossy_write(self, store, version, batches, ctx):
        def drop_first_row(it):
            first = True
            for b in it:
                if first and b.num_rows:
                    b, first = b.slice(1), False
                yield b

        return real_write(self, store, version, drop_first_row(batches), ctx)

    monkeypatch.setattr(HDFSProvider, "write", lossy_write)
    archive = tmp_path / "archive"
    shutil.copytree(pristine, archive)
    dst = tmp_path / "restored"
    proc = stateshift("import", str(archive), str(dst), "--to", "hdfs", "-j", "1")
    assert proc.returncode == VERIFICATION, proc.stderr
    found = re.search(r"archive (\d+) rows (\w+), read (\d+) rows (\w+), written (\d+) rows (\w+)\)", proc.stderr)
    assert found, proc.stderr
    assert found[1] == found[3] and found[2] == found[4], "the Parquet read should match the archive"
    assert int(found[5]) == int(found[1]) - 1 and found[6] != found[2]
    _nothing_usable(dst)


def test_a_sealed_archive_holding_an_unreadable_schema_file_is_refused_before_writing(tmp_path, pristine):
    """An archive whose manifest was sealed over a damaged schema file (as an older export could
    write it: export now refuses such a source) passes the file check; the import parses every
    archived schema file, as convert does, and refuses before writing."""
    import hashlib
    import shutil

    from migrate.archive.manifest import seal

    archive = tmp_path / "archive"
    shutil.copytree(pristine, archive)
    rel = "checkpoint/state/0/0/_metadata/schema"
    damaged = (archive / rel).read_bytes()[:40]
    (archive / rel).write_bytes(damaged)
    m = archive / "manifest.json"
    body = json.loads(m.read_text())
    entry = next(f for f in body["checkpoint_files"] if f["path"] == rel)
    entry.update(bytes=len(damaged), sha256=hashlib.sha256(damaged).hexdigest())
    body.pop("manifest_sha256")
    body["manifest_sha256"] = seal(body)
    m.write_text(json.dumps(body, indent=2))

    for extra in ((), ("--dry-run",)):
        dst = tmp_path / f"restored{len(extra)}"
        proc = stateshift("import", str(archive), str(dst), "--to", "rocksdb", *extra)
        assert proc.returncode == CORRUPT, proc.stderr
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1 and rel in lines[0] and "Traceback" not in proc.stderr, proc.stderr
        assert not dst.exists()
