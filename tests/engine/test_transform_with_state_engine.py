"""transformWithState state (column families, list/map/value state, timers, TTL) clones RocksDB -> RocksDB.

The engine's newest per-key state API keeps every state variable in its own RocksDB column family
(all inside RocksDB's default family, each key led by a 2-byte family id) and records the family
table in each version's metadata. Its operator metadata (v2) names the state schema files by
absolute path. A Python StatefulProcessor per bay keeps a count (ValueState), the levels seen
(ListState: merge operands in RocksDB), the pings seen (MapState) and the newest event time, and
registers a timer.

* Event time: timers fire (the watermark passes them) and clear the state of a bay; the clone made
  by ``convert --to rocksdb`` and the checkpoint rebuilt by ``export`` + ``import --to rocksdb``
  continue exactly like a copy of the source, after the source has been moved away (so nothing in
  them still points at it). ``convert --to hdfs`` and ``import --to hdfs`` exit 4 with the reason
  and write nothing.
* Processing time with TTL on the value and map state (one micro-batch per run, so no run loops on
  processing-time batches): TTL and processing-time timer families clone the same way.
"""

from __future__ import annotations

import json
import shutil
import sys
import threading
import zipfile
from pathlib import Path
from typing import Any

import pytest
import scenarios as sc
from test_convert_roundtrip_engine import (
    assert_new_versions_written_by,
    describe,
    run_cli,
    tree_digest,
)

# transformWithState (and its RocksDB column families) first appears in 4.0; 3.5 has no such API.
pytestmark = pytest.mark.skipif(sc.ENGINE_35, reason="transformWithState does not exist in engine 3.5")

FIRST_RUN_FILES = 3
TOTAL_FILES = 5
DAY_MS = 86_400_000
OUTPUT = "bay string, kind string, readings long, level_sum long, distinct_pings long"


def _processors() -> tuple[type, type]:
    """The processor classes (defined lazily: pyspark is only imported when the engine runs)."""
    import pandas as pd
    from pyspark import cloudpickle
    from pyspark.sql.streaming.stateful_processor import StatefulProcessor

    class BayTally(StatefulProcessor):
        ttl_ms: int | None = None

        def init(self, handle: Any) -> None:
            self.handle = handle
            self.count = handle.getValueState("count", "n long", self.ttl_ms)
            self.levels = handle.getListState("levels", "level int")
            self.seen = handle.getMapState("seen", "ping_id string", "level int", self.ttl_ms)
            self.newest = handle.getValueState("newest", "t long")

        def timer_for(self, newest_ms: int, timer_values: Any) -> int:
            return newest_ms + 5 * 60_000

        def handleInputRows(self, key: Any, rows: Any, timerValues: Any) -> Any:
            n = self.count.get()[0] if self.count.exists() else 0
            newest = self.newest.get()[0] if self.newest.exists() else 0
            for pdf in rows:
                for ping, level, ts in zip(pdf["ping_id"], pdf["level"], pdf["event_time"]):
                    n += 1
                    self.levels.appendValue((int(level),))
                    self.seen.updateValue((ping,), (int(level),))
                    newest = max(newest, int(pd.Timestamp(ts).value // 1_000_000))
            self.count.update((n,))
            self.newest.update((newest,))
            self.handle.registerTimer(self.timer_for(newest, timerValues))
            total = sum(v[0] for v in self.levels.get())
            distinct = len(list(self.seen.keys()))
            yield pd.DataFrame({"bay": [key[0]], "kind": ["update"], "readings": [n], "level_sum": [total], "distinct_pings": [distinct]})

        def handleExpiredTimer(self, key: Any, timerValues: Any, expiredTimerInfo: Any) -> Any:
            n = self.count.get()[0] if self.count.exists() else 0
            total = sum(v[0] for v in self.levels.get())
            self.count.clear()
            self.levels.clear()
            self.seen.clear()
            self.newest.clear()
            yield pd.DataFrame({"bay": [key[0]], "kind": ["expired"], "readings": [n], "level_sum": [total], "distinct_pings": [0]})

        def close(self) -> None:
            pass

    class BayTallyWithTTL(BayTally):
        ttl_ms = DAY_MS  # long enough never to expire during a test run

        def timer_for(self, newest_ms: int, timer_values: Any) -> int:
            return timer_values.getCurrentProcessingTimeInMs() + DAY_MS  # registered, never fires here

    # the Python workers unpickle these classes by value: they are not importable there
    cloudpickle.register_pickle_by_value(sys.modules[__name__])
    return BayTally, BayTallyWithTTL


def _build_event_time(df: Any) -> Any:
    tally, _ = _processors()
    return df.withWatermark("event_time", "1 minute").groupBy("bay").transformWithStateInPandas(
        tally(), OUTPUT, "append", "eventtime"
    )


def _build_processing_time(df: Any) -> Any:
    _, tally_ttl = _processors()
    return df.groupBy("bay").transformWithStateInPandas(tally_ttl(), OUTPUT, "append", "processingtime")


_p = sc._ping
_FILES = (
    (_p("t-01", 0, "north", 1), _p("t-02", 2, "north", 2), _p("t-03", 1, "south", 3)),
    (_p("t-04", 4, "north", 1), _p("t-05", 20, "south", 5), _p("t-06", 21, "east", 2)),
    (_p("t-07", 40, "north", 1), _p("t-08", 23, "south", 2)),
    (_p("t-09", 41, "east", 4), _p("t-10", 60, "west", 1), _p("t-11", 42, "north", 6)),
    (_p("t-12", 80, "north", 2), _p("t-13", 81, "east", 3)),
)
_COLUMNS = ("bay", "kind", "readings", "level_sum", "distinct_pings")
EVENT_TIME = sc.Scenario("bay_tally_event_time", "ping_id STRING, event_time TIMESTAMP, bay STRING, level INT",
                         _build_event_time, "append", _COLUMNS, _FILES)
PROCESSING_TIME = sc.Scenario("bay_tally_ttl", "ping_id STRING, event_time TIMESTAMP, bay STRING, level INT",
                              _build_processing_time, "append", _COLUMNS, _FILES)


def run_once(spark: Any, scenario: sc.Scenario, input_dir: Path, checkpoint: Path, timeout_s: float = 300.0) -> list:
    """One micro-batch over every input file new to ``checkpoint`` (a processing-time query
    under the available-now trigger would keep asking for processing-time batches)."""
    spark.conf.set(sc.PROVIDER_CONF, sc.ROCKSDB_PROVIDER)
    collected: list = []
    lock = threading.Lock()

    def sink(batch_df: Any, batch_id: int) -> None:
        rows = [scenario.normalise(r) for r in batch_df.collect()]
        with lock:
            collected.extend((int(batch_id), r) for r in rows)

    stream = spark.readStream.format("json").schema(scenario.schema_ddl).load(str(input_dir.resolve()))
    query = (
        scenario.build(stream).writeStream.outputMode("append").option("checkpointLocation", str(checkpoint.resolve()))
        .trigger(once=True).foreachBatch(sink).start()
    )
    try:
        finished = query.awaitTermination(timeout_s)
        failure = query.exception()
        if not finished:
            raise TimeoutError(f"{scenario.name} on {checkpoint} ran over {timeout_s}s")
        if failure is not None:
            raise sc.QueryFailed(f"{scenario.name} on {checkpoint} failed: {sc._gist(failure)}")
    finally:
        query.stop()
        spark.conf.unset(sc.PROVIDER_CONF)
    return collected


def _families(checkpoint: Path) -> dict[str, Any]:
    """The column-family table of the newest zip of partition 0."""
    part = checkpoint / "state" / "0" / "0"
    newest = max(part.glob("*.zip"), key=lambda p: int(p.stem))
    meta = json.loads(zipfile.ZipFile(newest).read("metadata").split(b"\n", 1)[1])
    return {k: meta[k] for k in ("columnFamilyMapping", "columnFamilyTypeMap", "maxColumnFamilyId")}


def _schema_paths(checkpoint: Path) -> list[str]:
    paths = []
    for f in sorted((checkpoint / "state" / "0" / "_metadata" / "v2").iterdir()):
        if f.name.isdigit():
            body = json.loads(f.read_text().split("\n", 1)[1])
            paths += [p for s in body["stateStoreInfo"] for p in s.get("stateSchemaFilePaths", [])]
    return paths


def _refused(proc, target: Path) -> None:
    assert proc.returncode == 4, describe(proc)
    text = proc.stderr + proc.stdout
    assert "column families" in text and "transformWithState" in text, describe(proc)
    assert not (target / "state").exists(), f"{target}: state was written before the refusal"


def test_event_time_state_clones_and_archives_and_the_heap_map_is_refused(spark, tmp_path: Path) -> None:
    input_dir, src = tmp_path / "input", tmp_path / "src"
    sc.write_input_files(input_dir, EVENT_TIME, 0, FIRST_RUN_FILES)
    first = sc.run_query(spark, EVENT_TIME, input_dir, src, "rocksdb")
    assert any(row[1] == "expired" for _, row in first), "no timer fired in the first run"
    last_batch = sc.batch_ids_in_commits(src)[-1]
    families = _families(src)
    assert {"count", "levels", "seen", "newest"} <= set(families["columnFamilyMapping"]), families
    assert any(n.startswith("$") for n in families["columnFamilyMapping"]), "no timer families"
    before = tree_digest(src)
    control = tmp_path / "control"
    shutil.copytree(src, control)

    _refused(run_cli("convert", str(src), str(tmp_path / "heap"), "--to", "hdfs"), tmp_path / "heap")
    clone, archive, imported = tmp_path / "clone", tmp_path / "archive", tmp_path / "imported"
    for args in (("convert", str(src), str(clone), "--to", "rocksdb"), ("export", str(src), str(archive)),
                 ("import", str(archive), str(imported), "--to", "rocksdb")):
        proc = run_cli(*args)
        assert proc.returncode == 0, describe(proc)
    _refused(run_cli("import", str(archive), str(tmp_path / "heap2"), "--to", "hdfs"), tmp_path / "heap2")
    assert tree_digest(src) == before, "a command changed the source checkpoint"
    for dst in (clone, imported):
        assert _families(dst) == families, f"{dst.name}: column-family table differs"
        for path in _schema_paths(dst):
            assert str(dst.resolve()) in path and Path(path.split(":", 1)[1]).exists(), f"{dst.name} names {path}"

    sc.write_input_files(input_dir, EVENT_TIME, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = EVENT_TIME.sorted_batches(sc.run_query(spark, EVENT_TIME, input_dir, control, None))
    assert control_out and min(control_out) > last_batch
    assert any(r[1] == "expired" for rows in control_out.values() for r in rows), "no timer fired after the restart"
    src.rename(tmp_path / "src-moved-away")  # nothing converted may still read the source
    new_last = sc.batch_ids_in_commits(control)[-1]
    for dst in (clone, imported):
        out = EVENT_TIME.sorted_batches(sc.run_query(spark, EVENT_TIME, input_dir, dst, None))
        assert out == control_out, f"{dst.name}: continued output differs from the control"
        assert sc.batch_ids_in_commits(dst)[-1] == new_last
        assert_new_versions_written_by(dst, "rocksdb", range(last_batch + 2, new_last + 2))


def test_ttl_and_processing_time_timers_clone_and_continue(spark, tmp_path: Path) -> None:
    input_dir, src = tmp_path / "input", tmp_path / "src"
    for i in range(FIRST_RUN_FILES):
        sc.write_input_file(input_dir, i, PROCESSING_TIME.files[i])
        assert run_once(spark, PROCESSING_TIME, input_dir, src), f"run {i} produced no output"
    families = _families(src)["columnFamilyMapping"]
    assert any(n.startswith("$ttl_") for n in families) and any(n.startswith("$procTimers") for n in families), families
    before = tree_digest(src)
    control, clone = tmp_path / "control", tmp_path / "clone"
    shutil.copytree(src, control)
    proc = run_cli("convert", str(src), str(clone), "--to", "rocksdb")
    assert proc.returncode == 0, describe(proc)
    assert tree_digest(src) == before
    assert _families(clone) == _families(src)

    outs: dict[str, list] = {"control": [], "clone": []}
    for i in range(FIRST_RUN_FILES, TOTAL_FILES):
        sc.write_input_file(input_dir, i, PROCESSING_TIME.files[i])
        outs["control"] += run_once(spark, PROCESSING_TIME, input_dir, control)
    src.rename(tmp_path / "src-moved-away")  # nothing in the clone may still read the source
    outs["clone"] = _replay_runs(spark, input_dir, clone)
    assert outs["control"], "the control restart produced no output"
    assert PROCESSING_TIME.sorted_batches(outs["clone"]) == PROCESSING_TIME.sorted_batches(outs["control"])


def _replay_runs(spark: Any, input_dir: Path, checkpoint: Path) -> list:
    """Run ``checkpoint`` over the files after the first run, one file per micro-batch, like the
    control: the later files are moved aside and brought back one at a time."""
    later = [input_dir / sc.input_file_name(i) for i in range(FIRST_RUN_FILES, TOTAL_FILES)]
    aside = input_dir.parent / "aside"
    aside.mkdir(exist_ok=True)
    for f in later:
        f.rename(aside / f.name)
    out: list = []
    for f in later:
        (aside / f.name).rename(f)
        out += run_once(spark, PROCESSING_TIME, input_dir, checkpoint)
    return out

