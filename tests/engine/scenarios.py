"""Named streaming queries for the real-engine tests, and the runner that drives them.

A scenario is an input schema, a function that turns a file-source stream into the stateful
query, an output mode, the input files (one file per micro-batch) and a way to normalise the
rows it emits so two runs can be compared. The invented data is greenhouse bays reporting sensor
readings.

``run_query`` reads one input file per micro-batch (``maxFilesPerTrigger=1``) with the
available-now trigger, so a run processes exactly the files that are new to its checkpoint and
then stops. It collects ``(batch_id, row)`` for the batches of this run only.

Nothing here reads state through the engine; the engine is only asked to run queries.
"""

from __future__ import annotations

import json
import os
import re
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

HDFS_PROVIDER = "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider"
ROCKSDB_PROVIDER = "org.apache.spark.sql.execution.streaming.state.RocksDBStateStoreProvider"
PROVIDERS = {"hdfs": HDFS_PROVIDER, "rocksdb": ROCKSDB_PROVIDER}
PROVIDER_CONF = "spark.sql.streaming.stateStore.providerClass"

# A fixed, old base time for input-file mtimes. The file source orders new files by modification
# time; giving each numbered file its own mtime (base + n seconds) makes the order of batches
# independent of how fast the files were written.
_MTIME_BASE = 1_700_000_000

Row = tuple[Any, ...]
BatchRows = dict[int, list[Row]]


def engine_version() -> tuple[int, int] | None:
    """(major, minor) of the installed pyspark, or None when it cannot be imported."""
    try:
        import pyspark
    except Exception:  # noqa: BLE001 - ImportError, or a broken install (conftest reports it)
        return None
    major, minor = pyspark.__version__.split(".")[:2]
    return int(major), int(minor)


#: the suite runs under pyspark 3.5.x (second CI venv) instead of 4.x; tests branch on what
#: 3.5 writes differently (tests/fixtures/engine_versions/FINDINGS.md)
ENGINE_35 = engine_version() == (3, 5)
#: the engine family as stateshift names it (``--engine-version``, ``inspect``)
ENGINE_FAMILY = "3.5" if ENGINE_35 else "4.x"


def local_session(app_name: str, scratch: str) -> Any:
    """The engine session every engine test uses (``conftest.spark``, and ``engine35_run`` in the
    3.5 venv): local[2], 2 shuffle partitions, UTC, no UI; ``scratch`` holds its local files.

    State maintenance runs once an hour, so background snapshots and cleanup never touch a
    checkpoint after its query stopped ("source unchanged" then measures the tool, not the engine).
    """
    import sys

    from pyspark.sql import SparkSession

    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    os.environ.setdefault("PYSPARK_DRIVER_PYTHON", sys.executable)
    session = (
        SparkSession.builder.master("local[2]")
        .appName(app_name)
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.driver.memory", "1g")
        .config("spark.sql.shuffle.partitions", "2")
        .config("spark.default.parallelism", "2")
        .config("spark.local.dir", scratch)
        .config("spark.sql.warehouse.dir", os.path.join(scratch, "warehouse"))
        .config("spark.driver.extraJavaOptions", f"-Dderby.system.home={scratch}")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.streaming.stopTimeout", "60s")
        .config("spark.sql.streaming.stateStore.maintenanceInterval", "3600s")
        .config("spark.sql.adaptive.enabled", "false")
        .getOrCreate()
    )
    session.sparkContext.setLogLevel("ERROR")
    return session


def operator_stores(checkpoint: str | os.PathLike) -> dict[int, list[str]]:
    """Operator id -> its store names, as the engine recorded them.

    4.x: from the operator metadata ``state/<op>/_metadata/metadata`` (which must exist). 3.5
    writes no operator metadata (observed; asserted here): the store names are the folders of
    partition 0 (join stores), else the one ``default`` store.
    """
    out = {}
    for op in sorted(Path(checkpoint, "state").iterdir()):
        if not op.name.isdigit():
            continue
        meta_file = op / "_metadata" / "metadata"
        if ENGINE_35:
            assert not meta_file.exists(), f"3.5 wrote operator metadata {meta_file}, which it was never seen to write"
            named = sorted(d.name for d in (op / "0").iterdir() if d.is_dir() and d.name not in ("_metadata", "SSTs"))
            out[int(op.name)] = named or ["default"]
        else:
            meta = meta_file.read_text().split("\n", 1)[1]
            out[int(op.name)] = [s["storeName"] for s in json.loads(meta)["stateStoreInfo"]]
    return out


@dataclass(frozen=True)
class Scenario:
    """One stateful streaming query and the data that drives it.

    ``files`` holds the records of each input file in order; a test uses a prefix of them for the
    first run and the rest for the restart. ``columns`` are the output columns, in the order used
    for comparison.
    """

    name: str
    schema_ddl: str
    build: Callable[[Any], Any]  # DataFrame -> DataFrame (pyspark types, imported lazily)
    output_mode: str
    columns: tuple[str, ...]
    files: tuple[tuple[dict[str, Any], ...], ...]
    float_digits: int = 9
    notes: str = field(default="", compare=False)

    def normalise(self, row: Any) -> Row:
        """A hashable, comparable tuple for one output row (floats rounded, None sorts first)."""
        out = []
        for col in self.columns:
            value = row[col]
            if isinstance(value, float):
                value = round(value, self.float_digits)
            out.append(value)
        return tuple(out)

    def sorted_batches(self, collected: Sequence[tuple[int, Row]]) -> BatchRows:
        """Group normalised rows by batch id and sort each batch; the comparison form."""
        by_batch: BatchRows = {}
        for batch_id, row in collected:
            by_batch.setdefault(batch_id, []).append(row)
        return {b: sorted(rows, key=_sort_key) for b, rows in sorted(by_batch.items())}


def _sort_key(row: Row) -> tuple:
    # None-safe ordering: (is_not_none, value) per field.
    return tuple((v is not None, v if v is not None else 0) for v in row)


# --------------------------------------------------------------------------------------------
# Scenario (a): per (bay, rack) totals with null keys, update mode.

def _build_bay_totals(df: Any) -> Any:
    from pyspark.sql import functions as F

    return df.groupBy("bay", "rack").agg(
        F.count(F.lit(1)).alias("readings"),
        F.sum("moisture").alias("moisture_sum"),
        F.avg("temperature").alias("temperature_avg"),
        F.max("temperature").alias("temperature_max"),
    )


def _reading(bay: str | None, rack: int | None, moisture: int | None, temp: float) -> dict:
    return {"bay": bay, "rack": rack, "moisture": moisture, "temperature": temp}


BAY_TOTALS = Scenario(
    name="bay_totals",
    schema_ddl="bay STRING, rack INT, moisture BIGINT, temperature DOUBLE",
    build=_build_bay_totals,
    output_mode="update",
    columns=("bay", "rack", "readings", "moisture_sum", "temperature_avg", "temperature_max"),
    files=(
        (
            _reading("north", 1, 40, 21.5),
            _reading("north", 2, 38, 22.0),
            _reading("south", 1, 55, 19.25),
            _reading(None, 3, 12, 18.0),
            _reading("east", None, 70, 23.75),
        ),
        (
            _reading("north", 1, 41, 21.0),
            _reading("west", 4, 33, 24.5),
            _reading(None, None, 5, 17.5),
            _reading("south", 1, None, 20.0),
        ),
        (
            _reading("east", None, 71, 25.0),
            _reading("north", 2, 39, 22.25),
            _reading("fern-house", 7, 90, 26.0),
            _reading(None, 3, 14, 18.5),
        ),
        (
            _reading("north", 1, 42, 20.5),
            _reading("west", 4, 30, 24.0),
            _reading(None, None, 6, 16.75),
            _reading("orchid-annex", 9, 61, 27.5),
        ),
        (
            _reading("south", 1, 57, 19.0),
            _reading("east", None, 69, 23.0),
            _reading("fern-house", 7, None, 26.5),
            _reading(None, 3, 15, 18.25),
        ),
    ),
    notes="groupBy(string, int) with null keys; count, sum, avg, max; update mode",
)


# --------------------------------------------------------------------------------------------
# Scenario (b): deduplication of sensor pings with a watermark, append mode.
# Later files repeat earlier ping ids (exact duplicates: same id and event time) and carry late
# events that fall behind the watermark. Every run ends with a no-data batch that only moves the
# watermark and evicts state when the watermark moved (observed), so a run over n files
# usually commits n + 1 batches.

def _build_ping_dedup(df: Any) -> Any:
    return df.withWatermark("event_time", "10 minutes").dropDuplicates(["ping_id", "event_time"])


def _ping(ping_id: str, minute: int, bay: str, level: int) -> dict:
    hh, mm = divmod(minute, 60)
    return {
        "ping_id": ping_id,
        "event_time": f"2031-04-02T{6 + hh:02d}:{mm:02d}:00.000Z",
        "bay": bay,
        "level": level,
    }


_PING_FILES = (
    (
        _ping("p-001", 0, "north", 3),
        _ping("p-002", 1, "south", 5),
        _ping("p-003", 2, "north", 4),
        _ping("p-001", 0, "north", 3),  # duplicate within the same file
    ),
    (
        _ping("p-004", 20, "east", 1),
        _ping("p-002", 1, "south", 5),  # duplicate of file 0 (still inside the watermark)
        _ping("p-005", 21, "west", 2),
    ),
    (
        _ping("p-006", 40, "north", 6),
        _ping("p-004", 20, "east", 1),  # duplicate of file 1
        # behind the max event time seen so far, but the engine drops late rows by the
        # watermark of the batch before (observed), so this one still passes
        _ping("p-007", 3, "south", 2),
    ),
    (
        _ping("p-008", 60, "west", 7),
        _ping("p-006", 40, "north", 6),  # duplicate of file 2, still in state
        _ping("p-009", 5, "east", 4),  # late: behind the watermark, dropped
        _ping("p-010", 45, "north", 3),  # behind the max event time but inside the delay
    ),
    (
        _ping("p-011", 80, "south", 8),
        _ping("p-008", 60, "west", 7),  # duplicate of file 3
        _ping("p-010", 45, "north", 3),  # duplicate of file 3, still in state
        _ping("p-012", 75, "east", 5),
    ),
)

PING_DEDUP = Scenario(
    name="ping_dedup",
    schema_ddl="ping_id STRING, event_time TIMESTAMP, bay STRING, level INT",
    build=_build_ping_dedup,
    output_mode="append",
    columns=("ping_id", "event_time", "bay", "level"),
    files=_PING_FILES,
    notes="withWatermark + dropDuplicates(id, event time); append mode",
)


# --------------------------------------------------------------------------------------------
# Scenario (c): dropDuplicatesWithinWatermark on the ping id alone.

def _build_ping_dedup_within(df: Any) -> Any:
    return df.withWatermark("event_time", "10 minutes").dropDuplicatesWithinWatermark(["ping_id"])


PING_DEDUP_WITHIN = Scenario(
    name="ping_dedup_within_watermark",
    schema_ddl="ping_id STRING, event_time TIMESTAMP, bay STRING, level INT",
    build=_build_ping_dedup_within,
    output_mode="append",
    columns=("ping_id", "event_time", "bay", "level"),
    files=_PING_FILES,
    notes="withWatermark + dropDuplicatesWithinWatermark(id); append mode",
)

SCENARIOS = {s.name: s for s in (BAY_TOTALS, PING_DEDUP, PING_DEDUP_WITHIN)}


# --------------------------------------------------------------------------------------------
# Input files.

def input_file_name(index: int) -> str:
    return f"part-{index:04d}.json"


def write_input_file(input_dir: str | os.PathLike, index: int, records: Sequence[dict]) -> Path:
    """Write numbered input file ``index`` (JSON lines) with a deterministic mtime.

    The file is written under a hidden name first and renamed, so the file source never lists a
    half-written file (names starting with '.' are ignored by the engine's file listing).
    """
    directory = Path(input_dir)
    directory.mkdir(parents=True, exist_ok=True)
    final = directory / input_file_name(index)
    tmp = directory / f".{final.name}.tmp"
    with open(tmp, "w", encoding="utf-8") as fh:
        for rec in records:
            fh.write(json.dumps(rec, sort_keys=True) + "\n")
    stamp = _MTIME_BASE + index
    os.utime(tmp, (stamp, stamp))
    os.replace(tmp, final)
    return final


def write_input_files(
    input_dir: str | os.PathLike, scenario: Scenario, start: int, stop: int
) -> list[Path]:
    """Write the scenario's input files ``start`` .. ``stop - 1``."""
    return [write_input_file(input_dir, i, scenario.files[i]) for i in range(start, stop)]


# --------------------------------------------------------------------------------------------
# Running a query.

def run_query(
    spark: Any,
    scenario: Scenario,
    input_dir: str | os.PathLike,
    checkpoint_dir: str | os.PathLike,
    provider: str | None,
    timeout_s: float = 300.0,
) -> list[tuple[int, Row]]:
    """Run ``scenario`` over the files in ``input_dir`` not yet seen by ``checkpoint_dir``.

    ``provider`` is a short name (``hdfs``/``rocksdb``), a full provider class name, or None. None
    leaves the session conf unset, so a restart runs on whatever provider the checkpoint pins.
    Returns ``(batch_id, normalised_row)`` for every row the sink received in this run, in
    arrival order. Raises if the query fails.
    """
    if provider is None:
        spark.conf.unset(PROVIDER_CONF)
    else:
        spark.conf.set(PROVIDER_CONF, PROVIDERS.get(provider, provider))

    collected: list[tuple[int, Row]] = []
    lock = threading.Lock()

    def sink(batch_df: Any, batch_id: int) -> None:
        rows = [scenario.normalise(r) for r in batch_df.collect()]
        with lock:
            collected.extend((int(batch_id), r) for r in rows)

    stream = (
        spark.readStream.format("json")
        .schema(scenario.schema_ddl)
        .option("maxFilesPerTrigger", 1)
        .load(str(Path(input_dir).resolve()))
    )
    query = (
        scenario.build(stream)
        .writeStream.outputMode(scenario.output_mode)
        .option("checkpointLocation", str(Path(checkpoint_dir).resolve()))
        .trigger(availableNow=True)
        .foreachBatch(sink)
        .start()
    )
    try:
        try:
            finished = query.awaitTermination(timeout_s)
            failure = query.exception()
        except Exception as exc:  # the engine raises the query's own failure here
            finished, failure = True, exc
        if not finished:
            raise TimeoutError(f"query {scenario.name} on {checkpoint_dir} ran over {timeout_s}s")
        if failure is not None:
            raise QueryFailed(f"query {scenario.name} on {checkpoint_dir} failed: {_gist(failure)}")
    finally:
        query.stop()
        if provider is not None:
            spark.conf.unset(PROVIDER_CONF)
    return collected


class QueryFailed(RuntimeError):
    """The engine stopped a scenario's query with an error."""


_ERROR_CLASS = re.compile(r"\[([A-Z][A-Z0-9_]*(?:\.[A-Z0-9_]+)*)\][^\n]*")
_WRAPPERS = {"STREAM_FAILED", "FOREACH_BATCH_USER_FUNCTION_ERROR"}


def _gist(exc: BaseException) -> str:
    """The engine's innermost error class and message, without JVM or Python stack traces."""
    text = str(exc)
    found = [m for m in _ERROR_CLASS.finditer(text) if m.group(1) not in _WRAPPERS]
    line = found[0].group(0) if found else (text.splitlines() or [type(exc).__name__])[0]
    return line.strip()[:1500]


def batch_ids_in_commits(checkpoint_dir: str | os.PathLike) -> list[int]:
    """Batch ids with a commit entry, ascending (commit files are named by batch id)."""
    commits = Path(checkpoint_dir) / "commits"
    return sorted(int(p.name) for p in commits.iterdir() if p.name.isdigit())
