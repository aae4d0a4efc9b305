"""Time the engine's own load of a generated heap-map state (test-side only: runs pyspark).

    python -m benchmarks.engine_load benchmarks/data/narrow-1m-p64-hdfs --shape narrow

The generated checkpoints are the state of a streaming aggregation (``rowgen.py``), so the engine
can restart that query on a copy of one: one new input file with a single row makes it run one
micro-batch whose stateful tasks each load their partition's state (newest snapshot plus
deltas, the same files ``stateshift convert`` reads). The same query is first run on an empty
checkpoint with the same number of partitions (which also warms the JVM); the difference of the
two batch durations (``durationMs.addBatch`` of the query progress) is the engine's load time.
The batch on the state runs ``--repeat`` times (default 3), each on a fresh copy of the
checkpoint (a state store provider keeps what it loaded for its location, so a second batch on
the same copy would load nothing), and the median counts: a single batch at 1M keys, whose load
is about a second, moved by 0.5-1.2 s between runs, with the JVM's first load of the state
classes in it.

The new row updates a key of the generated state, and the count the engine emits for it must be
the generated count plus one: proof that the engine really loaded the state. Prints one JSON line: ``{"load_s": ..., "batch_s": ..., "empty_batch_s": ..., "note": ...}``.
Nothing here reads state through the engine's state readers: the engine only runs the query.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import sys
import time
from pathlib import Path

QUERIES = {
    "narrow": ("sensor STRING, sensor_id BIGINT, reading BIGINT",
               lambda F: [F.count("*"), F.sum("reading"), F.max("reading"), F.min("reading")]),
    "wide": ("sensor STRING, sensor_id BIGINT, label STRING, zone STRING, reading BIGINT, ts BIGINT, recent ARRAY<BIGINT>",
             lambda F: [F.max("label"), F.max("zone"), F.count("*"), F.sum("reading"), F.max("ts"), F.max("recent")]),
}


READING = 3


def _row(shape: str, sensor: str, sensor_id: int) -> dict:
    row = {"sensor": sensor, "sensor_id": sensor_id, "reading": READING}
    if shape == "wide":
        row.update({"label": "a", "zone": "a", "ts": 1, "recent": [0]})
    return row


def existing_key(info: dict) -> tuple[str, int, int]:
    """(sensor, sensor id, count held in the state) of generated key 0, which is never removed."""
    import numpy as np

    from . import rowgen
    from .generate import Params, born_version, died_version, last_written

    p = Params(**info["params"])
    ids = np.zeros(1, np.int64)
    version = last_written(ids, born_version(ids, p), died_version(ids, p), p)
    cols = rowgen.key_columns(ids, p.seed).to_pylist()[0]
    # by field, not to_pylist(): the wide aggregate names several buffer fields "max"
    count = rowgen.value_columns(p.shape, ids, version, p.seed).field("count")[0].as_py()
    return cols["sensor"], cols["sensor_id"], count


def _run_batch(spark, shape: str, checkpoint: Path, input_dir: Path, key: tuple[str, int]) -> tuple[float, int]:
    """Run one micro-batch with one row for ``key``; (addBatch seconds, the count it emits)."""
    from pyspark.sql import functions as F

    schema, aggs = QUERIES[shape]
    input_dir.mkdir(parents=True, exist_ok=True)
    (input_dir / f"part-new-{time.monotonic_ns()}.json").write_text(json.dumps(_row(shape, *key)) + "\n")
    df = spark.readStream.schema(schema).json(str(input_dir)).groupBy("sensor", "sensor_id").agg(*aggs(F))
    count_col = [c for c in df.columns if c.startswith("count")][0]
    seen: list[int] = []
    q = (df.writeStream.outputMode("update").option("checkpointLocation", str(checkpoint))
         .foreachBatch(lambda batch, _id: seen.extend(r[count_col] for r in batch.collect()))
         .trigger(availableNow=True).start())
    q.awaitTermination()
    progress = [p for p in q.recentProgress if p.get("numInputRows", 0) > 0]
    if not progress or len(seen) != 1:
        raise SystemExit(f"the engine ran no batch with the new row (emitted {seen})")
    return progress[-1]["durationMs"]["addBatch"] / 1000, seen[0]


def _relocate_input(checkpoint: Path, old_input: Path, new_input: Path) -> None:
    """Copy the input files and point the copied sources log at them (the engine re-plans the
    last committed batch on restart and wants its files under the query's input path)."""
    from migrate.codecs.hadoop_crc import crc_name, make_crc

    shutil.copytree(old_input, new_input)
    old_uri, new_uri = old_input.resolve().as_uri(), new_input.resolve().as_uri()
    for entry in (checkpoint / "sources" / "0").iterdir():
        if entry.name.isdigit():
            data = entry.read_bytes().replace(old_uri.encode(), new_uri.encode())
            entry.write_bytes(data)
            (entry.parent / crc_name(entry.name)).write_bytes(make_crc(data))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.engine_load")
    ap.add_argument("checkpoint", type=Path)
    ap.add_argument("--shape", default="narrow", choices=tuple(QUERIES))
    ap.add_argument("--scratch", type=Path, required=True)
    ap.add_argument("--memory", default=None, help="driver memory (default: from the checkpoint size)")
    ap.add_argument("--repeat", type=int, default=3, help="batches on the state, each on its own copy (default 3; the median counts)")
    args = ap.parse_args(argv)
    info = json.loads((args.checkpoint.parent / f"{args.checkpoint.name}.bench.json").read_text())
    partitions = int(info["params"]["partitions"])
    memory = args.memory or f"{min(12, 2 + info['rows'] // 1_000_000)}g"
    shutil.rmtree(args.scratch, ignore_errors=True)
    args.scratch.mkdir(parents=True)
    if args.repeat < 1:
        raise SystemExit("--repeat must be at least 1")

    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    from pyspark.sql import SparkSession

    spark = (
        SparkSession.builder.master("local[2]").appName("stateshift-bench-engine-load")
        .config("spark.ui.enabled", "false").config("spark.ui.showConsoleProgress", "false")
        .config("spark.driver.memory", memory).config("spark.sql.shuffle.partitions", str(partitions))
        .config("spark.sql.adaptive.enabled", "false").config("spark.local.dir", str(args.scratch / "local"))
        .config("spark.sql.warehouse.dir", str(args.scratch / "warehouse"))
        .config("spark.sql.streaming.stateStore.maintenanceInterval", "3600s")
        .getOrCreate()
    )
    spark.sparkContext.setLogLevel("ERROR")
    sensor, sensor_id, count = existing_key(info)
    fulls: list[float] = []
    try:
        empty = min(_run_batch(spark, args.shape, args.scratch / f"empty-{i}", args.scratch / f"empty-input-{i}",
                               (sensor, sensor_id))[0] for i in range(2))
        for i in range(args.repeat):  # one copy on disk at a time
            copy, input_dir = args.scratch / f"checkpoint-{i}", args.scratch / f"input-{i}"
            shutil.copytree(args.checkpoint, copy)
            _relocate_input(copy, args.checkpoint.parent / f"{args.checkpoint.name}.input", input_dir)
            full, emitted = _run_batch(spark, args.shape, copy, input_dir, (sensor, sensor_id))
            if emitted != count + 1:  # the engine really continued from the generated state
                raise SystemExit(f"the engine emitted count {emitted} for key 0, the generated state holds {count} (+1 expected)")
            fulls.append(full)
            shutil.rmtree(copy)
            shutil.rmtree(input_dir)
    finally:
        spark.stop()
        shutil.rmtree(args.scratch, ignore_errors=True)
    full = statistics.median(fulls)
    print(json.dumps({"load_s": round(full - empty, 3), "batch_s": full, "batches_s": fulls, "empty_batch_s": empty,
                      "note": f"engine: local[2], driver memory {memory}; load = median of {len(fulls)} batches on fresh "
                              f"copies of the state ({', '.join(f'{f:.2f}' for f in fulls)} s) - batch on empty state "
                              f"({empty:.2f} s); each continued key 0 from count {count} to {count + 1}"}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
