"""Regenerate the small demo checkpoints in this folder by running the real engine.

Invented scenario: the bays of a greenhouse report sensor readings. Two queries:

* ``greenhouse_totals``: per (bay, rack) reading count, moisture sum, average and maximum
  temperature (a streaming aggregation, update mode; some readings have no bay or no rack);
* ``sensor_pings``: pings deduplicated on (ping id, event time) under a 10-minute watermark, and
  the same pings deduplicated on the id alone within the watermark.

Each checkpoint has processed three input files, one per micro-batch. The files it read are in
``<query>_input/``; the two files that continue the stream are in ``<query>_input_next/``. What
the sink received in each batch is saved as ``<checkpoint>.outputs.json`` beside the checkpoint.

Run from anywhere: ``/work/venv/bin/python demo_checkpoints/generate.py``. Needs pyspark and Java
(this is a test-side tool; the stateshift tool itself never runs the engine). Regenerating changes
query ids, timestamps and RocksDB file names; the state content stays the same.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests" / "engine"))

import scenarios as sc  # noqa: E402  (the engine tests' scenarios; one definition of the data)

FIRST_FILES = 3
SIZE_LIMIT = 300 * 1024  # bytes per checkpoint; keeps the repository small


@dataclass(frozen=True)
class Demo:
    name: str  # checkpoint directory
    stream: str  # input directory stem, shared by checkpoints of the same input
    scenario: sc.Scenario
    provider: str
    shuffle_partitions: int


DEMOS = (
    Demo("greenhouse_totals_hdfs", "greenhouse_totals", sc.BAY_TOTALS, "hdfs", 2),
    Demo("greenhouse_totals_rocksdb", "greenhouse_totals", sc.BAY_TOTALS, "rocksdb", 2),
    Demo("sensor_pings_dedup_hdfs", "sensor_pings", sc.PING_DEDUP, "hdfs", 3),
    Demo("sensor_pings_dedup_rocksdb", "sensor_pings", sc.PING_DEDUP, "rocksdb", 3),
    Demo(
        "sensor_pings_within_watermark_hdfs", "sensor_pings", sc.PING_DEDUP_WITHIN, "hdfs", 4
    ),
)


def _tree_size(root: Path) -> int:
    return sum(p.stat().st_size for p in root.rglob("*") if p.is_file())


def _jsonable(value):
    if isinstance(value, _dt.datetime):  # naive, in the process time zone, set to UTC in main()
        return value.isoformat() + "Z"
    return value


def _outputs_json(scenario: sc.Scenario, rows: list) -> str:
    """The sink's rows per batch: one JSON row per line, sorted within each batch."""
    batches = scenario.sorted_batches(rows)
    lines = [
        "{",
        f' "query": {json.dumps(scenario.notes)},',
        f' "columns": {json.dumps(list(scenario.columns))},',
        ' "batches": {',
    ]
    for i, (batch_id, batch_rows) in enumerate(batches.items()):
        body = ",\n".join("   " + json.dumps([_jsonable(v) for v in r]) for r in batch_rows)
        comma = "," if i + 1 < len(batches) else ""
        lines.append(f'  "{batch_id}": [\n{body}\n  ]{comma}')
    lines += [" }", "}"]
    text = "\n".join(lines) + "\n"
    json.loads(text)  # must stay valid JSON
    return text


def _spark(scratch: str):
    from pyspark.sql import SparkSession

    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    os.environ.setdefault("PYSPARK_DRIVER_PYTHON", sys.executable)
    session = (
        SparkSession.builder.master("local[2]")
        .appName("stateshift-demo-checkpoints")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.driver.memory", "1g")
        .config("spark.local.dir", scratch)
        .config("spark.sql.warehouse.dir", os.path.join(scratch, "warehouse"))
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.adaptive.enabled", "false")
        .config("spark.sql.streaming.stateStore.maintenanceInterval", "3600s")
        .getOrCreate()
    )
    session.sparkContext.setLogLevel("ERROR")
    return session


def main() -> int:
    os.environ["TZ"] = "UTC"  # timestamps come back to Python as naive local times
    time.tzset()
    streams = {d.stream: d.scenario for d in DEMOS}
    for stream, scenario in streams.items():
        for suffix in ("_input", "_input_next"):
            shutil.rmtree(HERE / f"{stream}{suffix}", ignore_errors=True)
        sc.write_input_files(HERE / f"{stream}_input", scenario, 0, FIRST_FILES)
        sc.write_input_files(
            HERE / f"{stream}_input_next", scenario, FIRST_FILES, len(scenario.files)
        )

    scratch = tempfile.mkdtemp(prefix="stateshift-demo-")
    spark = _spark(scratch)
    try:
        for demo in DEMOS:
            target = HERE / demo.name
            shutil.rmtree(target, ignore_errors=True)
            spark.conf.set("spark.sql.shuffle.partitions", str(demo.shuffle_partitions))
            rows = sc.run_query(
                spark, demo.scenario, HERE / f"{demo.stream}_input", target, demo.provider
            )
            (HERE / f"{demo.name}.outputs.json").write_text(
                _outputs_json(demo.scenario, rows), encoding="utf-8"
            )
            size = _tree_size(target)
            print(f"{demo.name}: {len(sc.batch_ids_in_commits(target))} batches, {size} bytes")
            if size > SIZE_LIMIT:
                print(f"{demo.name}: larger than {SIZE_LIMIT} bytes", file=sys.stderr)
                return 1
    finally:
        spark.stop()
        shutil.rmtree(scratch, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
