"""When the machine fails a run (a worker process killed, a disk that takes no more bytes), the
command ends with one line naming the file or partition and exit 8, leaves no half-written file
and no scratch folder behind, the target stays unusable, and a rerun finishes the job.

The disk failure is real, not simulated: the command runs under a file size limit
(``RLIMIT_FSIZE``, with ``SIGXFSZ`` ignored, so a write past it fails with ``EFBIG`` as a full
disk fails with ``ENOSPC``; both are the same ``OSError`` path in the tool). The worker death is
the crash point ``worker-task`` (``migrate.faults``): the worker SIGKILLs itself as it starts its
second partition, as the kernel's out-of-memory killer would kill it.
"""

from __future__ import annotations

import json
import os
import resource
import signal
import subprocess
import sys

import pytest

from benchmarks.generate import Params, generate
from helpers import REPO, stateshift, tree_digest

LIMIT = 24 << 10  # bytes a file may grow to under the size limit; every generated partition is larger


@pytest.fixture(scope="module")
def checkpoints(tmp_path_factory):
    """Eight store partitions (enough for the workers) of about 100 KB each, in both layouts."""
    root = tmp_path_factory.mktemp("system-failures")
    out = {}
    for layout in ("hdfs", "rocksdb"):
        generate(Params(keys=16000, partitions=8, shape="narrow", layout=layout, deltas=2, seed=3), root / layout, jobs=1, quiet=True)
        out[layout] = root / layout
    return out


def _run_limited(*args: str, scratch) -> subprocess.CompletedProcess:
    """The command line in a fresh process whose files cannot grow past LIMIT bytes."""

    def limit() -> None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # a write past the limit fails (EFBIG), no signal
        resource.setrlimit(resource.RLIMIT_FSIZE, (LIMIT, LIMIT))

    env = {**os.environ, "STATESHIFT_SCRATCH": str(scratch)}
    env.pop("STATESHIFT_CRASH_AT", None)
    return subprocess.run(
        [sys.executable, "-m", "migrate", *args], capture_output=True, text=True, env=env, cwd=REPO, timeout=300, preexec_fn=limit
    )


def _one_error_line(proc: subprocess.CompletedProcess) -> str:
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("stateshift: error: "), proc.stderr
    assert "internal error" not in proc.stderr and "Traceback" not in proc.stderr, proc.stderr
    return lines[0]


def _assert_unusable(dst) -> None:
    with pytest.raises(json.JSONDecodeError):  # the engine parses `metadata` as JSON first
        json.loads((dst / "metadata").read_text())
    shown = stateshift("inspect", str(dst))
    assert shown.returncode == 3 and "incomplete stateshift target" in shown.stderr, shown.stderr


def _leftovers(*roots) -> list[str]:
    """Temporary files of ours and scratch folders under these directories."""
    found = []
    for root in roots:
        for path in root.rglob("*"):
            if path.name.startswith(".stateshift-") or path.name.startswith("stateshift-"):
                found.append(str(path))
    return found


@pytest.mark.parametrize("source, target", [("hdfs", "rocksdb"), ("rocksdb", "hdfs")])
@pytest.mark.parametrize("jobs", ["1", "2"])
def test_a_file_that_cannot_be_written_stops_the_convert_cleanly(tmp_path, checkpoints, source, target, jobs):
    src = checkpoints[source]
    before = tree_digest(src)
    dst, scratch = tmp_path / "out", tmp_path / "scratch"
    scratch.mkdir()
    failed = _run_limited("convert", str(src), str(dst), "--to", target, "-j", jobs, "--quiet", scratch=scratch)
    assert failed.returncode == 8, failed.stderr
    line = _one_error_line(failed)
    assert "EFBIG" in line or "File too large" in line, line
    named = line[len("stateshift: error: "):].split(": ", 1)[0]
    assert named.startswith((str(dst), str(scratch))), line  # the file (or the version) it could not write
    # the file size limit is named, not a full scratch folder: more room there would not help
    assert "ulimit -f" in line and "STATESHIFT_SCRATCH" not in line, line
    _assert_unusable(dst)
    assert _leftovers(dst, scratch) == []
    assert tree_digest(src) == before

    resumed = stateshift("convert", str(src), str(dst), "--to", target, "-j", jobs, "--resume")
    assert resumed.returncode == 0, resumed.stderr
    assert stateshift("verify", str(src), str(dst)).returncode == 0


@pytest.mark.parametrize("source", ["hdfs", "rocksdb"])  # a RocksDB source is read through scratch folders
def test_an_archive_file_that_cannot_be_written_stops_the_export_cleanly(tmp_path, checkpoints, source):
    src = checkpoints[source]
    archive, scratch = tmp_path / "archive", tmp_path / "scratch"
    scratch.mkdir()
    failed = _run_limited("export", str(src), str(archive), "-j", "2", "--quiet", scratch=scratch)
    assert failed.returncode == 8, failed.stderr
    line = _one_error_line(failed)
    assert f"{archive}/state/operator=0/store=default/partition=" in line and "part-0.parquet: could not write this file" in line, line
    assert "EFBIG" in line and "ulimit -f" in line, line
    assert not (archive / "manifest.json").exists()  # the archive's commit point was never written
    assert _leftovers(archive, scratch) == []
    refused = stateshift("import", str(archive), str(tmp_path / "restored"), "--to", "hdfs")
    assert refused.returncode == 3, refused.stderr

    again = stateshift("export", str(src), str(archive), "--overwrite")
    assert again.returncode == 0, again.stderr


@pytest.mark.parametrize("target", ["rocksdb", "hdfs"])
def test_a_killed_worker_is_named_and_the_run_resumes(tmp_path, checkpoints, target):
    src = checkpoints["hdfs" if target == "rocksdb" else "rocksdb"]
    before = tree_digest(src)
    dst, scratch = tmp_path / "out", tmp_path / "scratch"
    scratch.mkdir()
    crashed = stateshift("convert", str(src), str(dst), "--to", target, "-j", "2", "--quiet",
                         env={"STATESHIFT_CRASH_AT": "worker-task:2", "STATESHIFT_SCRATCH": str(scratch)})
    assert crashed.returncode == 8, crashed.stderr
    line = _one_error_line(crashed)
    assert "a worker process was killed by signal 9 (SIGKILL" in line, line
    assert f"the first not finished: {dst}/state/0/" in line and "--resume" in line, line
    _assert_unusable(dst)
    assert [p for p in _leftovers(scratch)] == []  # the dead workers' scratch folders were removed
    assert tree_digest(src) == before

    resumed = stateshift("convert", str(src), str(dst), "--to", target, "-j", "2", "--resume")
    assert resumed.returncode == 0, resumed.stderr
    assert stateshift("verify", str(src), str(dst)).returncode == 0


def test_a_killed_worker_stops_an_export_without_its_manifest(tmp_path, checkpoints):
    archive, scratch = tmp_path / "archive", tmp_path / "scratch"
    scratch.mkdir()
    crashed = stateshift("export", str(checkpoints["rocksdb"]), str(archive), "-j", "2", "--quiet",
                         env={"STATESHIFT_CRASH_AT": "worker-task:2", "STATESHIFT_SCRATCH": str(scratch)})
    assert crashed.returncode == 8, crashed.stderr
    line = _one_error_line(crashed)
    assert "killed by signal 9" in line and f"{archive}/state/operator=0/" in line, line
    assert not (archive / "manifest.json").exists()
    assert _leftovers(scratch) == []


def _descendants(pid: int) -> set[int]:
    """Every process under ``pid`` (read from /proc: its fork server and the server's workers)."""
    parents: dict[int, int] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat") as f:
                    fields = f.read().rsplit(")", 1)[1].split()
            except OSError:
                continue
            parents[int(entry)] = int(fields[1])
    found, frontier = set(), {pid}
    while frontier:
        frontier = {child for child, parent in parents.items() if parent in frontier} - found
        found |= frontier
    return found


def _alive(pids: set[int]) -> set[int]:
    alive = set()
    for pid in pids:
        try:
            with open(f"/proc/{pid}/stat") as f:
                if f.read().rsplit(")", 1)[1].split()[0] != "Z":  # a zombie has ended
                    alive.add(pid)
        except OSError:
            pass
    return alive


def _wait_for(predicate, timeout: float = 60.0) -> bool:
    import time

    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if predicate():
            return True
        time.sleep(0.05)
    return False


def _start_stalled_convert(src, dst, scratch) -> tuple[subprocess.Popen, set[int]]:
    """A convert whose two workers each stall (sleep) in their first partition; returns the
    process and, once both workers are there, the fork server and the workers."""
    env = {**os.environ, "STATESHIFT_CRASH_AT": "worker-task:1:stall", "STATESHIFT_SCRATCH": str(scratch)}
    proc = subprocess.Popen([sys.executable, "-m", "migrate", "convert", str(src), str(dst), "--to", "rocksdb", "-j", "2", "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, cwd=REPO)
    # the fork server, the resource tracker and two workers under the server
    assert _wait_for(lambda: len(_descendants(proc.pid)) >= 4), proc.pid
    return proc, _descendants(proc.pid)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_sigterm_ends_the_workers_with_the_command(tmp_path, checkpoints):
    dst, scratch = tmp_path / "out", tmp_path / "scratch"
    scratch.mkdir()
    proc, tree = _start_stalled_convert(checkpoints["hdfs"], dst, scratch)
    proc.send_signal(signal.SIGTERM)  # to the command alone, as `kill PID` or a job runner sends it
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 128 + signal.SIGTERM, err
    # one line, nothing before it (a pool thread's traceback was printed before it once)
    assert err.strip().splitlines() == ["stateshift: terminated (SIGTERM); the target (if any) is left marked incomplete"], err
    assert _wait_for(lambda: not _alive(tree), 10), f"left running: {_alive(tree)}"
    _assert_unusable(dst)
    assert _leftovers(scratch) == []  # the workers' scratch folders went with them
    resumed = stateshift("convert", str(checkpoints["hdfs"]), str(dst), "--to", "rocksdb", "-j", "2", "--resume")
    assert resumed.returncode == 0, resumed.stderr
    assert stateshift("verify", str(checkpoints["hdfs"]), str(dst)).returncode == 0


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc; the tie to the command is Linux's")
def test_a_command_killed_outright_takes_its_fork_server_and_workers_with_it(tmp_path, checkpoints):
    dst, scratch = tmp_path / "out", tmp_path / "scratch"
    scratch.mkdir()
    proc, tree = _start_stalled_convert(checkpoints["hdfs"], dst, scratch)
    proc.kill()  # SIGKILL: nothing of the command runs, as when the out-of-memory killer picks it
    proc.communicate(timeout=60)
    # before the tie, the server and its two workers waited for each other for ever
    assert _wait_for(lambda: not _alive(tree), 10), f"left running: {_alive(tree)}"
    _assert_unusable(dst)
    resumed = stateshift("convert", str(checkpoints["hdfs"]), str(dst), "--to", "rocksdb", "-j", "2", "--resume")
    assert resumed.returncode == 0, resumed.stderr


def _run_with_address_space(limit: int, *args: str) -> subprocess.CompletedProcess:
    def cap() -> None:
        resource.setrlimit(resource.RLIMIT_AS, (limit, limit))

    return subprocess.run([sys.executable, "-m", "migrate", *args], capture_output=True, text=True, cwd=REPO,
                          timeout=120, preexec_fn=cap)


def test_an_address_space_limit_too_small_to_run_is_refused_before_anything_starts(tmp_path, checkpoints):
    """Under ``ulimit -v`` of 400 MiB the libraries hung or aborted (observed); the command now
    refuses at once, exit 8, one line saying what to raise, and writes nothing."""
    dst = tmp_path / "out"
    r = _run_with_address_space(400 << 20, "convert", str(checkpoints["hdfs"]), str(dst), "--to", "rocksdb", "-j", "2")
    assert r.returncode == 8, r.stderr
    line = _one_error_line(r)
    assert "400 MiB of address space (ulimit -v)" in line and "at least 1024 MiB" in line, line
    assert not dst.exists()
    ok = _run_with_address_space(1536 << 20, "convert", str(checkpoints["hdfs"]), str(dst), "--to", "rocksdb", "-j", "2")
    assert ok.returncode == 0, ok.stderr
