"""The one-line errors for a machine that fails a run (exit 8), and the files a failed write
must not leave behind."""

from __future__ import annotations

import errno
import os

import pytest

from migrate import scratch
from migrate.commands.common import run_task
from migrate.errors import SystemFailure, library_failure, os_failure
from migrate.storage import open_location


def test_an_os_error_names_its_file_its_meaning_and_its_code():
    failure = os_failure(OSError(errno.ENOSPC, "No space left on device", "/data/out/state/0/1/2.delta"), "write this file")
    assert isinstance(failure, SystemFailure) and failure.exit_code == 8
    assert str(failure) == "/data/out/state/0/1/2.delta: could not write this file: no space left on the device (ENOSPC)"
    # an error without a file name is named by the caller; an errno without a meaning of ours keeps the system's words
    other = os_failure(OSError(errno.ENOTCONN, "Transport endpoint is not connected"), "read this file", "/mnt/x/y")
    assert str(other) == "/mnt/x/y: could not read this file: Transport endpoint is not connected (ENOTCONN)"


def test_a_file_in_a_scratch_folder_gets_the_scratch_hint():
    inside = os_failure(OSError(errno.ENOSPC, "No space left on device", "/dev/shm/stateshift-rocksdb-w-4242-ab_c9/run-0.sst"), "write this file")
    assert str(inside).endswith("; this is a scratch folder: free space there or set STATESHIFT_SCRATCH to a directory with more room")
    # only folders named as scratch.make names them
    for path in ("/data/stateshift-exports/run-0.sst", "/dev/shm/stateshift-rocksdb-w-x-ab/run-0.sst", "/dev/shm/other-rocksdb-w-1-ab/f"):
        assert "STATESHIFT_SCRATCH" not in str(os_failure(OSError(errno.ENOSPC, "x", path), "write this file")), path
    made = scratch.make("stateshift-rocksdb-w-", 0)
    try:
        assert "STATESHIFT_SCRATCH" in str(os_failure(OSError(errno.ENOSPC, "x", os.path.join(made, "f")), "write this file"))
    finally:
        os.rmdir(made)


def test_only_rocksdb_io_errors_of_a_failing_machine_become_system_failures():
    # status texts as rocksdict raises them (RocksDB's Status::ToString: "IO error: " + the call's strerror; observed)
    full = Exception("IO error: No space left on device: While appending to file: /dev/shm/stateshift-rocksdb-w-7-q1/run-0.sst: No space left on device")
    failure = library_failure(full, "write this version's table file", "/t/state/0/3/5.zip")
    assert failure is not None and failure.exit_code == 8
    assert str(failure).startswith("/t/state/0/3/5.zip: could not write this version's table file: RocksDB: IO error: No space left")
    assert "STATESHIFT_SCRATCH" in str(failure)
    for text in ("Corruption: block checksum mismatch: stored = 1, computed = 2 in /t/000008.sst",
                 "IO error: No such file or directory: While opening a file for sequentially reading: /t/MANIFEST-000005",
                 "Invalid argument: Keys must be added in strict ascending order."):
        assert library_failure(Exception(text), "read this version") is None, text


def test_a_local_write_that_fails_leaves_no_temporary_file(tmp_path, monkeypatch):
    loc = open_location(str(tmp_path), readonly=False)
    loc.write_bytes("state/0/0/1.delta", b"kept")

    def full(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "fsync", full)
    with pytest.raises(SystemFailure) as info:
        loc.write_bytes("state/0/0/2.delta", b"x" * 100)
    assert str(info.value) == f"{tmp_path}/state/0/0/2.delta: could not write this file: no space left on the device (ENOSPC)"
    (tmp_path / "local.sst").write_bytes(b"y" * 100)
    with pytest.raises(SystemFailure):
        loc.put_file(str(tmp_path / "local.sst"), "state/0/0/SSTs/000008.sst")
    assert sorted(p.name for p in (tmp_path / "state/0/0").rglob("*")) == ["1.delta", "SSTs"]


def test_a_copy_into_a_full_scratch_names_the_scratch_file(tmp_path, monkeypatch):
    loc = open_location(str(tmp_path), readonly=False)
    loc.write_bytes("state/0/0/SSTs/000008.sst", b"z" * 10)
    local = str(tmp_path / "stateshift-rocksdb-r-77-abc" / "000008.sst")

    def full(src, dst):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr("shutil.copyfile", full)
    with pytest.raises(SystemFailure) as info:
        loc.get_file("state/0/0/SSTs/000008.sst", local)
    text = str(info.value)
    assert text.startswith(f"{local}: could not copy {tmp_path}/state/0/0/SSTs/000008.sst here: no space left on the device (ENOSPC)")
    assert "STATESHIFT_SCRATCH" in text


class _Task:
    where = "/t/state/0/5"


class _ReadTask(_Task):
    from migrate.commands.common import DigestTask

    action = DigestTask.action  # verify, inspect --rows, a dry run


def _message(error: BaseException, task: _Task) -> str:
    """The one-line SystemFailure ``run_task`` makes of ``error`` raised in ``task``."""
    def fails(task):
        raise error

    with pytest.raises(SystemFailure) as info:
        run_task(fails, task)
    return str(info.value)


def test_an_os_error_nobody_expected_is_named_with_its_partition():
    assert _message(OSError(errno.EIO, "Input/output error", "/dev/shm/x/LOG"), _Task()) == \
        "/dev/shm/x/LOG: could not use this file while moving /t/state/0/5: the device reported an input/output error (EIO)"
    assert _message(OSError(errno.ENOSPC, "No space left on device"), _Task()) == \
        "/t/state/0/5: could not move this store partition: no space left on the device (ENOSPC)"
    assert run_task(lambda task: task.where, _Task()) == "/t/state/0/5"


def test_a_read_only_task_says_it_was_reading():
    assert _message(OSError(errno.EIO, "Input/output error", "/dev/shm/x/LOG"), _ReadTask()) == \
        "/dev/shm/x/LOG: could not use this file while reading /t/state/0/5: the device reported an input/output error (EIO)"
    assert _message(OSError(errno.EIO, "Input/output error"), _ReadTask()) == \
        "/t/state/0/5: could not read this store partition: the device reported an input/output error (EIO)"
    assert _message(MemoryError(), _ReadTask()).startswith("/t/state/0/5: ran out of memory reading this store partition")


def test_the_scratch_folders_of_dead_workers_are_removed_and_no_others(tmp_path, monkeypatch):
    monkeypatch.setenv("STATESHIFT_SCRATCH", str(tmp_path))
    dead = tmp_path / "stateshift-rocksdb-w-999999-aa"
    alive = tmp_path / "stateshift-rocksdb-w-999998-bb"
    mine = tmp_path / f"stateshift-rocksdb-w-{os.getpid()}-cc"
    foreign = tmp_path / "unrelated-999999"
    for d in (dead, alive, mine, foreign):
        (d / "db").mkdir(parents=True)
    assert scratch.remove_left_by({999999, os.getpid()}) == [str(dead)]
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(p.name for p in (alive, mine, foreign))
    assert scratch.remove_left_by(set()) == []


def test_running_out_of_memory_is_named_with_its_partition():
    import pyarrow as pa

    for error in (MemoryError(), pa.lib.ArrowMemoryError("malloc of size 1073741824 failed")):
        def exhausts(task, error=error):
            raise error

        with pytest.raises(SystemFailure) as info:
            run_task(exhausts, _Task())
        assert info.value.exit_code == 8
        assert str(info.value).startswith("/t/state/0/5: ran out of memory moving this store partition")
        assert "lower --jobs" in str(info.value)


def test_a_file_size_limit_is_named_as_such_even_in_a_scratch_folder():
    scratch_file = "/dev/shm/stateshift-rocksdb-w-123-ab/db/000009.sst"
    full = os_failure(OSError(errno.ENOSPC, "No space left on device", scratch_file), "write this file")
    assert "STATESHIFT_SCRATCH" in str(full) and "ulimit -f" not in str(full)
    limited = os_failure(OSError(errno.EFBIG, "File too large", scratch_file), "write this file")
    assert str(limited).endswith("(EFBIG); a file size limit is set for this process (ulimit -f): raise it or remove it")
    rocks = library_failure(Exception(f"IO error: While appending to file: {scratch_file}: File too large"), "build", "/t/state/0/1")
    assert rocks is not None and "ulimit -f" in str(rocks) and "STATESHIFT_SCRATCH" not in str(rocks)
