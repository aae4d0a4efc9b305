"""The heap-map read's join and replay let go of what they were given as soon as its copy exists
(``hdfs.combine_files`` and ``hdfs.replay`` empty the lists they take), so one partition's peak
is about one copy of its records plus one side of them, not two copies.

Measured with Arrow's own allocation counter (``MemoryPool.max_memory``, the pool's high-water
mark; pyarrow's documented API) in a fresh interpreter, since the mark never goes down: three
files of 1 MiB keys and 1 MiB values each, every key written once more in a later file (so the
replay copies the survivors). Before the change the peak held the per-file arrays and the
joined copy at once (about 2x the records); the bound here is 1.6x.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa

from migrate.providers.hdfs import combine_files, replay

ROOT = Path(__file__).resolve().parents[2]

SCRIPT = r"""
import json, numpy as np, pyarrow as pa
from migrate.providers.hdfs import combine_files, replay
def arrays(n, width, seed):
    data = np.random.default_rng(seed).integers(0, 256, n * width, dtype=np.uint8).tobytes()
    offsets = np.arange(0, n * width + 1, width, dtype=np.int32)
    return pa.Array.from_buffers(pa.binary(), n, [None, pa.py_buffer(offsets.tobytes()), pa.py_buffer(data)])
n, width = 32768, 32                      # 1 MiB of keys and of values per file
base = arrays(n, width, 1)
keys = [base, arrays(n, width, 2), base]  # the third file writes the first file's keys again
files = []
for i, k in enumerate(keys):
    # copied into Arrow's pool (the generated buffers are Python bytes, which the pool never sees)
    files.append((pa.concat_arrays([k]), pa.concat_arrays([arrays(n, width, 10 + i)]), np.zeros(n, dtype=bool)))
del keys, base
pool = pa.default_memory_pool()
start = pool.bytes_allocated()
combined = combine_files(files)
out_keys, out_values = replay(combined, True)
print(json.dumps({"start": start, "peak": pool.max_memory(), "left_files": len(files), "left_combined": len(combined),
                  "rows": len(out_keys), "held": pool.bytes_allocated()}))
"""


def test_join_and_replay_peak_well_under_two_copies() -> None:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}
    out = json.loads(subprocess.run([sys.executable, "-c", SCRIPT], env=env, capture_output=True, text=True, check=True).stdout)
    assert out["left_files"] == 0 and out["left_combined"] == 0
    assert out["rows"] == 2 * 32768  # the rewritten keys once
    records = out["start"]  # the per-file arrays in the pool, before the join
    assert records >= 3 * 2 * (1 << 20)  # their data buffers at least
    assert out["peak"] <= 1.6 * records, out  # two copies at once would be 2x
    assert out["held"] < records  # the survivors only


def test_the_lists_are_emptied_and_the_replay_is_unchanged() -> None:
    k = pa.array([b"b", b"a", b"b"])
    v = pa.array([b"1", b"2", b"3"])
    files = [(k.slice(0, 2), v.slice(0, 2), np.zeros(2, bool)), (k.slice(2), v.slice(2), np.zeros(1, bool))]
    combined = combine_files(files)
    assert files == []
    keys, values = replay(combined, True)
    assert combined == []
    assert keys.to_pylist() == [b"a", b"b"] and values.to_pylist() == [b"2", b"3"]


def test_one_file_is_not_copied_and_large_binary_keeps_its_type() -> None:
    k = pa.array([b"b", b"a", b"c"] * 1000, pa.binary()).slice(1)  # sliced: offsets do not start at 0
    v = pa.array([b"1", b"2", b"3"] * 1000, pa.binary()).slice(1)
    files = [(k, v, np.zeros(len(k), bool))]
    keys, values, removed = combine_files(files)
    assert files == []
    assert keys.buffers()[2].address == k.buffers()[2].address  # the same bytes, not a copy
    assert values.buffers()[2].address == v.buffers()[2].address
    assert keys.to_pylist() == k.to_pylist() and values.to_pylist() == v.to_pylist() and len(removed) == len(k)
    big = pa.array([b"x", b"y"], pa.large_binary())
    mixed = combine_files([(big, big, np.zeros(2, bool)), (pa.array([b"z"]), pa.array([b"z"]), np.zeros(1, bool))])
    assert mixed[0].type == pa.large_binary() and mixed[0].to_pylist() == [b"x", b"y", b"z"]
    keys, values = replay(combine_files([(big, big, np.zeros(2, bool))]), True)
    assert keys.type == pa.large_binary() and keys.to_pylist() == [b"x", b"y"]
