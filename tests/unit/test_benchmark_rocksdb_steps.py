"""``benchmarks/rocksdb_steps.py`` (RocksDB's own steps for a case's rows, in the same run) scans
every row of a generated RocksDB checkpoint and writes them all into a new table set: the rows it
read are the generator's, and the DB its write step built holds exactly those rows."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

from benchmarks import rocksdb_steps
from benchmarks.generate import Params, generate
from migrate.providers import rocksdb_db

REPO = Path(__file__).resolve().parents[2]


def test_the_steps_scan_and_write_every_row(tmp_path, monkeypatch):
    p = Params(keys=3000, partitions=3, shape="narrow", layout="rocksdb", deltas=2, seed=7)
    generate(p, tmp_path / "ckpt", jobs=1, quiet=True)
    built: list[list[bytes]] = []
    real_build = rocksdb_db.build_db

    def build_and_read(runs, rows, options, tmp, where):
        checkpoint = real_build(runs, rows, options, tmp, where)
        built.append([k for keys, _ in rocksdb_db.iterate(checkpoint, where) for k in keys.to_pylist()])
        return checkpoint

    monkeypatch.setattr(rocksdb_db, "build_db", build_and_read)
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    monkeypatch.setenv("STATESHIFT_SCRATCH", str(scratch))  # the tool's scratch choice, here in sight
    results = [rocksdb_steps.partition_steps((str(tmp_path / "ckpt"), i, True)) for i in range(3)]
    assert sum(rows for _, _, rows in results) == 3000
    assert all(scan > 0 and write > 0 for scan, write, _ in results)
    assert [len(keys) for keys in built] == [rows for _, _, rows in results]
    assert all(keys == sorted(set(keys)) for keys in built)  # in RocksDB's order, each key once
    assert built and all(keys for keys in built)
    assert list(scratch.iterdir()) == []  # every partition's scratch folder removed


def test_the_command_sums_the_partitions(tmp_path):
    p = Params(keys=2000, partitions=2, shape="wide", layout="rocksdb", deltas=1, seed=3)
    generate(p, tmp_path / "ckpt", jobs=1, quiet=True)
    plan = tmp_path / "plan.json"
    plan.write_text(json.dumps({"root": str(tmp_path / "ckpt"), "partitions": 2, "write": False, "jobs": 2}))
    out = subprocess.run([sys.executable, "-m", "benchmarks.rocksdb_steps", str(plan)], capture_output=True, text=True, cwd=REPO, timeout=300)
    assert out.returncode == 0, out.stderr
    got = json.loads(out.stdout)
    assert got["rows"] == 2000 and got["scan_cpu_s"] > 0 and got["write_cpu_s"] == 0
