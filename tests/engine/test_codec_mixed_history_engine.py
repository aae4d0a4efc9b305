"""A checkpoint whose older state versions were written with another codec.

The engine reads every state file with the one codec its offsets log pins, so it cannot restart
on such a history; stateshift reads each file with the codec that wrote it (told by the stream's
first bytes) and converts it to a checkpoint the engine continues exactly.

The mixed history is built from engine-written files only: the same aggregation runs twice on the
same input, once with zstd pinned (batches 0-1) and once with lz4 pinned (batches 0-3); versions
1 and 2 of the lz4 run are then replaced by the zstd run's files for the same versions (same
input, same partitioning, so the same records). Cases: the heap map (deltas) and RocksDB with
changelog checkpointing (changelog files; no snapshot zip, so version 4 is replayed from version
0 through all four changelogs).

A control run shows the mix is real: the engine itself fails to restart on it.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from test_codec_engine_reads import expected_output, run_aggregation, write_input
from test_convert_roundtrip_engine import describe, run_cli

from migrate.codecs import codec_for, codec_of_stream
from migrate.codecs.hadoop_crc import crc_name

HDFS = "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider"
ROCKSDB = "org.apache.spark.sql.execution.streaming.state.RocksDBStateStoreProvider"
CHANGELOG_CONF = "spark.sql.streaming.stateStore.rocksdb.changelogCheckpointing.enabled"
CASES = {
    "hdfs": (HDFS, ".delta", {}),
    "rocksdb-changelog": (ROCKSDB, ".changelog", {CHANGELOG_CONF: "true"}),
}


def run(spark, inp: Path, cp: Path, name: str, provider: str, codec: str, extra: dict[str, str]) -> dict:
    """The aggregation on ``cp`` over the new files in ``inp``; changelogs only where ``extra`` says."""
    conf = {CHANGELOG_CONF: "false", "spark.sql.shuffle.partitions": "2", **extra}
    return run_aggregation(spark, inp, cp, name, provider, codec, conf, one_batch=False)


def totals_after(batch: int) -> dict:
    """Every locker's totals after ``batch`` (the union of the update outputs so far)."""
    out: dict = {}
    for b in range(batch + 1):
        out.update(expected_output(b))
    return out


def mixed_history(spark, tmp_path: Path, case: str) -> tuple[Path, Path]:
    """(input dir, checkpoint) where state versions 1-2 are zstd and 3-4 lz4, offsets pin lz4."""
    provider, suffix, extra = CASES[case]
    inp_z, inp = tmp_path / "in-zstd", tmp_path / "in"
    for b in range(2):
        write_input(inp_z, b)
    zstd_cp = tmp_path / "zstd-cp"
    # one input file per micro-batch: versions 1 and 2
    assert run(spark, inp_z, zstd_cp, f"mix_z_{case}", provider, "zstd", extra) == totals_after(1)
    for b in range(4):
        write_input(inp, b)
    cp = tmp_path / "cp"
    assert run(spark, inp, cp, f"mix_l_{case}", provider, "lz4", extra) == totals_after(3)
    replaced = 0
    for part in (0, 1):
        store = cp / "state" / "0" / str(part)
        assert not list(store.glob("*.zip")) and not list(store.glob("*.snapshot")), "expected no snapshot yet"
        for version in (1, 2):
            for name in (f"{version}{suffix}", crc_name(f"{version}{suffix}")):
                shutil.copyfile(zstd_cp / "state" / "0" / str(part) / name, store / name)
            data = (store / f"{version}{suffix}").read_bytes()
            assert codec_of_stream(data, "lz4") is codec_for("zstd")
            replaced += 1
        newest = (store / f"4{suffix}").read_bytes()
        assert codec_of_stream(newest, "zstd") is codec_for("lz4")
    assert replaced == 4
    return inp, cp


@pytest.mark.parametrize("case", sorted(CASES))
def test_engine_cannot_restart_on_a_mixed_history(spark, tmp_path: Path, case: str) -> None:
    from pyspark.errors import StreamingQueryException

    provider, _, extra = CASES[case]
    inp, cp = mixed_history(spark, tmp_path, case)
    write_input(inp, 4)
    with pytest.raises(StreamingQueryException):
        run(spark, inp, cp, f"mix_control_{case}", provider, "lz4", extra)


@pytest.mark.parametrize("to", ["hdfs", "rocksdb"])
@pytest.mark.parametrize("case", sorted(CASES))
def test_converted_mixed_history_continues_in_the_engine(spark, tmp_path: Path, case: str, to: str) -> None:
    inp, cp = mixed_history(spark, tmp_path, case)
    out = tmp_path / "converted"
    proc = run_cli("convert", str(cp), str(out), "--to", to, "--quiet", "--jobs", "1")
    assert proc.returncode == 0, describe(proc)
    proc = run_cli("verify", str(cp), str(out), "--quiet")
    assert proc.returncode == 0, describe(proc)
    write_input(inp, 4)
    target = HDFS if to == "hdfs" else ROCKSDB
    got = run(spark, inp, out, f"mix_conv_{case}_{to}", target, "lz4", {})
    assert got == expected_output(4)


@pytest.mark.parametrize("case", sorted(CASES))
def test_mixed_history_archive_round_trip_continues_in_the_engine(spark, tmp_path: Path, case: str) -> None:
    provider, _, extra = CASES[case]
    inp, cp = mixed_history(spark, tmp_path, case)
    archive, out = tmp_path / "archive", tmp_path / "restored"
    proc = run_cli("export", str(cp), str(archive), "--quiet")
    assert proc.returncode == 0, describe(proc)
    to = "hdfs" if provider == HDFS else "rocksdb"
    proc = run_cli("import", str(archive), str(out), "--to", to, "--quiet")
    assert proc.returncode == 0, describe(proc)
    write_input(inp, 4)
    assert run(spark, inp, out, f"mix_arch_{case}", provider, "lz4", extra) == expected_output(4)
