"""A RocksDB version read from local disk links its table files into scratch instead of copying
them, and only when the DB is opened read-only: a version rebuilt from changelogs is opened for
writing, so its table files are copied. Either way the checkpoint's files stay as they were, a
damaged table file is still refused, and a location where no link can be made is copied from.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import uuid
from pathlib import Path

import pyarrow as pa
import pytest

from migrate.errors import CorruptInput
from migrate.providers.base import ROW_SCHEMA, ReadContext, StoreDir, WriteContext
from migrate.providers.rocksdb import RocksDBProvider
from migrate.storage import Location, open_location

CHANGELOGS = Path(__file__).resolve().parents[1] / "fixtures" / "rocksdb_more" / "tally_changelog"
ROWS = [(b"key-%05d" % i, b"value-%d" % (i * 7)) for i in range(500)]


def _write(root: str) -> StoreDir:
    store = StoreDir(open_location(root, readonly=False), "state/0/0", 0, 0)
    batch = pa.RecordBatch.from_arrays(
        [pa.array([k for k, _ in ROWS], pa.binary()), pa.array([v for _, v in ROWS], pa.binary())], schema=ROW_SCHEMA
    )
    RocksDBProvider().write(store, 3, [batch], WriteContext())
    return store


def _read(store: StoreDir, version: int = 3, conf: dict[str, str] | None = None) -> list[tuple[bytes, bytes]]:
    out: list[tuple[bytes, bytes]] = []
    for b in RocksDBProvider().read(store, version, ReadContext(conf=conf or {})):
        out += zip(b.column("key").to_pylist(), b.column("value").to_pylist())
    return out


def _digests(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(root.rglob("*")) if p.is_file()}


class _Spy:
    """Counts the links and copies the reader makes, and what each link points at."""

    def __init__(self, monkeypatch: pytest.MonkeyPatch) -> None:
        self.links: list[tuple[str, str, bool]] = []
        self.copies: list[str] = []
        link, get = Location.link_file, Location.get_file

        def spy_link(loc: Location, rel: str, local: str) -> bool:
            made = link(loc, rel, local)
            self.links.append((rel, os.readlink(local) if made else "", made))
            return made

        def spy_get(loc: Location, rel: str, local: str) -> None:
            self.copies.append(rel)
            get(loc, rel, local)

        monkeypatch.setattr(Location, "link_file", spy_link)
        monkeypatch.setattr(Location, "get_file", spy_get)


def test_a_local_read_links_each_table_file_and_leaves_the_checkpoint_as_it_was(tmp_path: Path, monkeypatch) -> None:
    store = _write(str(tmp_path))
    before = _digests(tmp_path)
    ssts = sorted(k for k in before if k.endswith(".sst"))
    assert ssts
    spy = _Spy(monkeypatch)
    assert _read(store) == ROWS
    assert [rel for rel, _, made in spy.links if made] == ssts
    assert all(target == str(tmp_path / rel) for rel, target, _ in spy.links), "a link points at the checkpoint's own file"
    assert not [c for c in spy.copies if c.endswith(".sst")], "no table file is copied when it can be linked"
    assert _digests(tmp_path) == before  # the links are gone with the scratch folder, the files are not
    assert not [p for p in tmp_path.rglob("*") if p.is_symlink()]


def test_a_damaged_table_file_is_refused_through_its_link(tmp_path: Path, monkeypatch) -> None:
    store = _write(str(tmp_path))
    sst = next(tmp_path.rglob("*.sst"))
    data = bytearray(sst.read_bytes())
    data[len(data) // 3] ^= 0xFF  # inside a data block: its checksum no longer matches
    sst.write_bytes(bytes(data))
    spy = _Spy(monkeypatch)
    with pytest.raises(CorruptInput):
        _read(store)
    assert any(made for _, _, made in spy.links), "the damaged file was read through a link, not a copy"


def test_a_version_rebuilt_from_changelogs_copies_its_table_files(tmp_path: Path, monkeypatch) -> None:
    from migrate.checkpoint.model import load_checkpoint

    ckpt = tmp_path / "c"
    shutil.copytree(CHANGELOGS, ckpt)
    part = ckpt / "state" / "0" / "0"
    zips = sorted(int(p.stem) for p in part.glob("*.zip"))
    later = [int(p.stem) for p in part.glob("*.changelog") if int(p.stem) > zips[0] and int(p.stem) not in zips]
    assert later, "the fixture needs a version after a zip held only in changelogs"
    before = _digests(ckpt)
    spy = _Spy(monkeypatch)
    store = StoreDir(open_location(str(ckpt)), "state/0/0", 0, 0)
    rows = _read(store, min(later), load_checkpoint(open_location(str(ckpt))).conf)
    assert rows
    assert not spy.links, "a DB opened for the replay must not write through links into the checkpoint"
    assert any(c.endswith(".sst") for c in spy.copies)
    assert _digests(ckpt) == before


def test_where_no_link_can_be_made_the_table_files_are_copied(tmp_path: Path, monkeypatch) -> None:
    store = _write(str(tmp_path))

    def refuse(src: str, dst: str) -> None:
        raise OSError(1, "Operation not permitted")

    monkeypatch.setattr(os, "symlink", refuse)
    spy = _Spy(monkeypatch)
    assert _read(store) == ROWS
    assert spy.links and not any(made for _, _, made in spy.links)
    assert any(c.endswith(".sst") for c in spy.copies)


def test_a_location_off_local_disk_never_links() -> None:
    url = f"memory://stateshift-links-{uuid.uuid4().hex}"
    try:
        store = _write(url)
        assert not store.location.is_local
        assert store.location.link_file("state/0/0/anything.sst", "/nonexistent/never-created") is False
        assert _read(store) == ROWS
    finally:
        open_location(url, readonly=False).remove("", recursive=True)
