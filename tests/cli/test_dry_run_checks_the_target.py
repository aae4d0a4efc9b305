"""A dry run checks the target as the run would, and says what the run would do with it.

A rehearsal with ``--dry-run`` that passes must not be followed by a run refused for its target:
a non-empty target without ``--overwrite``, or a ``--resume`` into a target another run left,
is refused by the dry run with the run's own error (exit 6). Nothing is written either way.
"""

from __future__ import annotations

import json
import shutil

import pytest
from helpers import DEMO, stateshift, tree_digest

SRC = DEMO / "greenhouse_totals_hdfs"
OTHER = DEMO / "sensor_pings_dedup_hdfs"


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    out = tmp_path_factory.mktemp("dry-run-target") / "archive"
    r = stateshift("export", str(SRC), str(out))
    assert r.returncode == 0, r.stderr
    return out


def _plan(command: str, archive, dst, *extra: str):
    if command == "convert":
        return stateshift("convert", str(SRC), str(dst), "--to", "rocksdb", "--dry-run", "--json", *extra)
    return stateshift("import", str(archive), str(dst), "--to", "rocksdb", "--dry-run", "--json", *extra)


@pytest.mark.parametrize("command", ["convert", "import"])
def test_a_dry_run_refuses_what_the_run_refuses_and_names_what_it_would_do(tmp_path, archive, command):
    absent = tmp_path / "absent"
    r = _plan(command, archive, absent)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["target_action"] == "create" and not absent.exists()

    busy = tmp_path / "busy"
    shutil.copytree(OTHER, busy)  # an old checkpoint: what --overwrite may replace
    before = tree_digest(busy)
    refused = _plan(command, archive, busy)
    assert refused.returncode == 6, refused.stderr
    assert "target is not empty" in refused.stderr and "--overwrite" in refused.stderr
    real = (stateshift("convert", str(SRC), str(busy), "--to", "rocksdb") if command == "convert"
            else stateshift("import", str(archive), str(busy), "--to", "rocksdb"))
    assert real.returncode == 6 and real.stderr == refused.stderr  # the run's own refusal, word for word
    replaced = _plan(command, archive, busy, "--overwrite")
    assert replaced.returncode == 0, replaced.stderr
    assert json.loads(replaced.stdout)["target_action"] == "replace"
    assert tree_digest(busy) == before  # the dry run wrote nothing


def test_a_dry_run_with_resume_checks_the_interrupted_run(tmp_path, archive):
    dst = tmp_path / "interrupted"
    crashed = stateshift("convert", str(SRC), str(dst), "--to", "rocksdb", env={"STATESHIFT_CRASH_AT": "before-logs:1"})
    assert crashed.returncode != 0
    before = tree_digest(dst)
    same = stateshift("convert", str(SRC), str(dst), "--to", "rocksdb", "--dry-run", "--resume")
    assert same.returncode == 0, same.stderr
    assert same.stdout.rstrip().endswith("a run would finish (--resume) the target"), same.stdout
    other = stateshift("convert", str(OTHER), str(dst), "--to", "rocksdb", "--dry-run", "--resume")
    assert other.returncode == 6 and "--resume refused" in other.stderr, other.stderr
    assert f"source {SRC} then, {OTHER} now" in other.stderr, other.stderr  # says what differs
    fmt = stateshift("convert", str(SRC), str(dst), "--to", "rocksdb", "--resume", "--checkpoint-format", "2")
    assert fmt.returncode == 6 and "checkpoint_format 1 then, 2 now" in fmt.stderr, fmt.stderr
    assert "source" not in fmt.stderr.split("differs from this one", 1)[1].split(")", 1)[0], fmt.stderr
    assert tree_digest(dst) == before
    done = stateshift("convert", str(SRC), str(dst), "--to", "rocksdb", "--resume", "--json")
    assert done.returncode == 0, done.stderr
    parts = json.loads(done.stdout)["partitions"]  # the run died after every partition was written
    assert parts and all(p["reused"] and p["verified"] for p in parts), parts
    text = stateshift("verify", str(SRC), str(dst))
    assert text.returncode == 0, text.stderr


@pytest.mark.parametrize("command", ["convert", "import", "export"])
def test_overwrite_deletes_only_what_a_checkpoint_or_archive_holds(tmp_path, archive, command):
    """A mistyped DST with --overwrite must not cost someone's directory: one holding anything no
    checkpoint or archive has is refused (exit 6), by the dry run too, and left as it was."""
    home = tmp_path / "home"
    (home / "photos").mkdir(parents=True)
    (home / "notes.txt").write_text("someone's notes")
    (home / "state").mkdir()  # a name a checkpoint has does not make the rest ours
    before = tree_digest(home)
    runs = {
        "convert": [("convert", str(SRC), str(home), "--to", "rocksdb", "--overwrite"),
                    ("convert", str(SRC), str(home), "--to", "rocksdb", "--overwrite", "--dry-run")],
        "import": [("import", str(archive), str(home), "--to", "rocksdb", "--overwrite"),
                   ("import", str(archive), str(home), "--to", "rocksdb", "--overwrite", "--dry-run")],
        "export": [("export", str(SRC), str(home), "--overwrite")],
    }[command]
    for args in runs:
        r = stateshift(*args)
        assert r.returncode == 6, r.stderr
        assert "--overwrite refused" in r.stderr and "e.g. notes.txt" in r.stderr and "2 entries" in r.stderr, r.stderr
    assert tree_digest(home) == before
