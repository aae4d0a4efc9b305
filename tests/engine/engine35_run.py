"""Run a scenario once under another pyspark (the 3.5 venv), as a child process.

    python engine35_run.py MODULE NAME INPUT_DIR CHECKPOINT PROVIDER

``MODULE`` is ``scenarios``, ``scenarios_more`` or ``scenarios_upgrade``, ``NAME`` a scenario of
it; the query runs once over the input files the caller wrote into ``INPUT_DIR`` not yet seen by
``CHECKPOINT``, on ``PROVIDER`` (``hdfs``/``rocksdb``; ``-`` for the one the checkpoint pins).
Prints ``{"pyspark": version, "rows": [[batch, [values as str]], ...]}`` on the last line.
The session matches ``conftest.spark`` (local[2], 2 shuffle partitions, UTC, maintenance 3600 s).
Only the engine runs here; nothing reads state.
"""

from __future__ import annotations

import importlib
import json
import os
import shutil
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))


def main(argv: list[str]) -> int:
    module, name, input_dir, checkpoint, provider = argv
    provider = None if provider == "-" else provider
    import pyspark
    from pyspark.sql import SparkSession

    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    os.environ.setdefault("PYSPARK_DRIVER_PYTHON", sys.executable)
    scratch = tempfile.mkdtemp(prefix="stateshift-spark35-")
    spark = (
        SparkSession.builder.master("local[2]")
        .appName("stateshift-engine35-run")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.driver.memory", "1g")
        .config("spark.sql.shuffle.partitions", "2")
        .config("spark.default.parallelism", "2")
        .config("spark.local.dir", scratch)
        .config("spark.sql.warehouse.dir", os.path.join(scratch, "warehouse"))
        .config("spark.driver.extraJavaOptions", f"-Dderby.system.home={scratch}")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.streaming.stateStore.maintenanceInterval", "3600s")
        .config("spark.sql.adaptive.enabled", "false")
        .getOrCreate()
    )
    spark.sparkContext.setLogLevel("ERROR")
    try:
        import scenarios as sc

        mod = importlib.import_module(module)
        if hasattr(mod, "run_named"):
            out = mod.run_named(spark, name, input_dir, checkpoint, provider)
        else:
            run = getattr(mod, "run", None) or sc.run_query
            out = run(spark, mod.SCENARIOS[name], input_dir, checkpoint, provider)
    finally:
        spark.stop()
        shutil.rmtree(scratch, ignore_errors=True)
    rows = [[b, [None if v is None else str(v) for v in row]] for b, row in out]
    print(json.dumps({"pyspark": pyspark.__version__, "rows": rows}))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
