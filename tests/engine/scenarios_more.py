"""More stateful operators for the real-engine tests: windows, joins, per-group state, chains.

Each scenario is a :class:`scenarios.Scenario` (one file-source stream in, one stateful query out,
driven by :func:`scenarios.run_query`). Where a query needs session settings before its first
run (the per-group state format version), :data:`SESSION_CONF` holds them and :func:`run` sets
them around ``run_query``; the engine pins them in the offsets log, so a restart uses the pinned
values whatever the session says.

The invented data: tide buoys reporting wave heights, parcel drones leaving depots and landing
on pads, and the greenhouse pings of ``scenarios.py``.

* ``wave_windows``: ten-minute event-time windows per buoy with a watermark, append mode; windows
  are emitted and their state evicted once the watermark passes their end; late rows are dropped.
* ``drone_inner_join`` / ``drone_left_join``: a stream-stream join (inner / left outer) of
  dispatches and landings with a watermark on each side and a time-range condition; four stores
  per partition. Both sides are filters of the one file source (observed: each offsets entry
  then lists that source twice, one offset per side, with one ``sources/0`` directory).
* ``buoy_pandas_*``: ``applyInPandasWithState`` (the Python form of per-group state). The engine
  honours the per-group state format version for it (observed: v1 stores the state fields flat,
  plus ``timeoutTimestamp`` when a timeout is set; v2 nests them in a ``groupState`` struct).
  Between the Python and the JVM scenarios each API runs both format versions and each timeout
  kind (none, event time, processing time) runs under both versions.
* ``buoy_jvm_*``: the JVM ``flatMapGroupsWithState`` API itself. pyspark has no Python binding for
  it, so the group function is a small Java class compiled in the test JVM with the Janino
  compiler the engine ships (no JDK needed) and added to the session as a jar; the query is then
  built through the JVM Dataset API and handed back to Python as a DataFrame.
* ``ping_dedup_then_windows``: two stateful operators in one query, deduplication followed by a
  windowed count, append mode.

Nothing here reads state through the engine; the engine is only asked to run queries.
"""

from __future__ import annotations

import os
import zipfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import scenarios as sc
from scenarios import Scenario

FMGWS_VERSION_CONF = "spark.sql.streaming.flatMapGroupsWithState.stateFormatVersion"


def _at(minute: int) -> str:
    hh, mm = divmod(minute, 60)
    return f"2032-09-14T{8 + hh:02d}:{mm:02d}:00.000Z"


# --------------------------------------------------------------------------------------------
# Windowed aggregation with a watermark.

def _build_wave_windows(df: Any) -> Any:
    from pyspark.sql import functions as F

    return (
        df.withWatermark("event_time", "10 minutes")
        .groupBy(F.window("event_time", "10 minutes"), "buoy")
        .agg(F.count(F.lit(1)).alias("readings"), F.sum("wave_cm").alias("wave_sum"), F.max("wave_cm").alias("wave_max"))
        .select(F.col("window.start").alias("window_start"), F.col("window.end").alias("window_end"),
                "buoy", "readings", "wave_sum", "wave_max")
    )


def _wave(buoy: str, minute: int, wave_cm: int) -> dict:
    return {"buoy": buoy, "event_time": _at(minute), "wave_cm": wave_cm}


_WAVE_FILES = (
    (_wave("amber", 0, 120), _wave("cobalt", 3, 95), _wave("amber", 8, 130), _wave("cobalt", 9, 101)),
    # watermark after file 0: 8 - 10 < 0; minute 5 is late only by max event time, so kept
    (_wave("amber", 12, 140), _wave("cobalt", 18, 88), _wave("amber", 5, 110), _wave("dune", 15, 60)),
    # watermark -> 19: window [0, 10) closes (emitted, state evicted) in the no-data batch
    (_wave("dune", 25, 72), _wave("amber", 29, 150), _wave("cobalt", 21, 90)),
    # after the restart: minute 3 is behind the watermark (19): dropped; minute 17 still counts
    (_wave("amber", 31, 155), _wave("cobalt", 3, 999), _wave("dune", 17, 64), _wave("cobalt", 38, 93)),
    # watermark -> 42: windows [10, 20), [20, 30) and [30, 40) close
    (_wave("amber", 45, 160), _wave("dune", 52, 80), _wave("cobalt", 33, 999)),
)

WAVE_WINDOWS = Scenario(
    name="wave_windows",
    schema_ddl="buoy STRING, event_time TIMESTAMP, wave_cm BIGINT",
    build=_build_wave_windows,
    output_mode="append",
    columns=("window_start", "window_end", "buoy", "readings", "wave_sum", "wave_max"),
    files=_WAVE_FILES,
    notes="withWatermark + groupBy(window, key); append mode, late rows dropped, windows evicted",
)


# --------------------------------------------------------------------------------------------
# Stream-stream joins: dispatches (left) and landings (right) of parcel drones.

def _join_sides(df: Any) -> tuple[Any, Any]:
    from pyspark.sql import functions as F

    left = (
        df.filter(F.col("kind") == "dispatch")
        .select(F.col("drone").alias("d_drone"), F.col("event_time").alias("d_time"), F.col("place").alias("depot"))
        .withWatermark("d_time", "10 minutes")
    )
    right = (
        df.filter(F.col("kind") == "landing")
        .select(F.col("drone").alias("l_drone"), F.col("event_time").alias("l_time"), F.col("place").alias("pad"))
        .withWatermark("l_time", "10 minutes")
    )
    return left, right


def _join_condition(left: Any, right: Any) -> Any:
    from pyspark.sql import functions as F

    return (
        (left.d_drone == right.l_drone)
        & (right.l_time >= left.d_time)
        & (right.l_time <= left.d_time + F.expr("INTERVAL 20 MINUTES"))
    )


def _build_drone_inner(df: Any) -> Any:
    left, right = _join_sides(df)
    return left.join(right, _join_condition(left, right), "inner")


def _build_drone_left(df: Any) -> Any:
    left, right = _join_sides(df)
    return left.join(right, _join_condition(left, right), "leftOuter")


def _dispatch(drone: str, minute: int, depot: str) -> dict:
    return {"kind": "dispatch", "drone": drone, "event_time": _at(minute), "place": depot}


def _landing(drone: str, minute: int, pad: str) -> dict:
    return {"kind": "landing", "drone": drone, "event_time": _at(minute), "place": pad}


_DRONE_FILES = (
    (
        _dispatch("d-01", 0, "quarry"), _dispatch("d-02", 2, "mill"), _landing("d-01", 5, "pad-3"),
        _dispatch("d-03", 4, "quarry"),
    ),
    (
        _landing("d-02", 15, "pad-1"), _dispatch("d-04", 14, "mill"),
        _landing("d-09", 16, "pad-2"),  # no dispatch for it
        _dispatch("d-01", 13, "quarry"),  # a second trip of the same drone
    ),
    (
        _dispatch("d-05", 30, "harbour"),
        _landing("d-03", 26, "pad-3"),  # too late for d-03 (dispatched at 4, window ends at 24)
        _landing("d-01", 22, "pad-1"),  # matches the second d-01 trip only
    ),
    # after the restart: the landing of d-04 matches a dispatch held in state since file 1
    (
        _landing("d-04", 31, "pad-2"), _dispatch("d-06", 40, "mill"), _landing("d-05", 41, "pad-4"),
        _dispatch("d-08", 5, "quarry"),  # behind the watermark: dropped
    ),
    (
        _dispatch("d-07", 60, "harbour"), _landing("d-06", 62, "pad-1"), _landing("d-07", 61, "pad-4"),
        _landing("d-02", 12, "pad-2"),  # late landing: dropped
    ),
)

_DRONE_COLUMNS = ("d_drone", "d_time", "depot", "l_drone", "l_time", "pad")

DRONE_INNER_JOIN = Scenario(
    name="drone_inner_join",
    schema_ddl="kind STRING, drone STRING, event_time TIMESTAMP, place STRING",
    build=_build_drone_inner,
    output_mode="append",
    columns=_DRONE_COLUMNS,
    files=_DRONE_FILES,
    notes="stream-stream inner join, watermarks on both sides, time-range condition",
)

DRONE_LEFT_JOIN = Scenario(
    name="drone_left_join",
    schema_ddl="kind STRING, drone STRING, event_time TIMESTAMP, place STRING",
    build=_build_drone_left,
    output_mode="append",
    columns=_DRONE_COLUMNS,
    files=_DRONE_FILES,
    notes="stream-stream left outer join; unmatched dispatches come out once the watermark passes",
)


# --------------------------------------------------------------------------------------------
# Per-group state: buoy tallies. The same logic in Python (applyInPandasWithState) and in Java
# (flatMapGroupsWithState): per buoy, a running count and sum of wave heights; with a timeout,
# a buoy silent past its deadline is reported "closed" and its state removed.

_BUOY_SCHEMA = "buoy STRING, event_time TIMESTAMP, wave_cm BIGINT"
_TALLY_COLUMNS = ("buoy", "readings", "wave_sum", "status")
DEADLINE_MS = 15 * 60 * 1000  # event-time timeout: 15 minutes after the buoy's latest reading
# Processing-time timeout: 1 ms of batch time. Consecutive batches are always further apart, so a
# buoy with no reading in the next batch times out there: deterministic in batch terms.
_SILENCE_MS = 1


def _buoy_files() -> tuple[tuple[dict, ...], ...]:
    w = _wave
    return (
        (w("amber", 0, 120), w("cobalt", 3, 95), w("dune", 4, 60), w("amber", 8, 130)),
        (w("amber", 12, 140), w("cobalt", 14, 88), w("ember", 15, 70)),
        # watermark -> 20: dune (deadline 19) times out in the no-data batch
        (w("amber", 30, 150), w("fjord", 28, 55)),
        # after the restart: cobalt (29) and ember (30) time out; dune comes back as a new group
        (w("dune", 41, 66), w("amber", 42, 151), w("cobalt", 2, 999)),
        (w("fjord", 58, 57), w("gale", 60, 81)),
    )


def _tally_pandas(timeout: str) -> Any:
    """The group function for applyInPandasWithState with the given timeout kind."""

    def tally(key: tuple, frames: Iterator[Any], state: Any) -> Iterator[Any]:
        import pandas as pd

        buoy = key[0]
        if state.hasTimedOut:
            readings, wave_sum = state.get
            state.remove()
            yield pd.DataFrame({"buoy": [buoy], "readings": [readings], "wave_sum": [wave_sum], "status": ["closed"]})
            return
        readings, wave_sum = state.get if state.exists else (0, 0)
        latest_ms = None
        for pdf in frames:
            readings += len(pdf)
            wave_sum += int(pdf["wave_cm"].sum())
            newest = int(pd.Timestamp(pdf["event_time"].max()).value // 1_000_000)
            latest_ms = newest if latest_ms is None else max(latest_ms, newest)
        state.update((readings, wave_sum))
        if timeout == "EventTimeTimeout" and latest_ms is not None:
            state.setTimeoutTimestamp(max(latest_ms + DEADLINE_MS, state.getCurrentWatermarkMs() + 1))
        elif timeout == "ProcessingTimeTimeout":
            state.setTimeoutDuration(_SILENCE_MS)
        yield pd.DataFrame({"buoy": [buoy], "readings": [readings], "wave_sum": [wave_sum], "status": ["open"]})

    return tally


def _pandas_builder(timeout: str) -> Any:
    def build(df: Any) -> Any:
        source = df.withWatermark("event_time", "10 minutes") if timeout == "EventTimeTimeout" else df
        return source.groupBy("buoy").applyInPandasWithState(
            _tally_pandas(timeout),
            outputStructType="buoy STRING, readings LONG, wave_sum LONG, status STRING",
            stateStructType="readings LONG, wave_sum LONG",
            outputMode="update",
            timeoutConf=timeout,
        )

    return build


def _pandas_scenario(name: str, timeout: str) -> Scenario:
    return Scenario(
        name=name,
        schema_ddl=_BUOY_SCHEMA,
        build=_pandas_builder(timeout),
        output_mode="update",
        columns=_TALLY_COLUMNS,
        files=_buoy_files(),
        notes=f"groupBy(buoy).applyInPandasWithState, {timeout}",
    )


# --------------------------------------------------------------------------------------------
# The JVM flatMapGroupsWithState API, through a Java class compiled in the test JVM.

JAVA_PACKAGE = "stateshift.enginetests"
JAVA_CLASS = "BuoyTally"
# Janino compiles a subset of Java: no lambdas, type arguments are erased, so raw types and casts.
_JAVA_SOURCE = """
package stateshift.enginetests;

import java.util.ArrayList;
import java.util.Iterator;
import org.apache.spark.api.java.function.FlatMapGroupsWithStateFunction;
import org.apache.spark.api.java.function.MapFunction;
import org.apache.spark.sql.Row;
import org.apache.spark.sql.streaming.GroupState;
import scala.Tuple2;
import scala.Tuple4;

public class BuoyTally {
    /** The group key: the buoy name (column 0 of the input rows). */
    public static class Key implements MapFunction {
        public Object call(Object row) throws Exception {
            return ((Row) row).getString(0);
        }
    }

    /** Running count and sum per buoy; with a timeout, a silent buoy is reported closed. */
    public static class Tally implements FlatMapGroupsWithStateFunction {
        private final long deadlineMs;
        private final boolean eventTime;

        public Tally(long deadlineMs, boolean eventTime) {
            this.deadlineMs = deadlineMs;
            this.eventTime = eventTime;
        }

        public Iterator call(Object key, Iterator values, GroupState state) throws Exception {
            ArrayList out = new ArrayList();
            if (state.hasTimedOut()) {
                Tuple2 old = (Tuple2) state.get();
                state.remove();
                out.add(new Tuple4(key, old._1(), old._2(), "closed"));
                return out.iterator();
            }
            long readings = 0L;
            long waveSum = 0L;
            if (state.exists()) {
                Tuple2 old = (Tuple2) state.get();
                readings = ((Long) old._1()).longValue();
                waveSum = ((Long) old._2()).longValue();
            }
            long latest = Long.MIN_VALUE;
            while (values.hasNext()) {
                Row r = (Row) values.next();
                readings += 1L;
                waveSum += r.getLong(2);
                long t = r.getTimestamp(1).getTime();
                if (t > latest) latest = t;
            }
            state.update(new Tuple2(Long.valueOf(readings), Long.valueOf(waveSum)));
            if (eventTime) {
                long deadline = latest + deadlineMs;
                long floor = state.getCurrentWatermarkMs() + 1L;
                state.setTimeoutTimestamp(deadline > floor ? deadline : floor);
            } else if (deadlineMs > 0L) {
                state.setTimeoutDuration(deadlineMs);
            }
            out.add(new Tuple4(key, Long.valueOf(readings), Long.valueOf(waveSum), "open"));
            return out.iterator();
        }
    }
}
"""


def install_java_functions(spark: Any, workdir: str | os.PathLike) -> Path:
    """Compile the Java group functions with the engine's bundled Janino and add them as a jar.

    Returns the jar path. Adding the same jar twice is harmless; the classes are loaded from the
    session's jar class loader on the driver and from the added jar on the executors.
    """
    jvm = spark._jvm
    compiler = jvm.org.codehaus.janino.SimpleCompiler()
    compiler.setParentClassLoader(spark._jsparkSession.sharedState().jarClassLoader())
    compiler.cook(_JAVA_SOURCE)
    classes = compiler.getBytecodes()
    jar = Path(workdir) / "stateshift-buoy-tally.jar"
    jar.parent.mkdir(parents=True, exist_ok=True)
    with zipfile.ZipFile(jar, "w") as z:
        z.writestr("META-INF/MANIFEST.MF", "Manifest-Version: 1.0\n")
        for name in classes.keySet():
            z.writestr(name.replace(".", "/") + ".class", bytes(classes.get(name)))
    spark.sql(f"ADD JAR '{jar}'")
    return jar


def _java_instance(spark: Any, name: str, *args: Any) -> Any:
    jvm = spark._jvm
    gateway = spark.sparkContext._gateway
    loader = spark._jsparkSession.sharedState().jarClassLoader()
    cls = jvm.java.lang.Class.forName(f"{JAVA_PACKAGE}.{JAVA_CLASS}${name}", True, loader)
    if not args:
        return cls.getDeclaredConstructor(gateway.new_array(jvm.java.lang.Class, 0)).newInstance(
            gateway.new_array(jvm.java.lang.Object, 0)
        )
    ctor = cls.getConstructors()[0]
    values = gateway.new_array(jvm.java.lang.Object, len(args))
    for i, a in enumerate(args):
        values[i] = a
    return ctor.newInstance(values)


def _jvm_builder(timeout: str) -> Any:
    def build(df: Any) -> Any:
        from pyspark.sql import DataFrame

        spark = df.sparkSession
        jvm = spark._jvm
        enc = jvm.org.apache.spark.sql.Encoders
        timeouts = jvm.org.apache.spark.sql.streaming.GroupStateTimeout
        source = df.withWatermark("event_time", "10 minutes") if timeout == "EventTimeTimeout" else df
        deadline = {"EventTimeTimeout": DEADLINE_MS, "ProcessingTimeTimeout": _SILENCE_MS}.get(timeout, 0)
        tally = _java_instance(spark, "Tally", jvm.java.lang.Long(deadline), jvm.java.lang.Boolean(timeout == "EventTimeTimeout"))
        grouped = source._jdf.groupByKey(_java_instance(spark, "Key"), enc.STRING())
        result = grouped.flatMapGroupsWithState(
            tally,
            jvm.org.apache.spark.sql.streaming.OutputMode.Update(),
            enc.tuple(enc.LONG(), enc.LONG()),
            enc.tuple(enc.STRING(), enc.LONG(), enc.LONG(), enc.STRING()),
            getattr(timeouts, timeout)(),
        )
        return DataFrame(result.toDF(), spark).toDF(*_TALLY_COLUMNS)

    return build


def _jvm_scenario(name: str, timeout: str) -> Scenario:
    return Scenario(
        name=name,
        schema_ddl=_BUOY_SCHEMA,
        build=_jvm_builder(timeout),
        output_mode="update",
        columns=_TALLY_COLUMNS,
        files=_buoy_files(),
        notes=f"groupByKey(buoy).flatMapGroupsWithState (JVM API), {timeout}",
    )


# --------------------------------------------------------------------------------------------
# Two stateful operators chained: deduplication, then a windowed count (append mode).

def _build_dedup_then_windows(df: Any) -> Any:
    from pyspark.sql import functions as F

    return (
        df.withWatermark("event_time", "10 minutes")
        .dropDuplicates(["ping_id", "event_time"])
        .groupBy(F.window("event_time", "20 minutes"), "bay")
        .agg(F.count(F.lit(1)).alias("pings"), F.sum("level").alias("level_sum"))
        .select(F.col("window.start").alias("window_start"), "bay", "pings", "level_sum")
    )


PING_DEDUP_THEN_WINDOWS = Scenario(
    name="ping_dedup_then_windows",
    schema_ddl="ping_id STRING, event_time TIMESTAMP, bay STRING, level INT",
    build=_build_dedup_then_windows,
    output_mode="append",
    columns=("window_start", "bay", "pings", "level_sum"),
    files=sc.PING_DEDUP.files,
    notes="dropDuplicates then groupBy(window, bay) in one query; two state operators; append mode",
)


# --------------------------------------------------------------------------------------------

# Per-group state: each API with both state format versions, each timeout kind with both.
BUOY_PANDAS_PLAIN_V1 = _pandas_scenario("buoy_pandas_no_timeout_v1", "NoTimeout")
BUOY_PANDAS_EVENT_V2 = _pandas_scenario("buoy_pandas_event_timeout_v2", "EventTimeTimeout")
BUOY_PANDAS_PROC_V1 = _pandas_scenario("buoy_pandas_processing_timeout_v1", "ProcessingTimeTimeout")
BUOY_JVM_PLAIN_V2 = _jvm_scenario("buoy_jvm_no_timeout_v2", "NoTimeout")
BUOY_JVM_EVENT_V1 = _jvm_scenario("buoy_jvm_event_timeout_v1", "EventTimeTimeout")
BUOY_JVM_PROC_V2 = _jvm_scenario("buoy_jvm_processing_timeout_v2", "ProcessingTimeTimeout")
# Under 3.5 a processing-time timeout never lets an available-now run finish (observed: every
# batch schedules another no-data batch; FINDINGS.md), so there the processing-time scenarios are
# replaced by event-time ones with the other state format version: each API still runs both
# format versions with a timeout.
BUOY_PANDAS_EVENT_V1 = _pandas_scenario("buoy_pandas_event_timeout_v1", "EventTimeTimeout")
BUOY_JVM_EVENT_V2 = _jvm_scenario("buoy_jvm_event_timeout_v2", "EventTimeTimeout")

SCENARIOS = {
    s.name: s
    for s in (
        WAVE_WINDOWS,
        DRONE_INNER_JOIN,
        DRONE_LEFT_JOIN,
        BUOY_PANDAS_PLAIN_V1,
        BUOY_PANDAS_EVENT_V2,
        BUOY_PANDAS_EVENT_V1 if sc.ENGINE_35 else BUOY_PANDAS_PROC_V1,
        BUOY_JVM_PLAIN_V2,
        BUOY_JVM_EVENT_V1,
        BUOY_JVM_EVENT_V2 if sc.ENGINE_35 else BUOY_JVM_PROC_V2,
        PING_DEDUP_THEN_WINDOWS,
    )
}

NO_DATA_BATCHES_CONF = "spark.sql.streaming.noDataMicroBatches.enabled"
FORMAT_VALIDATION_CONF = "spark.sql.streaming.stateStore.formatValidation.enabled"


CODEC_CONF = "spark.sql.streaming.stateStore.compression.codec"
# Each scenario's heap-map files use one of the engine's four state codecs (pinned at the first
# start), so every codec is proven under several operators; lz4 (the default) once more besides.
STATE_CODECS = ("zstd", "snappy", "lzf", "lz4")
SCENARIO_CODEC: dict[str, str] = {name: STATE_CODECS[i % len(STATE_CODECS)] for i, name in enumerate(SCENARIOS)}


def _session_conf(name: str) -> dict[str, str]:
    conf: dict[str, str] = {CODEC_CONF: SCENARIO_CODEC[name]}
    if name.startswith("buoy_"):
        conf[FMGWS_VERSION_CONF] = name[-1]
    if "processing_timeout" in name:
        # With a processing-time timeout the engine asks for another (no-data) batch after every
        # batch (observed: an available-now run never ends), so no-data batches are turned off.
        conf[NO_DATA_BATCHES_CONF] = "false"
    if name.endswith("_v1") and "no_timeout" not in name:
        # Format version 1 with a timeout declares `timeoutTimestamp` as an integer in the state
        # schema but stores an 8-byte epoch-millisecond value (observed on 4.3.0); the engine's
        # own restart then fails its value-row check (STATE_STORE_VALUE_ROW_FORMAT_VALIDATION_
        # FAILURE) even on an untouched checkpoint, so the check is turned off for these.
        conf[FORMAT_VALIDATION_CONF] = "false"
    return conf


# Session settings a scenario's runs need; the engine pins some of them in the offsets log.
SESSION_CONF: dict[str, dict[str, str]] = {name: _session_conf(name) for name in SCENARIOS}


def run(spark: Any, scenario: Scenario, input_dir: Any, checkpoint_dir: Any, provider: str | None) -> list:
    """``scenarios.run_query`` with the scenario's session settings set for the run."""
    with _session_conf_set(spark, scenario):
        return sc.run_query(spark, scenario, input_dir, checkpoint_dir, provider)


def restart_many(spark: Any, scenario: Scenario, runs: list[tuple[Any, Any]]) -> list[list]:
    """Restart the scenario on several ``(input_dir, checkpoint)`` at once, one query each in the
    one session, on the provider each checkpoint pins; the outputs in ``runs`` order.

    The queries share nothing but read-only inputs, so running them side by side changes no
    result, it only overlaps the engine's per-batch waiting. The engine refuses two running
    queries with the same query id, so the checkpoints must belong to different queries. The
    provider is never set here (it is one session-wide setting), which is why only restarts run
    side by side.
    """
    from concurrent.futures import ThreadPoolExecutor

    with _session_conf_set(spark, scenario), ThreadPoolExecutor(max_workers=len(runs)) as pool:
        futures = [pool.submit(sc.run_query, spark, scenario, i, c, None) for i, c in runs]
        return [f.result() for f in futures]


class _session_conf_set:
    """Set the scenario's session settings for a ``with`` block, then restore the old values."""

    def __init__(self, spark: Any, scenario: Scenario) -> None:
        self.spark, self.conf = spark, SESSION_CONF.get(scenario.name, {})

    def __enter__(self) -> None:
        self.previous = {k: self.spark.conf.get(k, None) for k in self.conf}
        for k, v in self.conf.items():
            self.spark.conf.set(k, v)

    def __exit__(self, *exc: object) -> None:
        for k, v in self.previous.items():
            if v is None:
                self.spark.conf.unset(k)
            else:
                self.spark.conf.set(k, v)


# --------------------------------------------------------------------------------------------
# For each scenario, one row of the continued run (files 3 and 4) that only state written before
# a move can explain: a window, join match, tally or timeout that mixes rows from both sides of
# the restart. A test asserts the control's continued output holds it, so a scenario cannot
# silently stop exercising its state.

def _local(stamp: str) -> Any:
    """The naive datetime pyspark returns for an ISO UTC timestamp (it converts to local time)."""
    from datetime import datetime

    return datetime.fromtimestamp(datetime.fromisoformat(stamp.replace("Z", "+00:00")).timestamp())


CARRIED: dict[str, tuple] = {
    # dune: minute 15 (file 1) + minute 17 (file 3) in window [10, 20)
    "wave_windows": (_local(_at(10)), _local(_at(20)), "dune", 2, 124, 64),
    # the landing of d-04 (file 3) matches its dispatch from file 1
    "drone_inner_join": ("d-04", _local(_at(14)), "mill", "d-04", _local(_at(31)), "pad-2"),
    # d-03 (file 0) never landed in time: emitted unmatched once the watermark passes
    "drone_left_join": ("d-03", _local(_at(4)), "quarry", None, None, None),
    # amber: four readings before the move, one after
    "buoy_pandas_no_timeout_v1": ("amber", 5, 691, "open"),
    "buoy_jvm_no_timeout_v2": ("amber", 5, 691, "open"),
    # cobalt's event-time deadline (stored before the move) passes after it
    "buoy_pandas_event_timeout_v2": ("cobalt", 2, 183, "closed"),
    "buoy_jvm_event_timeout_v1": ("cobalt", 2, 183, "closed"),
    "buoy_pandas_event_timeout_v1": ("cobalt", 2, 183, "closed"),
    "buoy_jvm_event_timeout_v2": ("cobalt", 2, 183, "closed"),
    # fjord's processing-time deadline (stored before the move) has passed at the first new batch
    "buoy_pandas_processing_timeout_v1": ("fjord", 1, 55, "closed"),
    "buoy_jvm_processing_timeout_v2": ("fjord", 1, 55, "closed"),
    # north [40, 60): p-006 counted once (its repeat in file 3 is a duplicate by dedup state) + p-010
    "ping_dedup_then_windows": (_local("2031-04-02T06:40:00.000Z"), "north", 2, 9),
}
