"""Checkpoints written with RocksDB changelog checkpointing convert to either provider and continue.

With ``spark.sql.streaming.stateStore.rocksdb.changelogCheckpointing.enabled=true`` the engine
commits versions as ``<v>.changelog`` files (this session's maintenance never runs, so no
snapshot zip is uploaded). Two histories:

* changelog-only: every version is a changelog (a streaming aggregation);
* mixed: the first runs without changelogs (zips), the last with them, so the newest version is
  the last zip plus the changelogs after it (session windows: a prefix-key store with removals).

Each is converted with ``--to hdfs`` and ``--to rocksdb`` (which writes one full ``<v>.zip``);
the engine restarts the control and both targets (changelog checkpointing still on) on two more
files. Continued output must be equal; the RocksDB target must have gone on with changelog files
after our zip (the engine accepted a full snapshot under changelog checkpointing); the source is
unchanged.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
import scenarios as sc
from test_convert_roundtrip_engine import describe, run_cli, tree_digest
from test_session_window_engine import SESSIONS

CHANGELOG = "spark.sql.streaming.stateStore.rocksdb.changelogCheckpointing.enabled"
FIRST_RUN_FILES = 3
TOTAL_FILES = 5


def _run(spark, scenario: sc.Scenario, input_dir: Path, checkpoint: Path, provider: str | None, changelog: bool):
    if changelog:
        spark.conf.set(CHANGELOG, "true")
    try:
        return sc.run_query(spark, scenario, input_dir, checkpoint, provider)
    finally:
        spark.conf.unset(CHANGELOG)


def _partitions(checkpoint: Path) -> list[Path]:
    return sorted(p for p in (checkpoint / "state" / "0").iterdir() if p.name.isdigit())


@pytest.mark.parametrize("history", ["changelog-only", "mixed"])
def test_changelog_checkpoint_converts_to_both_providers_and_continues(spark, tmp_path: Path, history: str) -> None:
    scenario = sc.BAY_TOTALS if history == "changelog-only" else SESSIONS
    input_dir, src = tmp_path / "input", tmp_path / "src"
    if history == "changelog-only":
        sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
        _run(spark, scenario, input_dir, src, "rocksdb", changelog=True)
    else:
        sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES - 1)
        _run(spark, scenario, input_dir, src, "rocksdb", changelog=False)
        sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES - 1, FIRST_RUN_FILES)
        _run(spark, scenario, input_dir, src, "rocksdb", changelog=True)
    last_batch = sc.batch_ids_in_commits(src)[-1]
    version = last_batch + 1
    for part in _partitions(src):
        assert (part / f"{version}.changelog").exists() and not (part / f"{version}.zip").exists(), (
            f"{part}: version {version} is not held by a changelog only; the scenario proves nothing"
        )
        zips = sorted(int(p.stem) for p in part.glob("*.zip"))
        assert (not zips) if history == "changelog-only" else (zips and zips[-1] < version), f"{part}: zips {zips}"
    before = tree_digest(src)
    control = tmp_path / "control"
    shutil.copytree(src, control)

    targets = {"hdfs": tmp_path / "to-hdfs", "rocksdb": tmp_path / "to-rocksdb"}
    for provider, dst in targets.items():
        proc = run_cli("convert", str(src), str(dst), "--to", provider)
        assert proc.returncode == 0, describe(proc)
    assert tree_digest(src) == before, "convert changed the source checkpoint"
    for part in _partitions(targets["rocksdb"]):
        names = sorted(p.name for p in part.iterdir() if p.is_file() and not p.name.startswith("."))
        assert names == [f"{version}.zip"], f"{part}: {names}"

    sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = scenario.sorted_batches(_run(spark, scenario, input_dir, control, None, changelog=True))
    assert control_out and min(control_out) > last_batch
    new_last = sc.batch_ids_in_commits(control)[-1]
    for provider, dst in targets.items():
        out = scenario.sorted_batches(_run(spark, scenario, input_dir, dst, None, changelog=True))
        assert out == control_out, f"--to {provider}: continued output differs from the control"
        assert sc.batch_ids_in_commits(dst)[-1] == new_last
    for part in _partitions(targets["rocksdb"]):
        for v in range(version + 1, new_last + 2):
            assert (part / f"{v}.changelog").exists(), f"{part}: the engine wrote no changelog for version {v} after our zip"
    for part in _partitions(targets["hdfs"]):
        assert (part / f"{new_last + 1}.delta").exists(), f"{part}: the engine did not continue on the heap map"
    assert tree_digest(src) == before
