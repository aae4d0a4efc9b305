"""Run a scenario once under another pyspark (the 3.5 venv), as a child process.

    python engine35_run.py MODULE NAME INPUT_DIR CHECKPOINT PROVIDER

``MODULE`` is ``scenarios``, ``scenarios_more``, ``scenarios_upgrade`` or
``test_session_window_engine``, ``NAME`` a scenario of it; the query runs once over the input files the caller wrote into ``INPUT_DIR`` not yet seen by
``CHECKPOINT``, on ``PROVIDER`` (``hdfs``/``rocksdb``; ``-`` for the one the checkpoint pins).
Prints ``{"pyspark": version, "rows": [[batch, [values as str]], ...]}`` on the last line.
The session matches ``conftest.spark`` (local[2], 2 shuffle partitions, UTC, maintenance 3600 s).
Only the engine runs here; nothing reads state.
"""

from __future__ import annotations

import importlib
import json
import shutil
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))


def main(argv: list[str]) -> int:
    module, name, input_dir, checkpoint, provider = argv
    provider = None if provider == "-" else provider
    import pyspark
    import scenarios as sc

    scratch = tempfile.mkdtemp(prefix="stateshift-spark35-")
    spark = sc.local_session("stateshift-engine35-run", scratch)
    try:
        mod = importlib.import_module(module)
        if name.startswith("buoy_jvm"):  # the JVM group functions: compiled into this session
            mod.install_java_functions(spark, Path(scratch) / "java")
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
