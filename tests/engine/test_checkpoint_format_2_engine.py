"""Checkpoints in state checkpoint format 2 (unique ids) move and the engine continues on them.

The engine (4.3.0, RocksDB, ``spark.sql.streaming.stateStore.checkpointFormatVersion=2``) writes
a checkpoint whose state files are ``<v>_<uid>.zip`` / ``<v>_<uid>.changelog`` and whose commits
are ``v2`` with ``stateUniqueIds``. The queries: a streaming aggregation, the same with
changelog checkpointing (versions held by v3 changelogs with a lineage header), a stream-stream
join (four stores, four ids per partition), deduplication chained with a windowed aggregation
(two operators, ids under each), session windows (prefix-key encoding) and per-group state
(``applyInPandasWithState`` with an event-time timeout). Each is moved four ways:

* ``convert --to hdfs``: plain heap-map files, commits ``v1`` without ids; restarted with
  format 1 (the heap map refuses format 2);
* ``convert --to rocksdb`` (a clone) and ``export`` + ``import --to rocksdb``: format 2 kept,
  new ids in file names and in the latest commit; restarted with format 2;
* ``import --to hdfs``: as the convert to hdfs.

transformWithState (column families, timers) in format 2 is cloned and archived into RocksDB only
(the heap map cannot hold it). The control is an untouched copy restarted with format 2. Continued output must equal the
control's; the targets must have gone on in their own format (new RocksDB versions named with
ids that the new commits list, new heap-map deltas and v1 commits); the source is unchanged.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
import scenarios as sc
import scenarios_more as sm
from test_convert_roundtrip_engine import describe, run_cli, tree_digest
from test_session_window_engine import SESSIONS

# The state checkpoint format 2 (unique ids) first appears in 4.x; 3.5 has no such setting.
pytestmark = pytest.mark.skipif(
    sc.ENGINE_35, reason="engine 3.5 has no state checkpoint format 2 (it refuses v2 commits: FINDINGS.md)"
)

FORMAT_CONF = "spark.sql.streaming.stateStore.checkpointFormatVersion"
CHANGELOG = "spark.sql.streaming.stateStore.rocksdb.changelogCheckpointing.enabled"
FIRST_RUN_FILES = 3
TOTAL_FILES = 5

CASES = {
    "aggregation": (sc.BAY_TOTALS, False),
    "aggregation-changelog": (sc.BAY_TOTALS, True),
    "join": (sm.DRONE_INNER_JOIN, False),
    "dedup-then-windows": (sm.PING_DEDUP_THEN_WINDOWS, False),
    "session-windows": (SESSIONS, False),
    "per-group-state": (sm.BUOY_PANDAS_EVENT_V2, False),
}


def _run(spark, scenario, input_dir: Path, checkpoint: Path, provider: str | None, fmt: int, changelog: bool):
    spark.conf.set(FORMAT_CONF, str(fmt))
    if changelog:
        spark.conf.set(CHANGELOG, "true")
    try:
        return scenario.sorted_batches(sm.run(spark, scenario, input_dir, checkpoint, provider))
    finally:
        spark.conf.unset(FORMAT_CONF)
        spark.conf.unset(CHANGELOG)


def _commit(checkpoint: Path, batch: int) -> tuple[str, dict]:
    head, body = (checkpoint / "commits" / str(batch)).read_text().split("\n", 1)
    return head, json.loads(body)


def _operator_stores(checkpoint: Path) -> dict[int, list[str]]:
    """Operator id -> store names, from the operator metadata: ``_metadata/metadata``, or for
    transformWithState the newest ``_metadata/v2/<batch>`` (observed on 4.3.0)."""
    out = {}
    for op in sorted(p for p in (checkpoint / "state").iterdir() if p.name.isdigit()):
        meta = op / "_metadata" / "metadata"
        if not meta.exists():
            meta = max((f for f in (op / "_metadata" / "v2").iterdir() if f.name.isdigit()), key=lambda f: int(f.name))
        out[int(op.name)] = [s["storeName"] for s in json.loads(meta.read_text().split("\n", 1)[1])["stateStoreInfo"]]
    return out


def _store_dirs(checkpoint: Path) -> dict[tuple[int, int, int], Path]:
    """(operator, partition, store's place in the operator metadata) -> directory."""
    out = {}
    for op, names in _operator_stores(checkpoint).items():
        for part in sorted(p for p in (checkpoint / "state" / str(op)).iterdir() if p.name.isdigit()):
            for i, name in enumerate(names):
                out[(op, int(part.name), i)] = part if name == "default" else part / name
    return out


def _assert_ids_name_files(checkpoint: Path, batch: int, suffixes: tuple[str, ...]) -> list[str]:
    """The commit of ``batch`` is v2, it lists an id for every store partition of every
    operator, and each id names a file of version batch+1."""
    head, body = _commit(checkpoint, batch)
    assert head == "v2" and "stateUniqueIds" in body, f"{checkpoint}: commits/{batch} is {head} {body}"
    dirs = _store_dirs(checkpoint)
    assert sorted(body["stateUniqueIds"]) == sorted({str(op) for op, _, _ in dirs}), body["stateUniqueIds"]
    ids = []
    for (op, part, store), d in dirs.items():
        uid = body["stateUniqueIds"][str(op)][part][store]
        ids.append(uid)
        assert any((d / f"{batch + 1}_{uid}{s}").exists() for s in suffixes), f"{d}: no file for version {batch + 1} id {uid}"
    return ids


@pytest.mark.parametrize("case", list(CASES))
def test_format_2_checkpoint_moves_and_the_engine_continues(spark, tmp_path: Path, case: str) -> None:
    scenario, changelog = CASES[case]
    input_dir, src = tmp_path / "input", tmp_path / "src"
    sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
    assert _run(spark, scenario, input_dir, src, "rocksdb", 2, changelog), "the first run produced no output"
    last = sc.batch_ids_in_commits(src)[-1]
    source_ids = _assert_ids_name_files(src, last, (".changelog",) if changelog else (".zip",))
    if changelog:
        for d in _store_dirs(src).values():
            assert not list(d.glob(f"{last + 1}_*.zip")), f"{d}: version {last + 1} has a zip; the lineage is not exercised"
    before = tree_digest(src)
    control = tmp_path / "control"
    shutil.copytree(src, control)

    archive = tmp_path / "archive"
    targets = {
        "convert-hdfs": (tmp_path / "convert-hdfs", 1),
        "convert-rocksdb": (tmp_path / "convert-rocksdb", 2),
        "import-rocksdb": (tmp_path / "import-rocksdb", 2),
        "import-hdfs": (tmp_path / "import-hdfs", 1),
    }
    for name in ("convert-hdfs", "convert-rocksdb"):
        proc = run_cli("convert", str(src), str(targets[name][0]), "--to", name.split("-")[1], "--json")
        assert proc.returncode == 0, describe(proc)
        assert json.loads(proc.stdout)["checkpoint_format"] == {"source": 2, "target": targets[name][1]}
    proc = run_cli("export", str(src), str(archive), "--json")
    assert proc.returncode == 0, describe(proc)
    assert json.loads((archive / "manifest.json").read_text())["checkpoint_format"] == 2
    for name in ("import-rocksdb", "import-hdfs"):
        proc = run_cli("import", str(archive), str(targets[name][0]), "--to", name.split("-")[1], "--json")
        assert proc.returncode == 0, describe(proc)
        assert json.loads(proc.stdout)["checkpoint_format"] == {"source": 2, "target": targets[name][1]}
    assert tree_digest(src) == before, "the tool changed the source checkpoint"

    for name, (dst, fmt) in targets.items():
        if fmt == 1:
            for b in sc.batch_ids_in_commits(dst):
                head, body = _commit(dst, b)
                assert head == "v1" and "stateUniqueIds" not in body, f"{name}: commits/{b} is {head} {body}"
            assert not [p for p in dst.rglob("*_*-*-*.zip")], f"{name}: files with ids in a format-1 target"
        else:
            new_ids = _assert_ids_name_files(dst, last, (".zip",))
            assert not set(new_ids) & set(source_ids), f"{name}: the target reuses the engine's ids"
            for d in _store_dirs(dst).values():
                zips = [p.name for p in d.glob("*.zip")]
                assert len(zips) == 1 and (d / f"{zips[0]}.crc").exists(), f"{name} {d}: {zips}"

    sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = _run(spark, scenario, input_dir, control, None, 2, changelog)
    assert control_out and min(control_out) > last
    if scenario.name in sm.CARRIED:  # a row only the state from before the move explains
        assert sm.CARRIED[scenario.name] in {r for rows in control_out.values() for r in rows}, scenario.name
    new_last = sc.batch_ids_in_commits(control)[-1]
    for name, (dst, fmt) in targets.items():
        out = _run(spark, scenario, input_dir, dst, None, fmt, changelog)
        assert out == control_out, f"{name}: continued output differs from the control"
        assert sc.batch_ids_in_commits(dst)[-1] == new_last, name
        if fmt == 2:  # the engine went on in format 2 from our version and ids
            _assert_ids_name_files(dst, new_last, (".changelog",) if changelog else (".zip",))
        else:
            assert _commit(dst, new_last)[0] == "v1", name
            for d in _store_dirs(dst).values():
                assert (d / f"{new_last + 1}.delta").exists(), f"{name} {d}: the engine did not continue on the heap map"
    assert tree_digest(src) == before


def test_heap_map_converted_to_rocksdb_format_2_continues(spark, tmp_path: Path) -> None:
    """``convert --to rocksdb --checkpoint-format 2`` from a heap-map checkpoint: the engine
    restarted with format 2 loads our ``<v>_<id>.zip`` by the id in the new commit and goes on."""
    scenario = sc.BAY_TOTALS
    input_dir, src = tmp_path / "input", tmp_path / "src"
    sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
    assert _run(spark, scenario, input_dir, src, "hdfs", 1, False)
    last = sc.batch_ids_in_commits(src)[-1]
    control = tmp_path / "control"
    shutil.copytree(src, control)
    dst = tmp_path / "rocksdb-v2"
    proc = run_cli("convert", str(src), str(dst), "--to", "rocksdb", "--checkpoint-format", "2", "--json")
    assert proc.returncode == 0, describe(proc)
    assert json.loads(proc.stdout)["checkpoint_format"] == {"source": 1, "target": 2}
    _assert_ids_name_files(dst, last, (".zip",))
    sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = _run(spark, scenario, input_dir, control, None, 1, False)
    assert control_out and min(control_out) > last
    out = _run(spark, scenario, input_dir, dst, None, 2, False)
    assert out == control_out, "continued output differs from the control"
    new_last = sc.batch_ids_in_commits(dst)[-1]
    assert new_last == sc.batch_ids_in_commits(control)[-1]
    _assert_ids_name_files(dst, new_last, (".zip",))


def test_transform_with_state_in_format_2_clones_and_continues(spark, tmp_path: Path) -> None:
    """transformWithState (column families, timers) in format 2: ``convert --to rocksdb`` and
    ``export`` + ``import --to rocksdb`` keep format 2 with new ids; restarted with format 2 the
    engine continues like the control, timers firing after the move."""
    from test_transform_with_state_engine import EVENT_TIME

    scenario = EVENT_TIME
    input_dir, src = tmp_path / "input", tmp_path / "src"
    sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
    first = _run(spark, scenario, input_dir, src, "rocksdb", 2, False)
    assert any(r[1] == "expired" for rows in first.values() for r in rows), "no timer fired in the first run"
    last = sc.batch_ids_in_commits(src)[-1]
    source_ids = _assert_ids_name_files(src, last, (".zip",))
    before = tree_digest(src)
    control, clone, archive, imported = (tmp_path / n for n in ("control", "clone", "archive", "imported"))
    shutil.copytree(src, control)
    for args in (("convert", str(src), str(clone), "--to", "rocksdb"), ("export", str(src), str(archive)),
                 ("import", str(archive), str(imported), "--to", "rocksdb")):
        proc = run_cli(*args, "--json")
        assert proc.returncode == 0, describe(proc)
        if args[0] != "export":
            assert json.loads(proc.stdout)["checkpoint_format"] == {"source": 2, "target": 2}, args
    assert tree_digest(src) == before, "the tool changed the source checkpoint"
    for dst in (clone, imported):
        assert not set(_assert_ids_name_files(dst, last, (".zip",))) & set(source_ids), f"{dst.name} reuses the engine's ids"

    sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = _run(spark, scenario, input_dir, control, None, 2, False)
    assert control_out and min(control_out) > last
    assert any(r[1] == "expired" for rows in control_out.values() for r in rows), "no timer fired after the restart"
    src.rename(tmp_path / "src-moved-away")  # nothing moved may still read the source
    new_last = sc.batch_ids_in_commits(control)[-1]
    for dst in (clone, imported):
        out = _run(spark, scenario, input_dir, dst, None, 2, False)
        assert out == control_out, f"{dst.name}: continued output differs from the control"
        assert sc.batch_ids_in_commits(dst)[-1] == new_last
        _assert_ids_name_files(dst, new_last, (".zip",))
