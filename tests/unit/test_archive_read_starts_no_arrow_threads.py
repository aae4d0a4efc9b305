"""Reading an archive's data file starts none of Arrow's CPU threads.

Each worker process reads one partition at a time; Arrow's thread pool would decode the two
columns in other threads, and with the C library's allocator (the tool's Arrow pool, see
``cli.prefer_arrow_pool``) every such thread allocates in an arena of its own and keeps what it
freed. Measured on an import of 10M keys (64 partitions), one process: peak RSS 183 -> 138 MB;
with --jobs 2 the workers peaked at 140-144 -> 103-105 MB.

The check counts the process's threads (``/proc/self/task``, Linux) around a read, each in a
fresh interpreter because Arrow keeps its pools once started: ``read_rows`` against the same
file read by Arrow with its threads, which must start more (the reference shows the check can
fail).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]

SETUP = r"""
import json, os, sys
import numpy as np, pyarrow as pa, pyarrow.parquet as pq
from migrate.archive.manifest import DataFile
from migrate.archive.reader import read_rows
from migrate.archive.writer import write_data_file
from migrate.archive.columns import raw_decoder
from migrate.providers.base import ROW_SCHEMA
from migrate.storage import open_location
loc = open_location(sys.argv[1], readonly=False)
n = 60000
batches = [pa.RecordBatch.from_arrays([pa.array([b"k%09d" % (i + j) for i in range(10000)]), pa.array([b"v" * 30] * 10000)], schema=ROW_SCHEMA)
           for j in range(0, n, 10000)]
w = write_data_file(loc, "part.parquet", iter(batches), raw_decoder("test", None), {})  # six row groups
df = DataFile("part.parquet", 0, "default", 0, n, w.bytes, w.sha256, w.digest)
def tasks():
    return len(os.listdir("/proc/self/task"))
before = tasks()
"""

OURS = SETUP + r"""
rows = sum(b.num_rows for b in read_rows(loc, df, batch_rows=5000))
print(json.dumps({"rows": rows, "started": tasks() - before}))
"""

ARROW_THREADED = SETUP + r"""
with loc.open_read("part.parquet") as f:
    rows = sum(b.num_rows for b in pq.ParquetFile(f).iter_batches(batch_size=5000, columns=["key", "value"], use_threads=True))
print(json.dumps({"rows": rows, "started": tasks() - before}))
"""


def _run(script: str, folder: Path) -> dict:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]),
           "ARROW_DEFAULT_MEMORY_POOL": "system"}
    out = subprocess.run([sys.executable, "-c", script, str(folder)], env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout)


@pytest.mark.skipif(not Path("/proc/self/task").is_dir() or (os.cpu_count() or 1) < 2,
                    reason="counts threads through /proc (Linux); Arrow's CPU pool needs two cores to show")
def test_reading_a_data_file_starts_fewer_threads_than_arrows_threaded_read(tmp_path: Path) -> None:
    ours = _run(OURS, tmp_path / "a")
    threaded = _run(ARROW_THREADED, tmp_path / "b")
    assert ours["rows"] == threaded["rows"] == 60000
    # Arrow's CPU pool has one thread per core; both reads may start Arrow's I/O helper (one
    # thread with pyarrow 26), whose count is Arrow's business, so only the difference is held
    assert threaded["started"] > ours["started"], (ours, threaded)
