"""Where scratch folders go: the user's choice first, tmpfs only with room to spare, disk otherwise;
a RocksDB build that spans several sorted runs never goes to tmpfs; nothing is left behind."""

import os
import tempfile
from pathlib import Path

import pyarrow as pa
import pytest

from migrate import scratch
from migrate.providers.base import ROW_SCHEMA, ReadContext, StoreDir, WriteContext
from migrate.providers.rocksdb import RocksDBProvider
from migrate.providers.rocksdb_db import ScratchFolder, db_options, sorted_runs
from migrate.storage import open_location

GIB = 1 << 30


@pytest.fixture
def clean_env(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> Path:
    """No user choice in the environment; ``tempfile``'s cached directory reset to a known one."""
    monkeypatch.delenv(scratch.ENV, raising=False)
    monkeypatch.delenv("TMPDIR", raising=False)
    system_tmp = tmp_path / "system-tmp"
    system_tmp.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(system_tmp))
    return system_tmp


def fake_machine(monkeypatch: pytest.MonkeyPatch, tmp_path: Path, *, fs: str, free: int, available: int) -> Path:
    """A stand-in for /dev/shm with the given mount type, free space and available memory."""
    shm = tmp_path / "shm"
    shm.mkdir()
    mounts = tmp_path / "mounts"
    mounts.write_text(f"proc /proc proc rw 0 0\nshm {shm} {fs} rw,nosuid,nodev 0 0\n")
    meminfo = tmp_path / "meminfo"
    meminfo.write_text(f"MemTotal:       25000000 kB\nMemFree:        1000 kB\nMemAvailable:   {available // 1024} kB\n")
    monkeypatch.setattr(scratch, "SHM", str(shm))
    real_is_tmpfs, real_mem = scratch._is_tmpfs, scratch._mem_available
    monkeypatch.setattr(scratch, "_is_tmpfs", lambda path, mounts_file=str(mounts): real_is_tmpfs(path, mounts_file))
    monkeypatch.setattr(scratch, "_mem_available", lambda meminfo_file=str(meminfo): real_mem(meminfo_file))

    class FakeStat:
        f_bavail = free // 4096
        f_frsize = 4096

    real_statvfs = os.statvfs
    monkeypatch.setattr(os, "statvfs", lambda p: FakeStat() if str(p) == str(shm) else real_statvfs(p))
    return shm


def test_the_users_directory_wins(clean_env, monkeypatch, tmp_path):
    mine = tmp_path / "mine"
    mine.mkdir()
    monkeypatch.setenv(scratch.ENV, str(mine))
    fake_machine(monkeypatch, tmp_path, fs="tmpfs", free=20 * GIB, available=20 * GIB)
    assert scratch.directory(10) == str(mine)
    folder = scratch.make("x-", 10)
    assert Path(folder).parent == mine


def test_tmpdir_set_by_the_user_is_kept(clean_env, monkeypatch, tmp_path):
    monkeypatch.setenv("TMPDIR", str(clean_env))
    fake_machine(monkeypatch, tmp_path, fs="tmpfs", free=20 * GIB, available=20 * GIB)
    assert scratch.directory(10) == str(clean_env)


def test_tmpfs_with_room_is_chosen(clean_env, monkeypatch, tmp_path):
    shm = fake_machine(monkeypatch, tmp_path, fs="tmpfs", free=20 * GIB, available=20 * GIB)
    assert scratch.directory(1 * GIB) == str(shm)


@pytest.mark.parametrize(
    "fs, free, available, need",
    [
        ("ext4", 20 * GIB, 20 * GIB, 10),  # not a tmpfs
        ("tmpfs", 3 * GIB, 20 * GIB, 2 * GIB),  # the tmpfs would keep less than the reserve
        ("tmpfs", 20 * GIB, 3 * GIB, 2 * GIB),  # the machine would keep less than the reserve
        ("tmpfs", 20 * GIB, 20 * GIB, None),  # size unknown
    ],
)
def test_disk_otherwise(clean_env, monkeypatch, tmp_path, fs, free, available, need):
    fake_machine(monkeypatch, tmp_path, fs=fs, free=free, available=available)
    assert scratch.directory(need) == str(clean_env)


def test_unreadable_proc_files_mean_disk(clean_env, monkeypatch, tmp_path):
    assert scratch._is_tmpfs("/anything", str(tmp_path / "no-mounts")) is False
    assert scratch._mem_available(str(tmp_path / "no-meminfo")) == 0


def batches(rows: int, width: int = 40, per_batch: int = 100):
    for start in range(0, rows, per_batch):
        keys = [b"k%09d" % i + b"\x00" * width for i in range(start, min(rows, start + per_batch))]
        values = [b"v" * width for _ in keys]
        yield pa.RecordBatch.from_arrays([pa.array(keys, pa.binary()), pa.array(values, pa.binary())], schema=ROW_SCHEMA)


def test_a_build_of_several_runs_is_never_placed_by_size(tmp_path):
    calls = []

    def folder(need, whole):
        calls.append((need, whole))
        return str(tmp_path)

    encode = lambda b: (b.column("key"), b.column("value"))
    runs, rows = sorted_runs(batches(2000), encode, db_options({}, "x"), folder, 4096, "x")
    assert rows == 2000 and len(runs) > 1
    assert calls[0][1] is False  # the first run did not hold everything: size unknown
    calls.clear()
    runs, rows = sorted_runs(batches(10), encode, db_options({}, "x"), folder, 1 << 30, "x")
    assert len(runs) == 1 and calls == [(calls[0][0], True)] and calls[0][0] > 0


def test_scratch_folder_is_created_once_and_removed(clean_env):
    f = ScratchFolder("stateshift-test-")
    assert f.path is None
    first = f.path_for(10, False)
    assert f.path_for(10 * GIB, True) == first and os.path.isdir(first)
    f.remove()
    assert not os.path.exists(first)
    ScratchFolder("unused-").remove()  # never created: nothing to do


def test_rocksdb_write_and_read_leave_no_scratch_behind(monkeypatch, tmp_path):
    mine = tmp_path / "scratch"
    mine.mkdir()
    monkeypatch.setenv(scratch.ENV, str(mine))
    store = StoreDir(open_location(str(tmp_path / "target"), readonly=False), "state/0/0", 0, 0)
    provider = RocksDBProvider()
    provider.write(store, 3, batches(500), WriteContext())
    assert os.listdir(mine) == []
    assert sum(b.num_rows for b in provider.read(store, 3, ReadContext())) == 500
    assert os.listdir(mine) == []


def test_a_missing_directory_of_the_users_is_a_usage_error(clean_env, monkeypatch, tmp_path):
    from migrate.errors import UsageError

    monkeypatch.setenv(scratch.ENV, str(tmp_path / "no-such-folder"))
    with pytest.raises(UsageError, match="STATESHIFT_SCRATCH=.*no-such-folder is not an existing directory"):
        scratch.directory(10)


def test_the_last_mount_of_a_path_is_the_one_in_effect(tmp_path):
    mounts = tmp_path / "mounts"
    mounts.write_text("tmpfs /dev/shm tmpfs rw 0 0\n/dev/vdb /dev/shm ext4 rw 0 0\n")
    assert scratch._is_tmpfs("/dev/shm", str(mounts)) is False
    mounts.write_text("/dev/vdb /dev/shm ext4 rw 0 0\ntmpfs /dev/shm tmpfs rw 0 0\n")
    assert scratch._is_tmpfs("/dev/shm", str(mounts)) is True


# --- folders of killed runs ----------------------------------------------------------------------


def dead_pid() -> int:
    """The id of a process that has exited (and been waited for)."""
    import subprocess
    import sys

    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def test_make_names_the_folder_with_this_process(clean_env):
    folder = Path(scratch.make("stateshift-rocksdb-w-", None))
    assert folder.parent == clean_env
    assert folder.name.startswith(f"stateshift-rocksdb-w-{os.getpid()}-")
    assert scratch._OURS.match(folder.name).group(1) == str(os.getpid())


def test_sweep_removes_only_old_folders_of_dead_processes(clean_env, monkeypatch, tmp_path):
    shm = tmp_path / "shm"
    shm.mkdir()
    monkeypatch.setattr(scratch, "SHM", str(shm))
    now = 1_000_000_000.0
    old = now - scratch.STALE_AFTER - 1
    dead = dead_pid()

    def folder(place: Path, name: str, mtime: float) -> Path:
        path = place / name
        path.mkdir()
        (path / "db").mkdir()
        (path / "db" / "000008.sst").write_bytes(b"x" * 100)
        os.utime(path, (mtime, mtime))
        return path

    gone = [folder(shm, f"stateshift-rocksdb-w-{dead}-abc_12", old), folder(clean_env, f"stateshift-rocksdb-r-{dead}-q9", old)]
    kept = [
        folder(shm, f"stateshift-rocksdb-w-{dead}-young", now - 5),  # not old enough
        folder(shm, f"stateshift-rocksdb-w-{os.getppid()}-alive", old),  # its process runs
        folder(shm, f"stateshift-rocksdb-w-{os.getpid()}-mine", old),  # this process
        folder(shm, "stateshift-rocksdb-w-nopid", old),  # not named by make()
        folder(shm, f"stateshift-rocksdb-w-{10**30}-huge", old),  # no process can have that id
        folder(shm, f"otherapp-{dead}-abc", old),  # not ours
    ]
    target = folder(tmp_path, "elsewhere", old)
    (shm / f"stateshift-rocksdb-w-{dead}-link").symlink_to(target)
    (shm / f"stateshift-rocksdb-w-{dead}-file").write_bytes(b"")
    os.utime(shm / f"stateshift-rocksdb-w-{dead}-file", (old, old))

    removed = scratch.sweep(now=now)
    assert sorted(removed) == sorted(str(p) for p in gone)
    assert not any(p.exists() for p in gone)
    assert all(p.exists() for p in kept)
    assert (target / "db" / "000008.sst").exists()  # a link is never followed
    assert (shm / f"stateshift-rocksdb-w-{dead}-file").exists()


def test_sweep_ignores_places_that_do_not_exist(clean_env, monkeypatch, tmp_path):
    monkeypatch.setattr(scratch, "SHM", str(tmp_path / "no-shm"))
    monkeypatch.setenv(scratch.ENV, str(tmp_path / "no-such"))
    assert scratch.sweep() == []
