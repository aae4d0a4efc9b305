"""The running-query guard: a fresh uncommitted batch or fresh state files beyond the last commit
make convert refuse (exit 7) unless --force; the same signs older than the window are accepted.
Log entries that disappear while the partitions move are refused too, and with --force a source
file that is gone by the time it is copied fails the run (exit 3) instead of being left out."""

import os
import shutil
import time

import pytest

from helpers import demo_copy, stateshift


def _add_uncommitted_batch(src, age_seconds: float):
    offsets = sorted((p for p in (src / "offsets").iterdir() if p.name.isdigit()), key=lambda p: int(p.name))
    newest = offsets[-1]
    nxt = src / "offsets" / str(int(newest.name) + 1)
    shutil.copyfile(newest, nxt)
    stamp = time.time() - age_seconds
    os.utime(nxt, (stamp, stamp))
    return int(nxt.name)


def test_recent_uncommitted_batch_is_refused_unless_forced(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    batch = _add_uncommitted_batch(src, age_seconds=5)
    refused = stateshift("convert", str(src), str(tmp_path / "out"), "--to", "rocksdb")
    assert refused.returncode == 7
    assert f"offsets/{batch} has no commit" in refused.stderr and "--force" in refused.stderr
    assert not (tmp_path / "out").exists()
    forced = stateshift("convert", str(src), str(tmp_path / "out"), "--to", "hdfs", "--force", "--json")
    assert forced.returncode == 0, forced.stderr
    # the trailing uncommitted entry is kept, rewritten, so the engine re-runs that batch
    assert (tmp_path / "out" / "offsets" / str(batch)).exists()
    assert not (tmp_path / "out" / "commits" / str(batch)).exists()


def test_old_uncommitted_batch_is_reported_but_accepted(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    batch = _add_uncommitted_batch(src, age_seconds=3600)
    shown = stateshift("inspect", str(src))
    assert shown.returncode == 0 and "UNCOMMITTED" in shown.stdout and str(batch) in shown.stdout
    done = stateshift("convert", str(src), str(tmp_path / "out"), "--to", "hdfs")
    assert done.returncode == 0, done.stderr
    assert "uncommitted batch" in done.stdout


def test_fresh_state_files_newer_than_the_commit_are_refused(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    _add_uncommitted_batch(src, age_seconds=3600)  # an old in-flight batch explains one more version
    part = src / "state" / "0" / "0"
    newest = max(int(p.name.split(".")[0]) for p in part.glob("*.delta"))
    shutil.copyfile(part / f"{newest}.delta", part / f"{newest + 1}.delta")  # written "now"
    refused = stateshift("convert", str(src), str(tmp_path / "out"), "--to", "hdfs")
    assert refused.returncode == 7 and f"{newest + 1}.delta is newer than the last commit" in refused.stderr


def _removing_while_partitions_move(monkeypatch, folder):
    """Make the convert delete ``folder`` of its source once its partitions are written, before
    the logs and the other files are copied (as a query purging old entries, or a person, might)."""
    import migrate.commands.convert as convert

    real = convert.run_journaled

    def run_then_remove(*args, **kwargs):
        results = real(*args, **kwargs)
        shutil.rmtree(folder)
        return results

    monkeypatch.setattr(convert, "run_journaled", run_then_remove)


def test_log_entries_that_disappear_while_reading_are_refused(tmp_path, monkeypatch):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    _removing_while_partitions_move(monkeypatch, src / "commits")
    refused = stateshift("convert", str(src), str(tmp_path / "out"), "--to", "rocksdb")
    assert refused.returncode == 7, refused.stderr
    assert "commits/0 disappeared while stateshift was reading" in refused.stderr
    assert stateshift("inspect", str(tmp_path / "out")).returncode == 3  # still the placeholder


@pytest.mark.parametrize("folder", ["commits", "sources"])
def test_files_that_disappear_under_force_fail_the_run_instead_of_being_left_out(tmp_path, monkeypatch, folder):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    dst = tmp_path / "out"
    _removing_while_partitions_move(monkeypatch, src / folder)
    failed = stateshift("convert", str(src), str(dst), "--to", "rocksdb", "--force")
    # before: exit 0 and a real metadata file over a checkpoint without those files
    assert failed.returncode == 3 and f"{src}/{folder}/" in failed.stderr and "file is missing" in failed.stderr, failed.stderr
    assert stateshift("inspect", str(dst)).returncode == 3
