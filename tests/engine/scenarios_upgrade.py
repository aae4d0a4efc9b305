"""A stream-stream join over two file sources, for the 3.5 -> 4.x upgrade test.

Unlike ``scenarios_more.drone_*`` (both sides filtered out of one source), the two sides here are
two file sources joined on differently named key columns, the shape whose 3.5 state schema 4.3.0
refuses to continue (observed: engine 3.5 declares the left side's ``buoy`` and ``ping_time``
non-null in the value schema of ``keyWithIndexToValue``, 4.3.0 nullable;
``tests/fixtures/engine_versions/FINDINGS.md``). Invented data: buoys ping, wave gauges read.

``write_inputs(root, start, stop)`` writes input files ``start .. stop-1`` of both sides under
``root/left`` and ``root/right``; ``run_named(spark, name, root, checkpoint, provider)`` runs the
query once (available now, one file per side per micro-batch) and returns ``(batch, row)`` pairs.
Nothing here reads state through the engine.
"""

from __future__ import annotations

import threading
from pathlib import Path
from typing import Any

import scenarios as sc

NAME = "buoy_gauge_join"
COLUMNS = ("buoy", "ping_time", "battery", "read_time", "wave_cm")


def _ts(minute: int) -> str:
    hh, mm = divmod(minute, 60)
    return f"2034-03-05T{6 + hh:02d}:{mm:02d}:00.000Z"


PINGS = (
    ({"buoy": "b-7", "ping_time": _ts(0), "battery": 91}, {"buoy": "b-9", "ping_time": _ts(1), "battery": 64}),
    ({"buoy": "b-7", "ping_time": _ts(20), "battery": 90}, {"buoy": "b-3", "ping_time": _ts(21), "battery": 77}),
    ({"buoy": "b-9", "ping_time": _ts(45), "battery": 60}, {"buoy": "b-5", "ping_time": _ts(44), "battery": 50}),
    ({"buoy": "b-3", "ping_time": _ts(70), "battery": 75},),
    ({"buoy": "b-5", "ping_time": _ts(90), "battery": 49},),
)
READINGS = (
    ({"rbuoy": "b-7", "read_time": _ts(2), "wave_cm": 40},),
    ({"rbuoy": "b-9", "read_time": _ts(3), "wave_cm": 55}, {"rbuoy": "b-3", "read_time": _ts(22), "wave_cm": 31}),
    ({"rbuoy": "b-7", "read_time": _ts(23), "wave_cm": 42}, {"rbuoy": "b-9", "read_time": _ts(47), "wave_cm": 58}),
    # after the move: b-5's reading matches its ping from before it (file 2)
    ({"rbuoy": "b-3", "read_time": _ts(71), "wave_cm": 30}, {"rbuoy": "b-5", "read_time": _ts(46), "wave_cm": 27}),
    ({"rbuoy": "b-5", "read_time": _ts(92), "wave_cm": 25},),
)


def write_inputs(root: str | Path, start: int, stop: int) -> None:
    for i in range(start, stop):
        sc.write_input_file(Path(root) / "left", i, PINGS[i])
        sc.write_input_file(Path(root) / "right", i, READINGS[i])


def run_named(spark: Any, name: str, root: str | Path, checkpoint: str | Path, provider: str | None) -> list:
    assert name == NAME, name
    from pyspark.sql import functions as F

    if provider is None:
        spark.conf.unset(sc.PROVIDER_CONF)
    else:
        spark.conf.set(sc.PROVIDER_CONF, sc.PROVIDERS[provider])

    def side(folder: str, ddl: str, stamp: str) -> Any:
        stream = spark.readStream.format("json").schema(ddl).option("maxFilesPerTrigger", 1).load(str((Path(root) / folder).resolve()))
        return stream.withWatermark(stamp, "10 minutes")

    left = side("left", "buoy STRING, ping_time TIMESTAMP, battery INT", "ping_time")
    right = side("right", "rbuoy STRING, read_time TIMESTAMP, wave_cm INT", "read_time")
    cond = F.expr("buoy = rbuoy AND read_time >= ping_time AND read_time <= ping_time + interval 5 minutes")
    joined = left.join(right, cond, "inner").select(*COLUMNS)
    collected: list = []
    lock = threading.Lock()

    def sink(df: Any, batch_id: int) -> None:
        rows = [tuple(r[c] for c in COLUMNS) for r in df.collect()]
        with lock:
            collected.extend((int(batch_id), r) for r in rows)

    query = (
        joined.writeStream.outputMode("append").option("checkpointLocation", str(Path(checkpoint).resolve()))
        .trigger(availableNow=True).foreachBatch(sink).start()
    )
    try:
        try:
            query.awaitTermination(300)
            failure = query.exception()
        except Exception as exc:  # the engine raises the query's own failure here
            failure = exc
        if failure is not None:
            raise sc.QueryFailed(f"{NAME} on {checkpoint} failed: {sc._gist(failure)}")
    finally:
        query.stop()
        if provider is not None:
            spark.conf.unset(sc.PROVIDER_CONF)
    return collected
