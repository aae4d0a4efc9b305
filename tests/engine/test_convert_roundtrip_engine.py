"""A checkpoint converted to the other state-store provider continues exactly like the original.

For each scenario and source provider: the engine writes three input files' worth of batches into
a checkpoint; the tree is copied to a control; ``stateshift convert`` builds a new checkpoint for
the other provider; then the engine restarts both the converted checkpoint and the control on two
more input files, with no provider set in the session, so each restart runs on the provider its
checkpoint names. The proof:

1. the continued outputs are equal, batch by batch;
2. the engine wrote the new provider's files for the new versions in the converted checkpoint,
   and every offsets entry there names the new provider class;
3. the source tree is byte-for-byte unchanged (every file, checksum sidecars included).

A dry run writes nothing and prints a plan that names the provider conf key.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

import scenarios as sc

REPO = Path(__file__).resolve().parents[2]
OTHER = {"hdfs": "rocksdb", "rocksdb": "hdfs"}
FIRST_RUN_FILES = 3
TOTAL_FILES = 5

CASES = [
    pytest.param(scenario, source, id=f"{scenario}-{source}-to-{OTHER[source]}")
    for scenario in ("bay_totals", "ping_dedup", "ping_dedup_within_watermark")
    for source in ("hdfs", "rocksdb")
]


# --------------------------------------------------------------------------------------------
# helpers


def tree_digest(root: Path) -> dict[str, str]:
    """sha256 of every file under ``root`` (hidden files included), keyed by relative path.

    Directories are recorded too (value ``"<dir>"``), so a new empty directory is a change.
    """
    out: dict[str, str] = {}
    for dirpath, dirnames, filenames in os.walk(root):
        base = Path(dirpath)
        for d in dirnames:
            out[str((base / d).relative_to(root)) + "/"] = "<dir>"
        for f in filenames:
            path = base / f
            out[str(path.relative_to(root))] = hashlib.sha256(path.read_bytes()).hexdigest()
    return out


def run_cli(*args: str, timeout: float = 600.0) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env.get("PYTHONPATH")) if p)
    return subprocess.run(
        [sys.executable, "-m", "migrate", *args],
        cwd=REPO,
        env=env,
        capture_output=True,
        text=True,
        timeout=timeout,
    )


def describe(proc: subprocess.CompletedProcess) -> str:
    return (
        f"command {proc.args!r} exited {proc.returncode}\n"
        f"--- stdout ---\n{proc.stdout}\n--- stderr ---\n{proc.stderr}"
    )


def offsets_entries(checkpoint: Path) -> dict[int, dict]:
    """Batch id -> the metadata JSON (second line) of each offsets log entry."""
    entries = {}
    for path in sorted((checkpoint / "offsets").iterdir()):
        if path.name.isdigit():
            lines = path.read_text(encoding="utf-8").splitlines()
            entries[int(path.name)] = json.loads(lines[1])
    return entries


def store_dirs(checkpoint: Path) -> list[Path]:
    """Every state/<operator>/<partition> directory of the checkpoint."""
    state = checkpoint / "state"
    return sorted(
        part
        for op in state.iterdir()
        if op.name.isdigit()
        for part in op.iterdir()
        if part.name.isdigit()
    )


def version_files(store: Path, version: int) -> dict[str, list[str]]:
    """Files of one store directory that belong to ``version``, by kind."""
    names = [p.name for p in store.iterdir() if p.is_file()]
    # The RocksDB provider names a checkpoint "<v>.zip", or "<v>_<unique id>.zip" when the
    # newer checkpoint format is enabled; the HDFS-backed provider writes "<v>.delta" and,
    # during maintenance, "<v>.snapshot". (Observed from the engine's output.)
    return {
        "zip": [n for n in names if re.fullmatch(rf"{version}(_[0-9a-f-]+)?\.zip", n)],
        "delta": [n for n in names if n == f"{version}.delta"],
        "snapshot": [n for n in names if n == f"{version}.snapshot"],
    }


def assert_new_versions_written_by(checkpoint: Path, provider: str, versions: range) -> None:
    stores = store_dirs(checkpoint)
    assert stores, f"{checkpoint}: no state/<op>/<partition> directories"
    for store in stores:
        for v in versions:
            files = version_files(store, v)
            if provider == "rocksdb":
                assert files["zip"], f"{store}: engine wrote no RocksDB checkpoint for version {v}"
                assert not files["delta"], f"{store}: HDFS delta for version {v} after convert"
            else:
                assert files["delta"], f"{store}: engine wrote no {v}.delta"
                assert not files["zip"], f"{store}: RocksDB zip for version {v} after convert"


def first_run(spark, scenario: sc.Scenario, root: Path, provider: str) -> tuple[Path, Path]:
    input_dir = root / "input"
    src = root / "src"
    sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
    out = sc.run_query(spark, scenario, input_dir, src, provider)
    assert out, f"{scenario.name}: the first run produced no output rows"
    assert offsets_entries(src)[0]["conf"][sc.PROVIDER_CONF] == sc.PROVIDERS[provider]
    return input_dir, src


# --------------------------------------------------------------------------------------------
# tests


@pytest.mark.parametrize(("scenario_name", "source"), CASES)
def test_converted_checkpoint_continues_like_the_original(spark, tmp_path, scenario_name, source):
    scenario = sc.SCENARIOS[scenario_name]
    target = OTHER[source]
    input_dir, src = first_run(spark, scenario, tmp_path, source)
    last_batch = sc.batch_ids_in_commits(src)[-1]
    converted_version = last_batch + 1  # state version n is written by batch n - 1

    before = tree_digest(src)
    control = tmp_path / "control"
    shutil.copytree(src, control)
    dst = tmp_path / "dst"

    proc = run_cli("convert", str(src), str(dst), "--to", target)
    assert proc.returncode == 0, describe(proc)
    assert tree_digest(src) == before, "convert changed the source checkpoint"
    assert dst.is_dir(), f"convert exited 0 but {dst} does not exist"

    sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, control, None))
    dst_out = scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, dst, None))

    # (1) same continued output, batch by batch
    assert control_out, "the control restart produced no output; the scenario proves nothing"
    assert min(control_out) > last_batch, "the control restart re-ran old batches"
    assert dst_out == control_out

    # (2) the engine ran the converted checkpoint on the new provider
    new_last = sc.batch_ids_in_commits(dst)[-1]
    assert new_last == sc.batch_ids_in_commits(control)[-1] > last_batch
    new_versions = range(converted_version + 1, new_last + 2)
    assert_new_versions_written_by(dst, target, new_versions)
    assert_new_versions_written_by(control, source, new_versions)  # the harness itself
    for batch_id, meta in offsets_entries(dst).items():
        assert meta["conf"].get(sc.PROVIDER_CONF) == sc.PROVIDERS[target], (
            f"{dst}/offsets/{batch_id} names {meta['conf'].get(sc.PROVIDER_CONF)!r}"
        )

    # (3) the source is still byte-for-byte what the engine left
    assert tree_digest(src) == before


@pytest.mark.parametrize("source", ["hdfs", "rocksdb"])
def test_dry_run_writes_nothing_and_names_the_conf_change(spark, tmp_path, source):
    scenario = sc.BAY_TOTALS
    target = OTHER[source]
    _, src = first_run(spark, scenario, tmp_path, source)
    before = tree_digest(src)
    dst = tmp_path / "dst"

    proc = run_cli("convert", str(src), str(dst), "--to", target, "--dry-run")

    assert proc.returncode == 0, describe(proc)
    assert not dst.exists(), f"--dry-run created {dst}"
    assert tree_digest(src) == before, "--dry-run changed the source checkpoint"
    assert sc.PROVIDER_CONF in proc.stdout, describe(proc)
    assert sc.PROVIDERS[target] in proc.stdout, describe(proc)
