"""The engine reads state files written by our codecs, and Hadoop sidecars written by make_crc.

One streaming aggregation (HDFS-backed provider) runs one input file per restart. Between
restarts every state file is decompressed with the codec the offsets log pins, recompressed with
our ``compress()`` for the next codec, written back with a fresh ``make_crc`` sidecar, and the
offsets log's codec conf is rewritten to match (with fresh sidecars too). The engine must then
continue the aggregation exactly: the drops and grams it emits for the new file's lockers must
equal the totals over all input so far. The chain lz4 -> zstd -> snappy -> lzf -> lz4 also makes
the engine write a new delta in each codec, which our reader must decode on the next step.

A control shows the engine really reads what we wrote: files in a codec other than the pinned one
make the restart fail. The engine does not check sidecars of state files on read, so our sidecars
are checked with Hadoop's checksummed FileSystem reader (in the engine's JVM) instead.
"""

from __future__ import annotations

import json
import os
import re
from pathlib import Path

import pytest

from migrate.codecs import codec_for
from migrate.codecs.hadoop_crc import crc_name, make_crc

CODEC_CONF = "spark.sql.streaming.stateStore.compression.codec"
PROVIDER = "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider"
LOCKERS = 6000  # ~110 KB of raw delta per partition per batch: several blocks / chunks per file
MTIME_BASE = 1_700_000_000
CHAIN = ("zstd", "snappy", "lzf", "lz4")
_CONF_VALUE = re.compile(r'("spark\.sql\.streaming\.stateStore\.compression\.codec":")([^"]*)(")')


def drops(batch: int) -> list[tuple[str, int]]:
    """Invented parcel drops of one input file: two thirds of the lockers, a weight each."""
    return [(f"locker-{j:06d}", 100 + (j * 37 + batch * 11) % 900) for j in range(LOCKERS) if (j + batch) % 3]


def write_input(folder: Path, batch: int) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"drops-{batch:03d}.json"
    path.write_text("".join(json.dumps({"locker": k, "grams": g}) + "\n" for k, g in drops(batch)))
    os.utime(path, (MTIME_BASE + batch, MTIME_BASE + batch))  # the file source orders by mtime


def expected_output(batch: int) -> dict[str, tuple[int, int]]:
    """Update-mode output of ``batch``: running totals of the lockers in that file."""
    totals: dict[str, tuple[int, int]] = {}
    for b in range(batch + 1):
        for key, grams in drops(b):
            count, total = totals.get(key, (0, 0))
            totals[key] = (count + 1, total + grams)
    return {key: totals[key] for key, _ in drops(batch)}


def run_once(spark, root: Path, name: str, session_codec: str) -> dict[str, tuple[int, int]]:
    """Restart the query on ``root``/cp; it processes the one new input file and stops."""
    return run_aggregation(spark, root / "in", root / "cp", name, PROVIDER, session_codec)


def run_aggregation(
    spark, inp: Path, cp: Path, name: str, provider: str, session_codec: str, conf: dict[str, str] | None = None,
    *, one_batch: bool = True,
) -> dict[str, tuple[int, int]]:
    """Run the locker aggregation on ``cp`` over the files in ``inp`` it has not seen (available-now,
    one file per micro-batch) with ``conf`` set for the run; its update-mode output (over several
    batches: each locker's last row; with ``one_batch`` a locker emitted twice is an error)."""
    from pyspark.sql import functions as F

    conf = dict(conf or {})
    previous = {k: spark.conf.get(k, None) for k in conf}
    spark.conf.set("spark.sql.streaming.stateStore.providerClass", provider)
    spark.conf.set(CODEC_CONF, session_codec)  # ignored on restart: the offsets log pins the codec
    for k, v in conf.items():
        spark.conf.set(k, v)
    stream = spark.readStream.schema("locker string, grams int").option("maxFilesPerTrigger", 1).json(str(inp))
    totals = stream.groupBy("locker").agg(F.count("*").alias("drops"), F.sum("grams").alias("grams"))
    rows: list = []
    query = (
        totals.writeStream.outputMode("update")
        .queryName(name)
        .foreachBatch(lambda frame, _batch_id: rows.extend(frame.collect()))
        .option("checkpointLocation", str(cp))
        .trigger(availableNow=True)
        .start()
    )
    try:
        query.awaitTermination()
    finally:
        query.stop()
        for k, v in previous.items():
            if v is None:
                spark.conf.unset(k)
            else:
                spark.conf.set(k, v)
    out = {r["locker"]: (r["drops"], r["grams"]) for r in rows}
    assert len(out) == len(rows) or not one_batch, "a locker was emitted twice in one run"
    return out


def pinned_codec(cp: Path) -> str:
    latest = max((p for p in (cp / "offsets").iterdir() if p.name.isdigit()), key=lambda p: int(p.name))
    match = _CONF_VALUE.search(latest.read_text())
    assert match, f"{latest}: no codec conf"
    return match.group(2)


def write_with_sidecar(path: Path, data: bytes, sidecar: bytes | None = None) -> None:
    path.write_bytes(data)
    (path.parent / crc_name(path.name)).write_bytes(make_crc(data) if sidecar is None else sidecar)


def state_files(cp: Path) -> list[Path]:
    return sorted(p for p in (cp / "state").rglob("*") if p.suffix in (".delta", ".snapshot") and p.is_file())


def recompress_state(cp: Path, target: str) -> int:
    """Rewrite every state file from the pinned codec to ``target``; returns how many."""
    source = codec_for(pinned_codec(cp))
    files = state_files(cp)
    for path in files:
        raw = source.decompress(path.read_bytes(), str(path))
        write_with_sidecar(path, codec_for(target).compress(raw))
    return len(files)


def pin_codec(cp: Path, target: str) -> None:
    """Rewrite the codec conf in every offsets-log entry (and its sidecar)."""
    for path in (p for p in (cp / "offsets").iterdir() if p.name.isdigit()):
        text, count = _CONF_VALUE.subn(lambda m: m.group(1) + target + m.group(3), path.read_text())
        assert count == 1, f"{path}: expected one codec conf entry"
        write_with_sidecar(path, text.encode())


def fresh_checkpoint(spark, tmp_path: Path) -> Path:
    """A checkpoint after batch 0, written by the engine with its default codec (lz4).

    Each test makes its own: the file source logs absolute input paths, so a copy cannot move.
    """
    root = tmp_path / "run"
    write_input(root / "in", 0)
    spark.conf.set("spark.sql.shuffle.partitions", "2")
    out = run_once(spark, root, f"codec_base_{tmp_path.name}", "lz4")
    assert out == expected_output(0)
    assert pinned_codec(root / "cp") == "lz4"
    return root


def test_engine_continues_from_state_recompressed_with_each_codec(spark, tmp_path: Path) -> None:
    root = fresh_checkpoint(spark, tmp_path)
    cp = root / "cp"
    for batch, target in enumerate(CHAIN, start=1):
        rewritten = recompress_state(cp, target)
        assert rewritten == 2 * batch  # one delta per partition per version so far, no snapshots
        pin_codec(cp, target)
        write_input(root / "in", batch)
        other = "lzf" if target != "lzf" else "zstd"
        out = run_once(spark, root, f"codec_chain_{batch}_{target}", session_codec=other)
        assert out == expected_output(batch), f"engine output wrong after rewriting state to {target}"
        for part in (0, 1):  # the engine wrote the new version in the pinned codec
            new = cp / "state" / "0" / str(part) / f"{batch + 1}.delta"
            assert codec_for(target).decompress(new.read_bytes(), str(new)).endswith(b"\xff\xff\xff\xff")


def test_control_engine_fails_on_files_in_another_codec_than_pinned(spark, tmp_path: Path) -> None:
    from pyspark.errors import StreamingQueryException

    root = fresh_checkpoint(spark, tmp_path)
    recompress_state(root / "cp", "zstd")  # offsets still pin lz4
    write_input(root / "in", 1)
    with pytest.raises(StreamingQueryException):
        run_once(spark, root, "codec_control_codec", "lz4")


def hadoop_read(spark, path: Path) -> bytes:
    """Read a file through Hadoop's checksummed local FileSystem (verifies the .crc sidecar)."""
    jvm = spark._jvm
    hpath = jvm.org.apache.hadoop.fs.Path(path.as_uri())
    stream = hpath.getFileSystem(spark._jsc.hadoopConfiguration()).open(hpath)
    try:
        return bytes(jvm.org.apache.commons.io.IOUtils.toByteArray(stream))
    finally:
        stream.close()


def test_hadoop_checksummed_reader_accepts_make_crc_and_rejects_damage(spark, tmp_path: Path) -> None:
    # The engine's own state reads (FileContext on the local file system) do not check sidecars
    # (observed: a damaged sidecar beside a delta file goes unnoticed on restart), so the sidecars
    # make_crc writes are checked here with Hadoop's FileSystem reader, which does verify them.
    from py4j.protocol import Py4JJavaError

    path = tmp_path / "7.delta"
    data = codec_for("lz4").compress(b"".join(f"locker-{j:06d}".encode() for j in range(400)))
    assert len(data) > 2 * 512  # several checksum chunks
    write_with_sidecar(path, data)
    assert hadoop_read(spark, path) == data
    sidecar = bytearray(make_crc(data))
    sidecar[8 + 4] ^= 0x01  # second chunk's CRC
    write_with_sidecar(path, data, bytes(sidecar))
    with pytest.raises(Py4JJavaError, match="ChecksumException"):
        hadoop_read(spark, path)
