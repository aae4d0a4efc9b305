"""``benchmarks/rocksdb_floor.py`` (the binding side of the RocksDB floor) writes, ingests and scans
its keys through the tool's own RocksDB code and reads back exactly what it wrote."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]


def test_the_binding_floor_reads_back_every_key(tmp_path):
    out = subprocess.run([sys.executable, "-m", "benchmarks.rocksdb_floor", str(tmp_path / "floor"), "2000"],
                         capture_output=True, text=True, cwd=REPO, timeout=120)
    assert out.returncode == 0, out.stderr
    assert re.fullmatch(r"rocksdict: 2000 keys, put \d+\.\d{3} CPU us per key, scan \d+\.\d{3} CPU us per key\n", out.stdout)


def test_it_refuses_to_run_without_a_folder():
    out = subprocess.run([sys.executable, "-m", "benchmarks.rocksdb_floor"], capture_output=True, text=True, cwd=REPO)
    assert out.returncode == 2 and "usage:" in out.stderr
