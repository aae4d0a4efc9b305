"""A convert killed half-way leaves a target the engine itself refuses to start on; after
``--resume`` the same target continues exactly like an untouched copy of the source."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

import scenarios as sc

REPO = Path(__file__).resolve().parents[2]


def cli(*args: str, crash: str | None = None) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "STATESHIFT_CRASH_AT"}
    if crash:
        env["STATESHIFT_CRASH_AT"] = crash
    # a killed run cannot remove its scratch folder: give it one of ours (not /dev/shm) and remove it
    scratch = tempfile.mkdtemp(prefix="stateshift-test-scratch-")
    env["STATESHIFT_SCRATCH"] = scratch
    try:
        return subprocess.run([sys.executable, "-m", "migrate", *args], cwd=REPO, env=env, capture_output=True, text=True, timeout=600)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


@pytest.mark.parametrize("crash", ["partition-written:1", "before-metadata:1"])
def test_engine_refuses_interrupted_target_and_accepts_resumed_one(spark, tmp_path, crash):
    scenario = sc.BAY_TOTALS
    input_dir, src = tmp_path / "input", tmp_path / "src"
    sc.write_input_files(input_dir, scenario, 0, 3)
    sc.run_query(spark, scenario, input_dir, src, "hdfs")
    control = tmp_path / "control"
    shutil.copytree(src, control)
    dst = tmp_path / "dst"

    killed = cli("convert", str(src), str(dst), "--to", "rocksdb", "-j", "1", "--force", crash=crash)
    assert killed.returncode == -9, killed.stderr
    sc.write_input_files(input_dir, scenario, 3, 5)
    with pytest.raises(Exception) as refused:
        sc.run_query(spark, scenario, input_dir, dst, None, timeout_s=120)
    assert "metadata" in str(refused.value).lower() or "json" in str(refused.value).lower(), str(refused.value)[:500]
    # the engine's failed start must not have made the target look usable
    assert (dst / "metadata").read_text().startswith("stateshift:")

    resumed = cli("convert", str(src), str(dst), "--to", "rocksdb", "-j", "1", "--force", "--resume")
    assert resumed.returncode == 0, resumed.stderr
    expected = scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, control, None))
    assert expected
    assert scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, dst, None)) == expected
