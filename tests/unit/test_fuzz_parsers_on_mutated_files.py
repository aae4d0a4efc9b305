"""Fuzzing: the parsers fed mutated real engine files raise only the tool's own errors, never
crash or hang. Mutations are seeded (reproducible): bit flips, truncations, insertions, splices."""

import random
import shutil
import signal
import struct
from pathlib import Path

import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from migrate.checkpoint.logs import parse_commit, parse_offsets, parse_query_metadata
from migrate.checkpoint.model import load_checkpoint
from migrate.codecs import codec_for
from migrate.errors import StateshiftError
from migrate.providers import provider_for
from migrate.providers.base import ROW_SCHEMA, ReadContext, StoreDir
from migrate.providers.hdfs import frame_records, parse_records
from migrate.storage import open_location

DEMO = Path(__file__).resolve().parents[2] / "demo_checkpoints"
HDFS = DEMO / "greenhouse_totals_hdfs"
ROCKS = DEMO / "greenhouse_totals_rocksdb"


def mutations(data: bytes, rnd: random.Random, count: int):
    for _ in range(count):
        kind = rnd.randrange(5)
        b = bytearray(data)
        if kind == 0 and b:  # flip 1-3 bits
            for _ in range(rnd.randint(1, 3)):
                i = rnd.randrange(len(b))
                b[i] ^= 1 << rnd.randrange(8)
        elif kind == 1:  # truncate
            b = b[: rnd.randrange(len(b) + 1)]
        elif kind == 2:  # insert random bytes
            i = rnd.randrange(len(b) + 1)
            b[i:i] = rnd.randbytes(rnd.randint(1, 16))
        elif kind == 3 and b:  # overwrite a run with 0xff or 0x00
            i = rnd.randrange(len(b))
            b[i : i + 4] = bytes([rnd.choice((0, 255))]) * 4
        else:  # splice two halves out of order
            i = rnd.randrange(len(b) + 1)
            b = b[i:] + b[:i]
        yield bytes(b)


class _Timeout(Exception):
    pass


def _alarm(*_):
    raise _Timeout()


def only_our_errors(fn, inputs, seconds=5):
    """Every input either parses or raises a StateshiftError, within `seconds` each."""
    old = signal.signal(signal.SIGALRM, _alarm)
    outcomes = {"ok": 0, "refused": 0}
    try:
        for data in inputs:
            signal.alarm(seconds)
            try:
                fn(data)
                outcomes["ok"] += 1
            except StateshiftError as exc:
                assert "\n" not in str(exc)
                outcomes["refused"] += 1
            except _Timeout:
                pytest.fail(f"parser hung on a {len(data)}-byte input")
            finally:
                signal.alarm(0)
    finally:
        signal.signal(signal.SIGALRM, old)
    return outcomes


def test_delta_decompression_and_records_on_mutated_engine_files():
    rnd = random.Random(20261202)
    lz4 = codec_for("lz4")
    files = sorted(HDFS.glob("state/0/*/*.delta"))
    assert files, "demo checkpoint has delta files"

    def parse(data):
        raw = lz4.decompress(data, "fuzz.delta")
        list(parse_records(raw, "fuzz.delta", allow_removals=True))

    inputs = [m for f in files for m in mutations(f.read_bytes(), rnd, 150)]
    outcomes = only_our_errors(parse, inputs)
    assert outcomes["refused"] > len(inputs) // 2  # most mutations must be detected (block checksums)


def test_record_framing_on_mutated_raw_records():
    rnd = random.Random(7)
    lz4 = codec_for("lz4")
    raws = [lz4.decompress(f.read_bytes(), str(f)) for f in sorted(HDFS.glob("state/0/*/*.delta"))]
    inputs = [m for r in raws for m in mutations(r, rnd, 200)]
    only_our_errors(lambda d: list(parse_records(d, "fuzz", allow_removals=True)), inputs)


def test_log_parsers_on_mutated_engine_logs():
    rnd = random.Random(3)
    offsets = (HDFS / "offsets" / "0").read_bytes()
    commits = (HDFS / "commits" / "0").read_bytes()
    meta = (HDFS / "metadata").read_bytes()

    def text(d):
        return d.decode("utf-8", "replace")

    only_our_errors(lambda d: parse_offsets(text(d), 0, "offsets/0"), list(mutations(offsets, rnd, 300)))
    only_our_errors(lambda d: parse_commit(text(d), 0, "commits/0"), list(mutations(commits, rnd, 300)))
    only_our_errors(lambda d: parse_query_metadata(text(d), "metadata"), list(mutations(meta, rnd, 300)))


def test_rocksdb_zip_reader_on_mutated_engine_zips(tmp_path):
    rnd = random.Random(11)
    work = tmp_path / "ck"
    shutil.copytree(ROCKS, work)
    part = work / "state" / "0" / "0"
    zips = sorted(part.glob("*.zip"), key=lambda p: int(p.stem))
    newest = zips[-1]
    original = newest.read_bytes()
    crc = newest.with_name(f".{newest.name}.crc")
    if crc.exists():
        crc.unlink()
    loc = open_location(str(work))
    provider = provider_for("rocksdb")
    store = StoreDir(loc, "state/0/0", 0, 0)
    version = int(newest.stem)

    def read(data):
        newest.write_bytes(data)
        for _ in provider.read(store, version, ReadContext()):
            pass

    only_our_errors(read, list(mutations(original, rnd, 60)), seconds=20)


def test_checkpoint_model_on_mutated_metadata_files(tmp_path):
    rnd = random.Random(5)
    work = tmp_path / "ck"
    shutil.copytree(HDFS, work)
    target = work / "state" / "0" / "_metadata" / "metadata"
    original = target.read_bytes()
    crc = target.with_name(".metadata.crc")
    if crc.exists():
        crc.unlink()
    loc = open_location(str(work))

    def load(data):
        target.write_bytes(data)
        load_checkpoint(loc)

    only_our_errors(load, list(mutations(original, rnd, 150)))


rows = st.lists(st.tuples(st.binary(max_size=64), st.binary(max_size=64)), max_size=50)


@settings(max_examples=150, deadline=None)
@given(rows)
def test_record_framing_round_trip(pairs):
    batch = pa.RecordBatch.from_arrays(
        [pa.array([k for k, _ in pairs], pa.binary()), pa.array([v for _, v in pairs], pa.binary())], schema=ROW_SCHEMA
    )
    framed = frame_records([batch])
    assert framed.endswith(struct.pack(">i", -1))
    assert list(parse_records(framed, "x", allow_removals=False)) == list(pairs)
