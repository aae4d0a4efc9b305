"""A checkpoint restored from an archive continues exactly like the original, on either provider.

For each scenario and source provider: the engine writes three input files' worth of batches into
a checkpoint; the tree is copied to a control; ``stateshift export`` writes an archive; ``stateshift
import`` rebuilds it into each provider (and once more into the other provider with a new query
id, as a staging clone would be). Then the engine restarts the control and every restored
checkpoint on two more input files, with no provider set in the session, so each restart runs on
the provider its checkpoint names. The proof:

1. the continued output of every restored checkpoint equals the control's, batch by batch;
2. the engine wrote the restored provider's files for the new versions, and every offsets entry
   names that provider;
3. the source checkpoint and the archive are byte-for-byte unchanged.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import pytest
import scenarios as sc
from test_convert_roundtrip_engine import (
    assert_new_versions_written_by,
    describe,
    run_cli,
    tree_digest,
)

FIRST_RUN_FILES = 3
TOTAL_FILES = 5
OTHER = {"hdfs": "rocksdb", "rocksdb": "hdfs"}

CASES = [
    pytest.param(scenario, source, id=f"{scenario}-from-{source}")
    for scenario in ("bay_totals", "ping_dedup")
    for source in ("hdfs", "rocksdb")
]


def ok_cli(*args: str) -> subprocess.CompletedProcess:
    proc = run_cli(*args)
    assert proc.returncode == 0, describe(proc)
    return proc


def offsets_providers(checkpoint: Path) -> dict[int, str]:
    out = {}
    for p in (checkpoint / "offsets").iterdir():
        if p.name.isdigit():
            out[int(p.name)] = json.loads(p.read_text().splitlines()[1])["conf"].get(sc.PROVIDER_CONF)
    return out


@pytest.mark.parametrize(("scenario_name", "source"), CASES)
def test_restored_checkpoints_continue_like_the_original(spark, tmp_path, scenario_name, source):
    scenario = sc.SCENARIOS[scenario_name]
    input_dir = tmp_path / "input"
    src = tmp_path / "src"
    sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
    first = sc.run_query(spark, scenario, input_dir, src, source)
    assert first, f"{scenario.name}: the first run produced no output rows"
    last_batch = sc.batch_ids_in_commits(src)[-1]
    before = tree_digest(src)
    control = tmp_path / "control"
    shutil.copytree(src, control)

    archive = tmp_path / "archive"
    exported = json.loads(ok_cli("export", str(src), str(archive), "--json").stdout)
    assert exported["batch"] == last_batch and exported["rows"] > 0
    archived = tree_digest(archive)

    restores = [("hdfs", False), ("rocksdb", False), (OTHER[source], True)]
    restored: list[tuple[Path, str, bool]] = []
    for to, new_id in restores:
        dst = tmp_path / f"restored-{to}{'-clone' if new_id else ''}"
        args = ["import", str(archive), str(dst), "--to", to, "--json"] + (["--new-query-id"] if new_id else [])
        report = json.loads(ok_cli(*args).stdout)
        assert report["verified"] is True
        original_id = json.loads((src / "metadata").read_text())["id"]
        assert (json.loads((dst / "metadata").read_text())["id"] != original_id) == new_id
        restored.append((dst, to, new_id))
    assert tree_digest(src) == before, "export/import changed the source checkpoint"
    assert tree_digest(archive) == archived, "import changed the archive"

    sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, control, None))
    assert control_out, "the control restart produced no output; the scenario proves nothing"
    assert min(control_out) > last_batch, "the control restart re-ran old batches"
    control_last = sc.batch_ids_in_commits(control)[-1]
    new_versions = range(last_batch + 2, control_last + 2)
    assert_new_versions_written_by(control, source, new_versions)  # the harness itself

    for dst, to, new_id in restored:
        out = scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, dst, None))
        assert out == control_out, f"{dst.name}: continued output differs from the control"
        assert sc.batch_ids_in_commits(dst)[-1] == control_last
        assert_new_versions_written_by(dst, to, new_versions)
        assert set(offsets_providers(dst).values()) == {sc.PROVIDERS[to]}, f"{dst.name}: offsets name another provider"

    assert tree_digest(src) == before
