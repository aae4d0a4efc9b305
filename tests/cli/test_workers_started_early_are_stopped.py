"""The workers' fork server starts while the command still plans, only when the pool will be used
(or on the command line's guess, stopped again when the plan shows it will not be), and never
outlives the command: not after a finished run, not after an error before the pool, not after a
usage error."""

from __future__ import annotations

import os
import shutil
from multiprocessing import forkserver
from pathlib import Path
from types import SimpleNamespace

import pytest

from migrate import workers
from migrate.commands import common
from migrate.storage import Entry

from helpers import DEMO, stateshift


def server_pid() -> int | None:
    return forkserver._forkserver._forkserver_pid  # CPython's fork server (3.9+): its process id, None when stopped


def units(count: int, size: int) -> list[SimpleNamespace]:
    return [SimpleNamespace(listing={"1.delta": Entry(name="1.delta", size=size, is_dir=False)}) for _ in range(count)]


@pytest.fixture(autouse=True)
def no_server_left():
    common.stop_workers()
    yield
    common.stop_workers()


def test_the_rule_for_workers():
    big = common.PARALLEL_MIN_BYTES
    assert not common.uses_workers(1, units(100, big))  # one job
    assert not common.uses_workers(2, units(1, big * 4))  # one task
    assert not common.uses_workers(2, units(3, 10))  # small: few partitions, few bytes
    assert common.uses_workers(2, units(common.PARALLEL_MIN_TASKS, 10))  # enough partitions
    assert common.uses_workers(2, units(2, big))  # enough bytes
    assert common.uses_workers(2, [object(), object()])  # size unknown: assume it is worth it
    manifest_files = [SimpleNamespace(bytes=big // 2), SimpleNamespace(bytes=big // 2)]  # archive data file entries
    assert common.uses_workers(2, manifest_files) and not common.uses_workers(2, manifest_files[:1] * 1)


def test_early_start_launches_the_server_only_when_the_pool_will_be_used():
    common.start_workers_early(2, units(3, 10))
    assert server_pid() is None
    common.start_workers_early(2, units(common.PARALLEL_MIN_TASKS, 10))
    assert server_pid() is not None
    common.stop_workers()
    assert server_pid() is None


def test_a_server_started_on_a_guess_is_stopped_when_the_plan_is_small():
    workers.start()
    assert server_pid() is not None
    common.start_workers_early(2, units(3, 10))  # the plan: a small job, run in this process
    assert not workers.running()  # stopping, in a thread
    common.stop_workers()  # the command line's way out waits for it
    assert server_pid() is None


def test_a_pool_right_after_a_stop_soon_gets_a_new_server():
    """``run_tasks`` stops its server in a thread; a second pool made at once must not send its work
    to that server, which is about to exit, but to a new one."""
    from concurrent.futures import ProcessPoolExecutor

    pids = []
    for _ in range(2):
        with ProcessPoolExecutor(1, mp_context=workers.context()) as pool:
            assert pool.submit(os.getpid).result(timeout=120) != os.getpid()
        pids.append(server_pid())
        workers.stop_soon()
        assert not workers.running()
    assert None not in pids and pids[0] != pids[1]
    workers.stop()
    assert server_pid() is None and not workers.running()


def fail_the_first_stop(monkeypatch: pytest.MonkeyPatch, message: str) -> list[int]:
    """Make the first stop of the fork server stop it and then raise OSError(message); the list
    returned counts the stops."""
    real = workers._stop_now
    calls: list[int] = []

    def stop_then_fail() -> None:
        calls.append(1)
        real()
        if len(calls) == 1:
            raise OSError(message)

    monkeypatch.setattr(workers, "_stop_now", stop_then_fail)
    return calls


def test_an_error_met_stopping_in_the_thread_is_raised_by_stop(monkeypatch: pytest.MonkeyPatch):
    workers.start()
    fail_the_first_stop(monkeypatch, "the server could not be reaped")
    workers.stop_soon()  # returns at once; the thread meets the error
    with pytest.raises(OSError, match="could not be reaped"):
        workers.stop()  # the command line's way out: the error is not lost in the thread
    assert server_pid() is None


def _checkpoint(root: Path, partitions: int, size: int = 10) -> Path:
    for p in range(partitions):
        folder = root / "state" / "0" / str(p)
        (folder / "_metadata").mkdir(parents=True)
        (folder / "1.delta").write_bytes(bytes(size))
    (root / "state" / "0" / "_metadata").mkdir(parents=True, exist_ok=True)
    return root


def _archive(root: Path, partitions: int) -> Path:
    from migrate.archive.writer import data_file_rel  # the archive's own layout

    for p in range(partitions):
        path = root / data_file_rel(0, "default", p)
        path.parent.mkdir(parents=True)
        path.write_bytes(bytes(10))
    return root


def test_the_guess_from_the_command_line(tmp_path: Path):
    many = _checkpoint(tmp_path / "many", workers.MIN_TASKS)
    few = _checkpoint(tmp_path / "few", workers.MIN_TASKS - 1)
    heavy = _checkpoint(tmp_path / "heavy", 2, size=workers.MIN_BYTES // 2)
    archive = _archive(tmp_path / "archive", workers.MIN_TASKS)
    small_archive = _archive(tmp_path / "small-archive", workers.MIN_TASKS - 1)
    guess = workers.likely_parallel
    assert guess(["convert", str(many), "out", "--to", "rocksdb", "-j", "2"])
    assert guess(["convert", "--to", "rocksdb", "--jobs=2", str(many), "out"])  # options anywhere
    assert guess(["export", str(heavy), "arch", "-j2"])  # few partitions, many bytes
    assert guess(["import", str(archive), "out", "--to", "hdfs", "--jobs", "2"])
    assert not guess(["import", str(small_archive), "out", "--to", "hdfs", "--jobs", "2"])
    assert guess(["convert", "s3://bucket/cp", "s3://bucket/out", "--to", "rocksdb", "-j", "2"])  # remote: assume large
    assert not guess(["convert", str(few), "out", "--to", "rocksdb", "-j", "2"])
    assert not guess(["convert", str(many), "out", "--to", "rocksdb", "-j", "1"])
    assert not guess(["convert", str(many), "out", "--to", "rocksdb", "-j", "x"])  # argparse refuses it
    assert guess(["convert", str(many), "out", "--to", "rocksdb", "-j", "2", "--dry-run"])  # the plan digests all
    assert not guess(["import", str(archive), "out", "--to", "hdfs", "-j", "2", "--dry-run"])  # reads the manifest only
    assert not guess(["convert", str(many), "--help"])
    assert not guess(["inspect", str(many), "-j", "2"])  # metadata only
    assert guess(["inspect", str(many), "--rows", "-j", "2"])
    assert not guess(["inspect", str(few), "--rows", "-j", "2"])
    assert guess(["verify", str(many), str(few), "-j", "2"])
    assert not guess(["verify", str(many), str(many), "-j", "1"])
    assert not guess([])


def test_a_usage_error_after_a_guessed_start_leaves_no_server(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    from migrate.cli import main

    many = _checkpoint(tmp_path / "many", workers.MIN_TASKS)
    started = []
    real = workers.start
    monkeypatch.setattr(workers, "start", lambda: (real(), started.append(server_pid())))
    with pytest.raises(SystemExit) as info:  # argparse leaves by SystemExit(2)
        main(["convert", str(many), str(tmp_path / "out"), "--to", "rocksdb", "-j", "2", "--no-such-option"])
    assert info.value.code == 2
    assert started and started[0] is not None  # the guess had started the server
    assert server_pid() is None


def test_an_error_before_the_pool_stops_the_early_server(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    monkeypatch.setattr(common, "PARALLEL_MIN_TASKS", 1)  # the two-partition demo now counts as large
    started = []
    real = common.start_workers_early
    monkeypatch.setattr(
        "migrate.commands.convert.start_workers_early",
        lambda jobs, parts: (real(jobs, parts), started.append(server_pid())),
    )
    target = tmp_path / "not-empty"
    target.mkdir()
    (target / "keep.txt").write_text("someone's file")
    r = stateshift("convert", str(DEMO / "greenhouse_totals_hdfs"), str(target), "--to", "rocksdb", "--jobs", "2", "--force")
    assert r.returncode == 6, r.stderr  # refused: target not empty, after the early start
    assert started and started[0] is not None  # the server had been started
    assert server_pid() is None  # and the command stopped it
    assert (target / "keep.txt").read_text() == "someone's file"


def test_a_finished_run_leaves_no_server(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    monkeypatch.setattr(common, "PARALLEL_MIN_TASKS", 1)
    src = tmp_path / "src"
    shutil.copytree(DEMO / "greenhouse_totals_hdfs", src)
    r = stateshift("convert", str(src), str(tmp_path / "dst"), "--to", "rocksdb", "--jobs", "2", "--force")
    assert r.returncode == 0, r.stderr
    assert server_pid() is None



def imported_before(names: list[str]) -> list[str]:
    """Run in a worker: which of ``names`` the worker had imported before this call (its fork
    server's preloads) -- this test module itself is imported to run this, nothing else is."""
    import sys

    return [n for n in names if n in sys.modules]


def test_workers_start_with_the_heavy_modules_imported():
    """A worker is a fork of the server, which imported workers.PRELOAD, so its first partition
    does not import the providers or numpy.ma itself (a worker's first partition took about 0.13
    CPU s against 0.06 for the next ones before they were preloaded)."""
    from concurrent.futures import ProcessPoolExecutor

    wanted = ["migrate.commands.convert", "migrate.providers.hdfs", "migrate.providers.rocksdb", "numpy.ma",
              "pyarrow.compute", "pyarrow.parquet", "rocksdict"]
    assert set(wanted) <= set(workers.PRELOAD) and workers.preload() == workers.PRELOAD
    with ProcessPoolExecutor(1, mp_context=workers.context()) as pool:
        assert pool.submit(imported_before, wanted).result(timeout=120) == wanted


CONVERT_PROBE = """
import os, sys

def run_partition_and_report(task):
    from migrate.commands.common import run_partition

    result = run_partition(task)
    heavy = ("pyarrow.parquet", "migrate.commands.export", "migrate.commands.import_archive")
    name = f"{os.getpid()}-{task.source.operator_id}-{task.source.store_name}-{task.source.partition}"
    with open(os.path.join(os.environ["STATESHIFT_TEST_PROBE_OUT"], name), "w") as f:
        f.write(" ".join(n for n in heavy if n in sys.modules))
    return result
"""


def test_a_converts_workers_never_import_parquet(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    """A convert's fork server skips pyarrow.parquet and the export and import commands
    (workers.COMMAND_PRELOAD): no partition of a convert, in either direction, imports them in
    its worker (a probe module in place of the convert's partition function reports, from each
    worker, what it holds after the partition)."""
    from migrate.cli import main
    from migrate.commands import convert

    assert "pyarrow.parquet" not in workers.COMMAND_PRELOAD["convert"]
    monkeypatch.setattr(common, "PARALLEL_MIN_TASKS", 1)
    probe_dir, out = tmp_path / "probe", tmp_path / "out"
    probe_dir.mkdir()
    out.mkdir()
    (probe_dir / "convert_probe.py").write_text(CONVERT_PROBE)
    monkeypatch.syspath_prepend(str(probe_dir))
    monkeypatch.setenv("STATESHIFT_TEST_PROBE_OUT", str(out))
    import convert_probe

    monkeypatch.setattr(convert, "run_partition", convert_probe.run_partition_and_report)
    src = tmp_path / "src"
    shutil.copytree(DEMO / "greenhouse_totals_hdfs", src)
    assert main(["convert", str(src), str(tmp_path / "rocks"), "--to", "rocksdb", "--jobs", "2"]) == 0
    assert main(["convert", str(tmp_path / "rocks"), str(tmp_path / "back"), "--to", "hdfs", "--jobs", "2"]) == 0
    reports = sorted(out.iterdir())
    assert len(reports) == 4  # two partitions, each direction
    assert all(int(r.name.split("-")[0]) != os.getpid() for r in reports)  # run in workers
    assert [r.read_text() for r in reports] == [""] * 4


def test_the_command_line_reports_a_server_that_did_not_stop_in_one_line(tmp_path: Path, monkeypatch, capsys):
    """After the pool the server stops in a thread; an error met there reaches the command line's
    way out, which names it in one line and keeps the command's own exit code (the target was
    already published: the server holds no state)."""
    from migrate.cli import main

    monkeypatch.setattr(common, "PARALLEL_MIN_TASKS", 1)
    src = tmp_path / "src"
    shutil.copytree(DEMO / "greenhouse_totals_hdfs", src)
    calls = fail_the_first_stop(monkeypatch, "no child process")  # the first stop is the pool's, in the thread
    code = main(["convert", str(src), str(tmp_path / "dst"), "--to", "rocksdb", "--jobs", "2", "--force", "--json"])
    err = capsys.readouterr().err
    assert code == 0, err
    assert len(calls) >= 1  # the pool ran and its server was stopped
    lines = [line for line in err.splitlines() if "fork server" in line]
    assert lines == ["stateshift: warning: the workers' fork server did not stop cleanly: OSError: no child process"]
    assert server_pid() is None
