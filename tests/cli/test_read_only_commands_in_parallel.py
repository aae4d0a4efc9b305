"""``verify``, ``inspect --rows`` and ``convert --dry-run`` read every store partition; with
``--jobs`` they read them in worker processes like a convert, and say the same as with one job.

The proof that the workers did the reading is the crash point ``worker-task``
(``migrate.faults``): it SIGKILLs a worker as it starts its second partition, which only a
command that reads in workers can meet; the command then ends with exit 8, naming the partition,
without the convert's advice to resume.
"""

from __future__ import annotations

import json
import shutil

import pytest

from benchmarks.generate import Params, generate
from helpers import stateshift, tree_digest


@pytest.fixture(scope="module")
def checkpoints(tmp_path_factory):
    """Eight store partitions (enough for the workers) in both layouts, the same rows in both,
    and a heap-map checkpoint of other rows."""
    root = tmp_path_factory.mktemp("read-only-parallel")
    out = {}
    for name, layout, seed in (("hdfs", "hdfs", 5), ("rocksdb", "rocksdb", 5), ("other", "hdfs", 6)):
        generate(Params(keys=12000, partitions=8, shape="narrow", layout=layout, deltas=2, seed=seed), root / name, jobs=1, quiet=True)
        out[name] = root / name
    return out


def _json(*args: str, env: dict[str, str] | None = None, code: int = 0) -> dict:
    r = stateshift(*args, "--json", env=env)
    assert r.returncode == code, r.stderr
    return json.loads(r.stdout)


@pytest.mark.parametrize("layout", ["hdfs", "rocksdb"])
def test_inspect_rows_and_the_dry_run_say_the_same_with_two_jobs(tmp_path, checkpoints, layout):
    src = checkpoints[layout]
    before = tree_digest(src)
    one, two = (_json("inspect", str(src), "--rows", "-j", j) for j in ("1", "2"))
    assert one == two
    parts = [p for op in one["operators"] for st in op["stores"] for p in st["partitions"]]
    assert len(parts) == 8 and all(p["rows"] > 0 and len(p["digest"]) == 32 for p in parts), parts
    target = "rocksdb" if layout == "hdfs" else "hdfs"
    plans = [_json("convert", str(src), str(tmp_path / f"plan-{j}"), "--to", target, "--dry-run", "-j", j) for j in ("1", "2")]
    assert plans[0]["partitions"] == plans[1]["partitions"]
    assert [(p["partition"], p["rows"], p["source_digest"]) for p in plans[0]["partitions"]] == [
        (p["partition"], p["rows"], p["digest"]) for p in parts
    ]
    assert not (tmp_path / "plan-1").exists() and not (tmp_path / "plan-2").exists()
    assert tree_digest(src) == before


def test_verify_with_two_jobs_finds_the_same_and_the_different(checkpoints):
    same = _json("verify", str(checkpoints["hdfs"]), str(checkpoints["rocksdb"]), "-j", "2")
    assert same["identical"] and same["partitions_compared"] == 8 and same["rows"]["a"] == same["rows"]["b"] > 0
    for jobs in ("1", "2"):
        other = _json("verify", str(checkpoints["hdfs"]), str(checkpoints["other"]), "-j", jobs, code=5)
        assert not other["identical"] and len(other["differences"]) == 8, other
    assert _json("verify", str(checkpoints["hdfs"]), str(checkpoints["other"]), "-j", "1", code=5) == other


@pytest.mark.parametrize(
    "command",
    [
        ("verify", "{hdfs}", "{rocksdb}"),
        ("inspect", "{rocksdb}", "--rows"),
        ("convert", "{hdfs}", "{out}", "--to", "rocksdb", "--dry-run"),
    ],
)
def test_the_partitions_are_read_in_workers(tmp_path, checkpoints, command):
    args = [a.format(out=tmp_path / "out", **checkpoints) for a in command]
    r = stateshift(*args, "-j", "2", "--quiet", env={"STATESHIFT_CRASH_AT": "worker-task:2"})
    assert r.returncode == 8, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in r.stderr, r.stderr
    assert "killed by signal 9" in lines[0] and "while store partitions were being read" in lines[0], lines[0]
    assert "/state/0/" in lines[0] and "--resume" not in lines[0], lines[0]
    assert not (tmp_path / "out").exists()


def test_one_job_reads_in_this_process(tmp_path, checkpoints):
    """With ``-j 1`` no worker exists, so the worker crash point is never met."""
    copy = tmp_path / "copy"
    shutil.copytree(checkpoints["hdfs"], copy)
    r = stateshift("verify", str(checkpoints["hdfs"]), str(copy), "-j", "1", "--quiet", env={"STATESHIFT_CRASH_AT": "worker-task:1"})
    assert r.returncode == 0, r.stderr
