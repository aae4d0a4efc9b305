"""Session-window state survives conversion between the providers in both directions.

The RocksDB provider keeps a session-window store with a prefix key (numColsPrefixKey=1: the
grouping key, then the session start): each RocksDB key is two rows, while the heap map keeps one
full key row. The engine writes three input files' worth of batches into a checkpoint on one
provider; the tree is copied to a control; ``stateshift convert`` builds the other provider's
checkpoint; then the engine restarts both on two more files, each on the provider its checkpoint
names. The continued output must be equal batch by batch, the converted checkpoint must have
gone on with the new provider's files, and the source must be unchanged. A RocksDB -> RocksDB
clone and an export/import round trip of the RocksDB checkpoint are checked the same way.

Sessions here merge within a batch, grow across batches, hold a null grouping key and are closed
by the watermark (state rows are removed), so every kind of change to the store is exercised.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import pytest
import scenarios as sc
from test_convert_roundtrip_engine import (
    assert_new_versions_written_by,
    describe,
    offsets_entries,
    run_cli,
    tree_digest,
)

FIRST_RUN_FILES = 3
TOTAL_FILES = 5


def _build_sessions(df: Any) -> Any:
    from pyspark.sql import functions as F

    return (
        df.withWatermark("event_time", "10 minutes")
        .groupBy(F.session_window("event_time", "5 minutes"), "bay")
        .agg(F.count(F.lit(1)).alias("readings"), F.sum("level").alias("level_sum"))
        .select(
            F.col("session_window.start").alias("start"),
            F.col("session_window.end").alias("end"),
            "bay",
            "readings",
            "level_sum",
        )
    )


_p = sc._ping
SESSIONS = sc.Scenario(
    name="bay_sessions",
    schema_ddl="ping_id STRING, event_time TIMESTAMP, bay STRING, level INT",
    build=_build_sessions,
    output_mode="append",
    columns=("start", "end", "bay", "readings", "level_sum"),
    files=(
        (_p("s-01", 0, "north", 1), _p("s-02", 2, "north", 2), _p("s-03", 1, "south", 3), {**_p("s-04", 3, "x", 4), "bay": None}),
        (_p("s-05", 4, "north", 1), _p("s-06", 20, "east", 5), _p("s-07", 21, "south", 2), {**_p("s-08", 5, "x", 6), "bay": None}),
        (_p("s-09", 40, "north", 1), _p("s-10", 23, "south", 2), _p("s-11", 22, "east", 7), _p("s-12", 41, "fern-house", 3)),
        (_p("s-13", 41, "east", 4), _p("s-14", 60, "west", 1), _p("s-15", 44, "north", 5), {**_p("s-16", 50, "x", 2), "bay": None}),
        (_p("s-17", 80, "north", 2), _p("s-18", 85, "south", 9), _p("s-19", 61, "west", 3)),
    ),
    notes="withWatermark + groupBy(session_window(5 min), bay) count/sum; append mode",
)
#: for ``engine35_run.py``, which runs a module's scenarios by name
SCENARIOS = {SESSIONS.name: SESSIONS}


def _first_run(spark, root: Path, provider: str) -> tuple[Path, Path]:
    input_dir = root / "input"
    src = root / "src"
    sc.write_input_files(input_dir, SESSIONS, 0, FIRST_RUN_FILES)
    out = sc.run_query(spark, SESSIONS, input_dir, src, provider)
    assert out, "the first run closed no session; the scenario proves nothing"
    meta_file = src / "state" / "0" / "_metadata" / "metadata"
    if sc.ENGINE_35:  # 3.5 writes no operator metadata: stateshift infers the prefix from the schema file
        assert not meta_file.exists(), f"3.5 wrote {meta_file}"
    else:
        meta = meta_file.read_text()
        assert '"numColsPrefixKey":1' in meta, f"the engine no longer uses a prefix key here: {meta}"
    proc = run_cli("inspect", str(src), "--json")
    assert proc.returncode == 0, describe(proc)
    info = json.loads(proc.stdout)
    prefixes = [st["num_cols_prefix_key"] for op in info["operators"] for st in op["stores"]]
    assert prefixes == [1], f"stateshift sees numColsPrefixKey {prefixes} for the session store, expected [1]"
    assert info["engine"]["family"] == sc.ENGINE_FAMILY, info["engine"]
    return input_dir, src


def _continue_and_compare(spark, input_dir: Path, control: Path, converted: list[tuple[Path, str]], last_batch: int) -> None:
    sc.write_input_files(input_dir, SESSIONS, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = SESSIONS.sorted_batches(sc.run_query(spark, SESSIONS, input_dir, control, None))
    assert control_out, "the control restart closed no session; the scenario proves nothing"
    assert min(control_out) > last_batch, "the control restart re-ran old batches"
    new_last = sc.batch_ids_in_commits(control)[-1]
    for dst, provider in converted:
        dst_out = SESSIONS.sorted_batches(sc.run_query(spark, SESSIONS, input_dir, dst, None))
        assert dst_out == control_out, f"{dst.name}: continued output differs from the control"
        assert sc.batch_ids_in_commits(dst)[-1] == new_last
        assert_new_versions_written_by(dst, provider, range(last_batch + 2, new_last + 2))
        for batch_id, meta in offsets_entries(dst).items():
            assert meta["conf"].get(sc.PROVIDER_CONF) == sc.PROVIDERS[provider], f"{dst}/offsets/{batch_id}"


@pytest.mark.parametrize("source", ["hdfs", "rocksdb"])
def test_session_windows_convert_to_the_other_provider_and_continue(spark, tmp_path: Path, source: str) -> None:
    target = {"hdfs": "rocksdb", "rocksdb": "hdfs"}[source]
    input_dir, src = _first_run(spark, tmp_path, source)
    last_batch = sc.batch_ids_in_commits(src)[-1]
    before = tree_digest(src)
    control = tmp_path / "control"
    shutil.copytree(src, control)

    dst = tmp_path / "dst"
    proc = run_cli("convert", str(src), str(dst), "--to", target)
    assert proc.returncode == 0, describe(proc)
    assert tree_digest(src) == before, "convert changed the source checkpoint"
    converted = [(dst, target)]
    if source == "rocksdb":
        clone = tmp_path / "clone"
        proc = run_cli("convert", str(src), str(clone), "--to", "rocksdb")
        assert proc.returncode == 0, describe(proc)
        archive, imported = tmp_path / "archive", tmp_path / "imported"
        proc = run_cli("export", str(src), str(archive))
        assert proc.returncode == 0, describe(proc)
        proc = run_cli("import", str(archive), str(imported), "--to", "rocksdb")
        assert proc.returncode == 0, describe(proc)
        converted += [(clone, "rocksdb"), (imported, "rocksdb")]
    assert tree_digest(src) == before

    _continue_and_compare(spark, input_dir, control, converted, last_batch)
    assert tree_digest(src) == before
