"""A convert killed (SIGKILL) at any point leaves no usable-looking target, and --resume finishes it."""

import json

import pytest

from helpers import demo_copy, stateshift, tree_digest

CRASH_POINTS = [
    "mid-file:1",  # inside the very first file (the placeholder metadata)
    "file-written:2",  # right after the journal was started
    "mid-file:4",  # inside a state file of the first partition
    "partition-written:1",
    "partition-written:2",
    "mid-file:12",
    "before-logs:1",
    "file-written:30",  # while copying verbatim files / rewriting offsets
    "before-metadata:1",
]


@pytest.mark.parametrize("target", ["rocksdb", "hdfs"])
@pytest.mark.parametrize("point", CRASH_POINTS)
def test_killed_convert_is_unusable_then_resumes(tmp_path, point, target):
    name = "greenhouse_totals_hdfs" if target == "rocksdb" else "greenhouse_totals_rocksdb"
    src = demo_copy(name, tmp_path)
    before = tree_digest(src)
    dst = tmp_path / "out"
    crashed = stateshift("convert", str(src), str(dst), "--to", target, "-j", "1", "--force",
                         env={"STATESHIFT_CRASH_AT": point})
    assert crashed.returncode == -9, crashed.stderr  # it really was killed at that point

    # (1) not usable: the engine parses `metadata` as JSON first; ours is a placeholder text
    if (dst / "metadata").exists():
        with pytest.raises(json.JSONDecodeError):
            json.loads((dst / "metadata").read_text())
    shown = stateshift("inspect", str(dst))
    assert shown.returncode != 0
    assert "incomplete stateshift target" in shown.stderr or not (dst / "metadata").exists()

    # (2) --resume finishes the job (and starts it when the run was killed inside its first file)
    resumed = stateshift("convert", str(src), str(dst), "--to", target, "-j", "1", "--force", "--resume")
    assert resumed.returncode == 0, resumed.stderr
    assert not (dst / "_stateshift").exists()
    assert json.loads((dst / "metadata").read_text())["id"]
    same = stateshift("verify", str(src), str(dst))
    assert same.returncode == 0, same.stdout + same.stderr
    assert tree_digest(src) == before


def test_resume_reuses_verified_partitions_and_redoes_tampered_ones(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    dst = tmp_path / "out"
    crashed = stateshift("convert", str(src), str(dst), "--to", "hdfs", "-j", "1", "--force",
                         env={"STATESHIFT_CRASH_AT": "before-logs:1"})
    assert crashed.returncode == -9
    journal = json.loads((dst / "_stateshift/journal.json").read_text())
    assert len(journal["partitions"]) >= 2
    # damage one partition written by the first run: resume must notice (digest) and rewrite it
    snap = sorted(dst.glob("state/0/0/*.snapshot"))[0]
    crc = snap.with_name(f".{snap.name}.crc")
    crc.unlink()
    snap.write_bytes(snap.read_bytes()[:-3])
    resumed = stateshift("convert", str(src), str(dst), "--to", "hdfs", "-j", "1", "--force", "--resume", "--json")
    assert resumed.returncode == 0, resumed.stderr
    report = json.loads(resumed.stdout)
    rewritten = [p for p in report["partitions"] if p["written"]]
    reused = [p for p in report["partitions"] if not p["written"]]
    assert [p["partition"] for p in rewritten] == [0]
    assert reused and all(p["verified"] for p in report["partitions"])
    assert stateshift("verify", str(src), str(dst)).returncode == 0


def test_resume_refuses_a_finished_or_foreign_target(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    other = demo_copy("sensor_pings_dedup_hdfs", tmp_path)
    dst = tmp_path / "out"
    assert stateshift("convert", str(src), str(dst), "--to", "rocksdb", "--force").returncode == 0
    again = stateshift("convert", str(src), str(dst), "--to", "rocksdb", "--force", "--resume")
    assert again.returncode == 6 and "finished checkpoint" in again.stderr
    dst2 = tmp_path / "out2"
    crashed = stateshift("convert", str(src), str(dst2), "--to", "rocksdb", "-j", "1", "--force",
                         env={"STATESHIFT_CRASH_AT": "partition-written:1"})
    assert crashed.returncode == -9
    foreign = stateshift("convert", str(other), str(dst2), "--to", "rocksdb", "--force", "--resume")
    assert foreign.returncode == 6 and f"source {src} then, {other} now" in foreign.stderr, foreign.stderr
    # a directory of something else, without the placeholder metadata, is no run of ours to finish
    unrelated = tmp_path / "unrelated"
    unrelated.mkdir()
    (unrelated / "notes.txt").write_text("keep me")
    refused = stateshift("convert", str(src), str(unrelated), "--to", "rocksdb", "--force", "--resume")
    assert refused.returncode == 6 and "no metadata" in refused.stderr
    assert [p.name for p in unrelated.iterdir()] == ["notes.txt"]


@pytest.mark.parametrize("made", [False, True])
def test_resume_of_a_run_that_wrote_nothing_starts_it(tmp_path, made):
    """A run that failed before its first file (say, the target's file system was read-only)
    leaves nothing to finish; --resume, as its message advised, then does the whole run."""
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    dst = tmp_path / "out"
    if made:
        dst.mkdir()
    resumed = stateshift("convert", str(src), str(dst), "--to", "rocksdb", "--force", "--resume")
    assert resumed.returncode == 0, resumed.stderr
    assert stateshift("verify", str(src), str(dst)).returncode == 0


@pytest.mark.parametrize("point", ["file-written:3", "partition-written:1", "mid-file:6", "before-logs:1", "before-metadata:1"])
def test_killed_import_is_unusable_then_resumes(tmp_path, point):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    archive = tmp_path / "archive"
    assert stateshift("export", str(src), str(archive), "--force").returncode == 0
    dst = tmp_path / "restored"
    crashed = stateshift("import", str(archive), str(dst), "--to", "rocksdb", "-j", "1", "--new-query-id",
                         env={"STATESHIFT_CRASH_AT": point})
    assert crashed.returncode == -9, crashed.stderr
    shown = stateshift("inspect", str(dst))
    assert shown.returncode != 0 and "incomplete stateshift target" in shown.stderr
    resumed = stateshift("import", str(archive), str(dst), "--to", "rocksdb", "-j", "1", "--new-query-id", "--resume")
    assert resumed.returncode == 0, resumed.stderr
    new_id = json.loads((dst / "metadata").read_text())["id"]
    assert new_id != json.loads((src / "metadata").read_text())["id"]
    assert not (dst / "_stateshift").exists()
    assert stateshift("verify", str(src), str(dst)).returncode == 0
