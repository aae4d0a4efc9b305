"""Location on local disk: the same contract as on object stores (see test_storage_s3_requests.py).

Listing returns names with sizes and kinds; an absent directory is empty; writes go through a
temporary name and a rename and leave nothing else behind; removes of missing files are quiet;
a read-only location refuses every write; errors name the file.
"""

from __future__ import annotations

import os

import pytest

from migrate.errors import CorruptInput, StateshiftError
from migrate.storage import open_location


def test_list_dir_names_sizes_kinds_and_absent_directories(tmp_path):
    (tmp_path / "d").mkdir()
    (tmp_path / "d" / "x").write_bytes(b"12345")
    (tmp_path / "f").write_bytes(b"1")
    loc = open_location(str(tmp_path))
    listing = loc.list_dir("")
    assert {n: (e.is_dir, e.size) for n, e in listing.items() if not e.is_dir} == {"f": (False, 1)}
    assert listing["d"].is_dir
    assert loc.list_dir("d")["x"].size == 5
    assert loc.list_dir("d")["x"].mtime is not None
    assert loc.list_dir("missing") == {} and loc.list_dir("f") == {}


def test_write_bytes_replaces_atomically_and_leaves_no_temporary_file(tmp_path):
    loc = open_location(str(tmp_path / "t"), readonly=False)
    loc.write_bytes("a/b/c.bin", b"first")
    loc.write_bytes("a/b/c.bin", b"second")
    assert (tmp_path / "t" / "a" / "b" / "c.bin").read_bytes() == b"second"
    assert sorted(os.listdir(tmp_path / "t" / "a" / "b")) == ["c.bin"]
    assert loc.read_bytes("a/b/c.bin") == b"second"


def test_put_get_remove_and_recursive_remove(tmp_path):
    loc = open_location(str(tmp_path / "t"), readonly=False)
    src = tmp_path / "local.sst"
    src.write_bytes(b"sst" * 100)
    loc.put_file(str(src), "SSTs/1.sst")
    loc.get_file("SSTs/1.sst", str(tmp_path / "back"))
    assert (tmp_path / "back").read_bytes() == src.read_bytes()
    loc.remove("SSTs/never-there.crc")  # quiet
    loc.write_bytes("SSTs/2.sst", b"2")
    loc.remove("SSTs/2.sst")
    assert sorted(loc.list_dir("SSTs")) == ["1.sst"]
    loc.remove("SSTs", recursive=True)
    assert loc.list_dir("") == {}
    loc.remove("SSTs", recursive=True)  # gone already: quiet


def test_missing_files_are_corrupt_input_naming_the_path(tmp_path):
    loc = open_location(str(tmp_path))
    with pytest.raises(CorruptInput, match=f"{tmp_path}/nope: file is missing"):
        loc.read_bytes("nope")
    (tmp_path / "dir").mkdir()
    with pytest.raises(CorruptInput, match="found a directory"):
        loc.read_bytes("dir")
    with pytest.raises(CorruptInput, match="missing"):
        loc.get_file("nope", str(tmp_path / "x"))


def test_a_readonly_location_refuses_every_write(tmp_path):
    (tmp_path / "keep").write_bytes(b"k")
    loc = open_location(str(tmp_path))
    for attempt in (
        lambda: loc.write_bytes("w", b"x"),
        lambda: loc.put_file(str(tmp_path / "keep"), "w"),
        lambda: loc.remove("keep"),
        lambda: loc.remove("", recursive=True),
        lambda: loc.makedirs("d"),
    ):
        with pytest.raises(StateshiftError, match="read-only"):
            attempt()
    assert sorted(os.listdir(tmp_path)) == ["keep"]


def _tree_with_links(root):
    root.mkdir()
    (root / "sub").mkdir()
    (root / "sub" / "inner").write_bytes(b"abc")
    (root / "empty").write_bytes(b"")
    (root / "data.bin").write_bytes(b"x" * 4097)
    (root / ".data.bin.crc").write_bytes(b"crc\x00" + b"\x00" * 8)
    os.symlink(root / "data.bin", root / "link-to-file")
    os.symlink(root / "sub", root / "link-to-dir")
    os.symlink(root / "gone", root / "dangling")
    return root


def test_local_listing_gives_what_fsspec_lists(tmp_path):
    """The local fast path (os.scandir) against fsspec's local ls (the reference): names,
    sizes, kinds and modification times, links and a dangling link included; through a link to
    the directory too; an absent directory and a file list as empty either way."""
    root = _tree_with_links(tmp_path / "t")
    os.symlink(root, tmp_path / "t-link")
    loc = open_location(str(tmp_path))
    assert loc.is_local
    for rel in ("t", "t-link", "t/sub", "missing", "t/data.bin"):
        ours = loc._list_local(rel, loc.path(rel))
        assert ours == loc._list_fs(rel, loc.path(rel)), rel
        assert loc.list_dir(rel) == ours
    listing = loc.list_dir("t")
    assert listing["link-to-file"].size == 4097 and not listing["link-to-file"].is_dir
    assert listing["dangling"].size == 0 and listing["sub"].is_dir
    assert len(listing) == 7


def test_local_listing_and_reading_fail_with_one_line_naming_the_place(tmp_path, monkeypatch):
    (tmp_path / "d").mkdir()
    (tmp_path / "d" / "f").write_bytes(b"1")
    loc = open_location(str(tmp_path))

    def denied(path):
        raise PermissionError(13, "Permission denied", str(path))

    monkeypatch.setattr(os, "scandir", denied)
    with pytest.raises(StateshiftError) as info:
        loc.list_dir("d")
    assert "access denied" in str(info.value) and str(tmp_path / "d") in str(info.value)
    monkeypatch.undo()
    with pytest.raises(CorruptInput, match="expected a file, found a directory"):
        loc.read_bytes("d")
    with pytest.raises(CorruptInput, match="file is missing"):
        loc.read_bytes("d/nothing")
    assert loc.read_bytes("d/f") == b"1"


def test_a_file_url_lists_and_reads_like_the_plain_path(tmp_path):
    """The local fast path sees the filesystem path behind a ``file://`` URL (an unresolved URL
    handed to os.scandir would list as empty, not fail)."""
    root = _tree_with_links(tmp_path / "t")
    plain, url = open_location(str(root)), open_location(f"file://{root}")
    assert url.is_local and url.root == plain.root
    assert url.list_dir("") == plain.list_dir("") and len(url.list_dir("")) == 7
    assert url.read_bytes("sub/inner") == b"abc"


@pytest.mark.parametrize("spelling", ["{d}", "{d}/", "rel/x", "./rel/x/../y", "file://{d}", "file://{d}/", "file://{d}/a/../b", "/"])
def test_a_local_location_has_the_root_and_url_fsspec_gives(tmp_path, monkeypatch, spelling):
    """Opened without fsspec, a local path or absolute ``file://`` URL gets the root and URL that
    fsspec's ``url_to_fs`` (the reference) gives, as the tool shaped them before."""
    import fsspec

    monkeypatch.chdir(tmp_path)
    url = spelling.format(d=tmp_path / "d")
    loc = open_location(url)
    fs, root = fsspec.core.url_to_fs(url)
    root = root.rstrip("/") or "/"
    expected_url = url
    if "://" not in url:
        expected_url, root = os.path.abspath(url), os.path.abspath(root)
    assert (loc.root, loc.url) == (root, expected_url.rstrip("/"))
    assert loc.driver is None and loc.is_local and loc.protocols == tuple(fs.protocol)


def test_local_work_never_imports_fsspec(tmp_path):
    """Everything a worker does on local disk (list, read, stream, probe, write, upload, download,
    link, delete a file and a tree), in a fresh interpreter, leaves fsspec (and the asyncio it
    imports: about 50 ms of every process's start) unimported; the filesystem object is still
    there on demand."""
    import subprocess
    import sys
    import textwrap

    script = textwrap.dedent(
        f"""
        import os, pickle, sys
        from migrate.storage import open_location
        loc = pickle.loads(pickle.dumps(open_location({str(tmp_path / 'loc')!r}, readonly=False)))
        loc.makedirs("a")
        loc.write_bytes("a/f", b"12345")
        assert loc.list_dir("a")["f"].size == 5 and loc.read_bytes("a/f") == b"12345"
        with loc.open_read("a/f") as f:
            assert f.read() == b"12345"
        assert loc.exists("a/f") and not loc.exists("a/g")
        loc.put_file({str(tmp_path / 'src')!r}, "a/up")
        loc.get_file("a/up", {str(tmp_path / 'down')!r})
        assert open({str(tmp_path / 'down')!r}, "rb").read() == b"upload"
        assert loc.link_file("a/f", {str(tmp_path / 'link')!r})
        loc.remove("a/f")
        loc.remove("a/missing")
        loc.remove("a", recursive=True)
        assert not os.path.exists(loc.path("a"))
        assert "fsspec" not in sys.modules and "asyncio" not in sys.modules, "imported"
        assert type(loc.fs).__name__ == "LocalFileSystem" and "fsspec" in sys.modules
        print("ok")
        """
    )
    (tmp_path / "src").write_bytes(b"upload")
    root = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    done = subprocess.run([sys.executable, "-c", script], cwd=root, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0 and done.stdout.strip() == "ok", done.stderr


def test_local_removes_of_links_trees_and_directories(tmp_path):
    """A recursive remove deletes a link, never what it points at; a plain remove of a directory
    is refused in one line; a local path with storage options is opened through fsspec."""
    loc = open_location(str(tmp_path), readonly=False)
    (tmp_path / "kept").mkdir()
    (tmp_path / "kept" / "inside").write_bytes(b"1")
    os.symlink(tmp_path / "kept", tmp_path / "link")
    loc.remove("link", recursive=True)
    assert not os.path.lexists(tmp_path / "link") and (tmp_path / "kept" / "inside").read_bytes() == b"1"
    with pytest.raises(StateshiftError, match="delete this"):
        loc.remove("kept")
    loc.remove("kept", recursive=True)
    assert not (tmp_path / "kept").exists()
    with_options = open_location(str(tmp_path), {"auto_mkdir": True})
    assert with_options.driver is not None and with_options.is_local and with_options.root == str(tmp_path)
