"""A run killed while it builds a RocksDB partition leaves its scratch folder (on a tmpfs, memory
until reboot); the next command removes it, and keeps the folders of running processes."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

from helpers import DEMO, stateshift

from migrate import scratch


def test_the_next_command_removes_scratch_of_killed_runs(tmp_path: Path):
    place = tmp_path / "scratch"
    place.mkdir()
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()  # its id now names no process
    old = time.time() - scratch.STALE_AFTER - 60
    stale = place / f"stateshift-rocksdb-w-{child.pid}-k1ll3d"
    live = place / f"stateshift-rocksdb-w-{os.getppid()}-running"
    for folder in (stale, live):
        (folder / "db").mkdir(parents=True)
        (folder / "db" / "000008.sst").write_bytes(b"\0" * 4096)
        os.utime(folder, (old, old))
    r = stateshift("inspect", str(DEMO / "greenhouse_totals_rocksdb"), env={"STATESHIFT_SCRATCH": str(place)})
    assert r.returncode == 0, r.stderr
    assert not stale.exists()
    assert live.exists()
