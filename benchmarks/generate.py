"""Generate large, complete, seeded checkpoints for the benchmarks, in either provider layout.

    python -m benchmarks.generate --keys 1000000 --partitions 64 --shape narrow --layout hdfs
    python -m benchmarks.generate --keys 10000000 --layout rocksdb       # same state, RocksDB

Output (default ``benchmarks/data/<shape>-<keys>-p<partitions>-<layout>/``, kept out of git) is
a checkpoint of an invented streaming aggregation (``rowgen.py``) that ran ``deltas + 1``
micro-batches: ``metadata``, ``offsets/`` (with the conf pinned by a real engine run, copied from
``demo_checkpoints/greenhouse_totals_hdfs``), ``commits/``, ``sources/0/``, operator metadata,
the schema file, and per partition:

* heap-map layout: ``1.snapshot`` (written by ``HDFSProvider.write``) and ``1.delta`` (the same
  records: batch 0 inserted every initial key), then ``2.delta .. V.delta`` framed here
  (``frame_delta``) and compressed with the project's codec: about 10 % of the keys updated,
  2 % inserted and 1 % removed per batch, records in a shuffled order;
* RocksDB layout: the final version ``V.zip`` + ``SSTs/`` written by ``RocksDBProvider.write``
  (older versions are not generated: the tool reads only the latest one).

Both layouts hold exactly ``--keys`` keys at the last version, spread over the partitions with
the engine's own hash partitioning (``migrate.rows.partitioning``). A ``bench.json`` beside the
state records the parameters, the rows and raw bytes of each partition and the files written.
Partitions are generated in worker processes (``--jobs``, default: cores).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import struct
import sys
import time
import uuid
from concurrent.futures import ProcessPoolExecutor
from dataclasses import asdict, dataclass
from multiprocessing import get_context
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from . import rowgen

HERE = Path(__file__).resolve().parent
DATA = HERE / "data"
DEMO = HERE.parent / "demo_checkpoints" / "greenhouse_totals_hdfs"
HDFS_CLASS = "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider"
ROCKSDB_CLASS = "org.apache.spark.sql.execution.streaming.state.RocksDBStateStoreProvider"
PROVIDER_CONF = "spark.sql.streaming.stateStore.providerClass"
PARTITIONS_CONF = "spark.sql.shuffle.partitions"
UPDATE_PER_MILLE = 100  # keys updated per delta
INSERT_PER_MILLE = 20  # keys first inserted by each delta
REMOVE_PER_MILLE = 10  # keys removed by each delta (in addition to the --keys that stay)
BASE_TIME_MS = 1_700_000_000_000


@dataclass(frozen=True)
class Params:
    keys: int
    partitions: int
    shape: str
    layout: str
    deltas: int
    seed: int

    @property
    def version(self) -> int:
        return self.deltas + 1

    @property
    def removed(self) -> int:
        return self.keys * REMOVE_PER_MILLE * self.deltas // 1000

    @property
    def universe(self) -> int:
        return self.keys + self.removed

    @property
    def name(self) -> str:
        return f"{self.shape}-{_short(self.keys)}-p{self.partitions}-{self.layout}"


def _short(n: int) -> str:
    for unit, div in (("m", 1_000_000), ("k", 1000)):
        if n % div == 0 and n >= div:
            return f"{n // div}{unit}"
    return str(n)


# ------------------------------------------------------------------------ history of each key
def born_version(ids: np.ndarray, p: Params) -> np.ndarray:
    """Version whose batch first inserted each key: 1 for most, 2..V for the later inserts.

    Keys that are removed later (ids >= --keys) are always inserted in version 1.
    """
    h = rowgen.mix(ids, p.seed, 11) % np.uint64(1000)
    later = (h < np.uint64(INSERT_PER_MILLE * p.deltas)) & (ids < p.keys)
    born = np.ones(len(ids), np.int64)
    born[later] = 2 + (h[later].astype(np.int64) % p.deltas)
    return born


def died_version(ids: np.ndarray, p: Params) -> np.ndarray:
    """Version whose batch removed each key (0: never); only ids >= --keys are removed."""
    died = np.zeros(len(ids), np.int64)
    gone = ids >= p.keys
    died[gone] = 2 + (rowgen.mix(ids[gone], p.seed, 13) % np.uint64(p.deltas)).astype(np.int64)
    return died


def updated_in(ids: np.ndarray, version: int, p: Params) -> np.ndarray:
    return (rowgen.mix(ids, version, p.seed, 17) % np.uint64(1000)) < np.uint64(UPDATE_PER_MILLE)


def last_written(ids: np.ndarray, born: np.ndarray, died: np.ndarray, p: Params) -> np.ndarray:
    """The version whose value each key holds at the last version (-1 if removed by then)."""
    last = born.copy()
    for v in range(2, p.version + 1):
        upd = updated_in(ids, v, p) & (born < v) & ((died == 0) | (died > v))
        last[upd] = v
    last[died > 0] = -1
    return last


# ------------------------------------------------------------------------ file contents
def frame_delta(keys: pa.Array, values: pa.Array) -> bytes:
    """Heap-map records (int32 BE lengths; a null value is a removal, length -1) + end marker.

    Written independently of ``migrate.providers.hdfs.frame_records`` (which writes no removals);
    ``main`` checks both framings agree on a sample without removals.
    """
    n = len(keys)
    kl = pc.binary_length(keys).to_numpy(zero_copy_only=False).astype(np.int64)
    removal = values.is_null().to_numpy(zero_copy_only=False)
    vl = pc.binary_length(values).fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64)
    rec = 8 + kl + vl
    starts = np.zeros(n + 1, np.int64)
    np.cumsum(rec, out=starts[1:])
    out = np.empty(int(starts[-1]) + 4, np.uint8)
    out[-4:] = 0xFF

    def put_len(at: np.ndarray, lens: np.ndarray) -> None:
        out[(at[:, None] + np.arange(4)).ravel()] = lens.astype(">i4").view(np.uint8)

    def put_bytes(arr: pa.Array, at: np.ndarray, lens: np.ndarray) -> None:
        offs, data = rowgen._str_parts(arr)
        total = int(lens.sum())
        if total:
            src = np.repeat(offs[:-1], lens) + (np.arange(total) - np.repeat(np.cumsum(lens) - lens, lens))
            out[np.repeat(at, lens) + (np.arange(total) - np.repeat(np.cumsum(lens) - lens, lens))] = data[src]

    put_len(starts[:-1], kl)
    put_bytes(keys, starts[:-1] + 4, kl)
    put_len(starts[:-1] + 4 + kl, np.where(removal, -1, vl))
    put_bytes(values.fill_null(b""), starts[:-1] + 8 + kl, vl)
    return out.tobytes()


def schema_file(key_schema: dict, value_schema: dict) -> bytes:
    """A state schema file, format v2 (as the engine writes for an aggregation; see the demo)."""

    def utf(text: str) -> bytes:
        raw = text.encode("utf-8")
        return struct.pack(">H", len(raw)) + raw

    def chunked(text: str) -> bytes:
        chunks = [text[i : i + 32767] for i in range(0, len(text), 32767)] or [""]
        return struct.pack(">i", len(chunks)) + b"".join(utf(c) for c in chunks)

    dump = lambda o: json.dumps(o, separators=(",", ":"))  # noqa: E731
    return utf("v2") + chunked(dump(key_schema)) + chunked(dump(value_schema))


def _write(root: Path, rel: str, data: bytes, crc: bool = True) -> int:
    from migrate.codecs.hadoop_crc import crc_name, make_crc

    path = root / rel
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    if crc:
        (path.parent / crc_name(path.name)).write_bytes(make_crc(data))
    return len(data)


# ------------------------------------------------------------------------ one partition
def _batch(keys: pa.Array, values: pa.Array) -> pa.RecordBatch:
    from migrate.providers.base import ROW_SCHEMA

    return pa.RecordBatch.from_arrays([keys.cast(pa.binary()), values.cast(pa.binary())], schema=ROW_SCHEMA)


def _batches(keys: pa.Array, values: pa.Array, rows: int = 65536) -> list[pa.RecordBatch]:
    return [_batch(keys.slice(i, rows), values.slice(i, rows)) for i in range(0, len(keys), rows)]


def generate_partition(root: str, p: Params, partition: int, ids: np.ndarray, conf: dict[str, str]) -> dict[str, Any]:
    """Write one store partition's files; return its row count, raw bytes and file sizes."""
    from migrate.codecs import codec_for
    from migrate.providers.base import StoreDir, WriteContext
    from migrate.storage import open_location

    loc = open_location(root, readonly=False)
    rel = f"state/0/{partition}"
    store = StoreDir(loc, rel, 0, partition)
    ctx = WriteContext(conf=conf)
    born, died = born_version(ids, p), died_version(ids, p)
    files: dict[str, int] = {}
    if p.layout == "hdfs":
        from migrate.providers.hdfs import HDFSProvider

        first = ids[born == 1]
        keys = rowgen.key_rows(first, p.seed)
        values = rowgen.value_rows(p.shape, first, np.ones(len(first), np.int64), p.seed)
        for w in HDFSProvider().write(store, 1, _batches(keys, values), ctx):
            files[w.rel] = w.size
        snap = (Path(root) / rel / "1.snapshot").read_bytes()
        files[f"{rel}/1.delta"] = _write(Path(root), f"{rel}/1.delta", snap)
        codec = codec_for(conf.get("spark.sql.streaming.stateStore.compression.codec", "lz4"))
        for v in range(2, p.version + 1):
            upd = updated_in(ids, v, p) & (born < v) & ((died == 0) | (died > v))
            put = ids[upd | (born == v)]
            gone = ids[died == v]
            order = np.argsort(rowgen.mix(np.concatenate([put, gone]), v, p.seed, 19), kind="stable")
            all_ids = np.concatenate([put, gone])[order]
            keys = rowgen.key_rows(all_ids, p.seed)
            vals = rowgen.value_rows(p.shape, put, np.full(len(put), v, np.int64), p.seed).cast(pa.binary())
            vals = pa.concat_arrays([vals, pa.nulls(len(gone), pa.binary())]).take(pa.array(order))
            files[f"{rel}/{v}.delta"] = _write(Path(root), f"{rel}/{v}.delta", codec.compress(frame_delta(keys, vals)))
    last = last_written(ids, born, died, p)
    final = ids[last > 0]
    fkeys = rowgen.key_rows(final, p.seed)
    fvals = rowgen.value_rows(p.shape, final, last[last > 0], p.seed)
    if p.layout == "rocksdb":
        from migrate.providers.rocksdb import RocksDBProvider

        for w in RocksDBProvider().write(store, p.version, _batches(fkeys, fvals), ctx):
            files[w.rel] = w.size
    from migrate.digest import digest_batches

    digest = digest_batches(_batches(fkeys, fvals))
    key_bytes = int(pc.sum(pc.binary_length(fkeys)).as_py() or 0)
    value_bytes = int(pc.sum(pc.binary_length(fvals)).as_py() or 0)
    return {"partition": partition, "rows": len(final), "key_bytes": key_bytes, "value_bytes": value_bytes,
            "digest": digest.hexdigest, "files": files}


def _generate_partition_star(args: tuple) -> dict[str, Any]:
    return generate_partition(*args)


# ------------------------------------------------------------------------ checkpoint files
def pinned_conf(p: Params) -> dict[str, str]:
    """The conf of the demo checkpoint's newest offsets entry, for this layout and partitions."""
    from migrate.checkpoint.logs import parse_offsets

    names = sorted((n for n in os.listdir(DEMO / "offsets") if n.isdigit()), key=int)
    entry = parse_offsets((DEMO / "offsets" / names[-1]).read_text(), int(names[-1]), str(DEMO / "offsets" / names[-1]))
    conf = dict(entry.conf)
    conf[PROVIDER_CONF] = HDFS_CLASS if p.layout == "hdfs" else ROCKSDB_CLASS
    conf[PARTITIONS_CONF] = str(p.partitions)
    return conf


def write_logs(root: Path, p: Params, conf: dict[str, str], input_dir: Path) -> None:
    """metadata, offsets, commits, sources and the input files the sources log names."""
    rng_id = uuid.UUID(int=int(rowgen.mix(p.seed, p.keys, p.partitions)[0]) << 64 | 0x4000_8000_0000_0000, version=4)
    _write(root, "metadata", json.dumps({"id": str(rng_id)}, separators=(",", ":")).encode())
    input_dir.mkdir(parents=True, exist_ok=True)
    for b in range(p.version):
        ts = BASE_TIME_MS + b * 60_000
        meta = {"batchWatermarkMs": 0, "batchTimestampMs": ts, "conf": conf}
        text = f"v1\n{json.dumps(meta, separators=(',', ':'))}\n{json.dumps({'logOffset': b}, separators=(',', ':'))}"
        _write(root, f"offsets/{b}", text.encode())
        _write(root, f"commits/{b}", b'v1\n{"nextBatchWatermarkMs":0}')
        part = input_dir / f"part-{b:05d}.json"
        part.write_text(json.dumps({"sensor": "north/soil", "sensor_id": b, "reading": 1}) + "\n")
        os.utime(part, (ts / 1000, ts / 1000))
        source = {"path": part.resolve().as_uri(), "timestamp": ts, "batchId": b}
        _write(root, f"sources/0/{b}", f"v1\n{json.dumps(source, separators=(',', ':'))}".encode())
    op = {"operatorInfo": {"operatorId": 0, "operatorName": "stateStoreSave"},
          "stateStoreInfo": [{"storeName": "default", "numColsPrefixKey": 0, "numPartitions": p.partitions}]}
    _write(root, "state/0/_metadata/metadata", f"v1\n{json.dumps(op, separators=(',', ':'))}".encode())
    _write(root, "state/0/0/_metadata/schema", schema_file(rowgen.KEY_SCHEMA, rowgen.VALUE_SCHEMAS[p.shape]))


def _self_checks(p: Params) -> None:
    """The vectorised rows and framing agree with the project's reference writers."""
    from migrate.providers.hdfs import frame_records, parse_records

    rowgen.check_against_reference(p.shape, p.seed)
    ids = np.arange(500, dtype=np.int64)
    k, v = rowgen.key_rows(ids, p.seed), rowgen.value_rows(p.shape, ids, ids % 3 + 1, p.seed)
    if frame_delta(k, v) != frame_records([_batch(k, v)]):
        raise AssertionError("frame_delta differs from frame_records on rows without removals")
    vals = pa.array([None if i % 7 == 0 else x for i, x in enumerate(v.to_pylist())], pa.binary())
    got = list(parse_records(frame_delta(k, vals), "self-check", allow_removals=True))
    if got != list(zip(k.to_pylist(), vals.to_pylist())):
        raise AssertionError("frame_delta removals do not parse back")


def generate(p: Params, out: Path, jobs: int, quiet: bool = False) -> dict[str, Any]:
    from migrate.rows.partitioning import partition_ids
    from migrate.rows.schema import spark_type_from_json

    t0 = time.perf_counter()
    _self_checks(p)
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    conf = pinned_conf(p)
    key_type = spark_type_from_json(rowgen.KEY_SCHEMA)
    pids = np.empty(p.universe, np.int32)
    step = 1 << 20
    for i in range(0, p.universe, step):
        ids = np.arange(i, min(i + step, p.universe), dtype=np.int64)
        pids[i : i + len(ids)] = partition_ids(rowgen.key_columns(ids, p.seed), key_type, p.partitions)
    order = np.argsort(pids, kind="stable")
    bounds = np.searchsorted(pids[order], np.arange(p.partitions + 1))
    del pids
    tasks = [(str(out), p, part, order[bounds[part] : bounds[part + 1]].astype(np.int64), conf) for part in range(p.partitions)]
    del order
    t_plan = time.perf_counter() - t0
    results: list[dict[str, Any]] = []
    if jobs <= 1:
        results = [generate_partition(*t) for t in tasks]
    else:
        with ProcessPoolExecutor(max_workers=jobs, mp_context=get_context("fork")) as pool:
            for r in pool.map(_generate_partition_star, tasks, chunksize=1):
                results.append(r)
                if not quiet:
                    print(f"\r  partition {len(results)}/{p.partitions}", end="", file=sys.stderr, flush=True)
    if not quiet:
        print(file=sys.stderr)
    write_logs(out, p, conf, out.parent / f"{out.name}.input")
    results.sort(key=lambda r: r["partition"])
    state_files = {rel: size for r in results for rel, size in r["files"].items()}
    info = {
        "params": asdict(p),
        "name": p.name,
        "state_version": p.version,
        "rows": sum(r["rows"] for r in results),
        "key_bytes": sum(r["key_bytes"] for r in results),
        "value_bytes": sum(r["value_bytes"] for r in results),
        "largest_partition_raw_bytes": max(r["key_bytes"] + r["value_bytes"] for r in results),
        "state_file_bytes": sum(state_files.values()),
        "partitions": [{k: v for k, v in r.items() if k != "files"} for r in results],
        "seconds": {"plan": round(t_plan, 2), "total": round(time.perf_counter() - t0, 2)},
    }
    (out.parent / f"{out.name}.bench.json").write_text(json.dumps(info, indent=1))
    return info


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.generate", description=__doc__.split("\n\n")[0])
    ap.add_argument("--keys", type=int, default=1_000_000, help="keys at the last version (default 1000000)")
    ap.add_argument("--partitions", type=int, default=64)
    ap.add_argument("--shape", choices=rowgen.SHAPES, default="narrow")
    ap.add_argument("--layout", choices=("hdfs", "rocksdb"), default="hdfs")
    ap.add_argument("--deltas", type=int, default=4, help="deltas after the first snapshot (default 4)")
    ap.add_argument("--seed", type=int, default=20261202)
    ap.add_argument("--jobs", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--out", type=Path, default=None, help="checkpoint directory (default: benchmarks/data/<name>)")
    args = ap.parse_args(argv)
    if args.deltas < 1 or args.keys < 1 or args.partitions < 1:
        ap.error("--keys, --partitions and --deltas must be at least 1")
    p = Params(args.keys, args.partitions, args.shape, args.layout, args.deltas, args.seed)
    out = args.out or DATA / p.name
    info = generate(p, out, args.jobs)
    print(f"{out}: {info['rows']} keys, {info['state_file_bytes'] / 1e6:.1f} MB of state files, "
          f"{(info['key_bytes'] + info['value_bytes']) / 1e6:.1f} MB raw rows, {info['seconds']['total']} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
