"""``benchmarks/codec_steps.py`` (the file codecs' own steps for a case's target, in the same run)
redoes exactly the tool's compression work: the LZ4 stream it compresses again is the heap-map file
the tool wrote, byte for byte, and the Parquet file it encodes again has the archive file's size.
A file written any other way is refused, so the step cannot time some other, cheaper work."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from benchmarks import codec_steps
from benchmarks.generate import Params, generate
from migrate.codecs.lz4_stream import Lz4BlockStream

REPO = Path(__file__).resolve().parents[2]


def _tool(*args: str) -> None:
    out = subprocess.run([sys.executable, "-m", "migrate", *args, "--jobs", "1"], capture_output=True, text=True, cwd=REPO, timeout=300)
    assert out.returncode == 0, out.stderr


@pytest.fixture(scope="module")
def targets(tmp_path_factory):
    base = tmp_path_factory.mktemp("codec")
    generate(Params(keys=3000, partitions=3, shape="wide", layout="rocksdb", deltas=2, seed=5), base / "rocks", jobs=1, quiet=True)
    generate(Params(keys=3000, partitions=3, shape="wide", layout="hdfs", deltas=2, seed=5), base / "heap", jobs=1, quiet=True)
    _tool("convert", str(base / "rocks"), str(base / "heap-target"), "--to", "hdfs")
    _tool("export", str(base / "heap"), str(base / "archive"))
    return base


def test_lz4_steps_recompress_the_tools_own_bytes(targets):
    files = codec_steps.files_of("lz4", str(targets / "heap-target"))
    assert len(files) == 3 and all(f.endswith(".snapshot") for f in files)  # one snapshot per partition
    results = [codec_steps.lz4_steps(f) for f in files]
    assert all(write > 0 and read > 0 for write, read, _ in results)
    codec = Lz4BlockStream()
    raw = sum(len(codec.decompress(Path(f).read_bytes(), f)) for f in files)
    assert sum(n for _, _, n in results) == raw > 0


def test_lz4_steps_refuse_a_stream_written_otherwise(targets, tmp_path):
    f = codec_steps.files_of("lz4", str(targets / "heap-target"))[0]
    raw = bytes(Lz4BlockStream().decompress(Path(f).read_bytes(), f))
    other = tmp_path / "state" / "0" / "0" / "1.snapshot"
    other.parent.mkdir(parents=True)
    other.write_bytes(Lz4BlockStream(block_size=4096).compress(raw))  # a valid stream, other blocks
    with pytest.raises(SystemExit, match="differs from the file"):
        codec_steps.lz4_steps(str(other))


def test_parquet_steps_encode_the_archive_files_again(targets):
    files = codec_steps.files_of("parquet", str(targets / "archive"))
    assert len(files) == 3
    results = [codec_steps.parquet_steps(f) for f in files]
    assert all(write > 0 and read == 0 for write, read, _ in results)
    assert sum(n for _, _, n in results) == sum(pq.ParquetFile(f).metadata.num_rows for f in files) == 3000


def test_parquet_steps_refuse_a_file_written_otherwise(targets, tmp_path):
    f = codec_steps.files_of("parquet", str(targets / "archive"))[0]
    other = tmp_path / "other.parquet"
    pq.write_table(pq.read_table(f), other, compression="none")
    with pytest.raises(SystemExit, match="encoded again to"):
        codec_steps.parquet_steps(str(other))


def test_the_command_sums_the_files(targets, tmp_path):
    plan = tmp_path / "plan.json"
    plan.write_text(json.dumps({"kind": "lz4", "root": str(targets / "heap-target"), "jobs": 2}))
    out = subprocess.run([sys.executable, "-m", "benchmarks.codec_steps", str(plan)], capture_output=True, text=True, cwd=REPO, timeout=300)
    assert out.returncode == 0, out.stderr
    got = json.loads(out.stdout)
    assert got["kind"] == "lz4" and got["files"] == 3 and got["write_cpu_s"] > 0 and got["read_cpu_s"] > 0
    plan.write_text(json.dumps({"kind": "parquet", "root": str(tmp_path / "empty"), "jobs": 1}))
    out = subprocess.run([sys.executable, "-m", "benchmarks.codec_steps", str(plan)], capture_output=True, text=True, cwd=REPO, timeout=300)
    assert out.returncode != 0 and "no parquet files" in out.stderr


def _measured(wall: float, cpu: float):
    from benchmarks.measure import Measured

    return Measured(("x",), 0, wall, cpu, 100.0, 200.0, 150.0, 0.0, 150.0, 1.0, 1.0, "", "")


def test_the_report_adds_every_library_step_to_the_least_ratio():
    from benchmarks import run

    p = Params(keys=10, partitions=2, shape="narrow", layout="rocksdb", deltas=1, seed=1)
    r = run.CaseResult(
        case="convert-r2h", params=p, rows=10, source_bytes=1000, target_bytes=900, tool=_measured(5.0, 9.0),
        floor=_measured(1.0, 1.5), largest_partition_raw=100, jobs=2,
        steps={"scan_cpu_s": 4.0, "write_cpu_s": 0.0, "rows": 10},
        codec_steps={"kind": "lz4", "write_cpu_s": 1.5, "read_cpu_s": 0.5, "files": 2, "units": 50},
    )
    assert r.step_parts() == [("RocksDB scan", 4.0), ("LZ4 write", 1.5), ("LZ4 read-back", 0.5)]
    assert r.steps_cpu_s == 6.0 and r.least_ratio == 3.0  # 6 CPU s over 2 jobs against a 1 s floor
    assert "| 6.0 (RocksDB scan 4.0 + LZ4 write 1.5 + LZ4 read-back 0.5) | 3.0x |" in run.table([r])
    assert "within 3x of floor: NOT met" in run.targets([r])[0]  # 3.0x: not beyond reach, so no excuse
    r.codec_steps = {"kind": "lz4", "write_cpu_s": 2.5, "read_cpu_s": 0.5, "files": 2, "units": 50}
    assert "out of reach here: the libraries' own steps alone take 3.5x" in run.targets([r])[0]
    r.steps = r.codec_steps = None
    assert r.least_ratio is None
    assert "| - | - |" in run.table([r]).splitlines()[-1]
