"""What the file formats' own libraries cost for the bytes a case wrote, in the same run as the
case: with ``rocksdb_steps.py``, the least a case can cost through the libraries the tool uses,
next to the floor, which decodes and encodes nothing.

    python -m benchmarks.codec_steps PLAN.json    # {"kind": "lz4" | "parquet", "root", "jobs"}

``root`` is the target a case wrote; each of its files is read and decoded first (not timed), then:

* ``lz4`` (a heap-map target, state files ``*.snapshot`` / ``*.delta``): ``write`` compresses the
  file's decompressed bytes into the engine's LZ4 stream (liblz4 blocks with their xxHash32
  checks, through the tool's compiled framing: ``Lz4BlockStream.compress``), as the tool must to
  write the file; ``read`` decompresses that stream again, checks included, as the tool does to
  read its target back as proof. The compressed stream must equal the file byte for byte, so the
  step is the tool's own compression work and no other.
* ``parquet`` (an archive, data files ``*.parquet``): ``write`` encodes the file's row groups
  again with the tool's writer options (``archive.writer.parquet_writer``: Snappy pages,
  dictionaries, statistics) into memory, as pyarrow must to write the file; the result must have
  the file's size. The archive's file checksums and the source read are not counted.

The times are the CPU seconds of those calls alone (``time.process_time``), summed over the files,
which run over the same number of worker processes as the tool's. Not part of the tool.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from .rocksdb_steps import map_in_tool_env, read_plan

KINDS = ("lz4", "parquet")


def files_of(kind: str, root: str) -> list[str]:
    """The files a step of ``kind`` covers under ``root``, largest first (better spread over jobs)."""
    base = Path(root)
    if kind == "lz4":
        found = [p for p in base.rglob("*") if p.is_file() and not p.name.startswith(".")
                 and p.suffix in (".snapshot", ".delta") and "state" in p.relative_to(base).parts]
    elif kind == "parquet":
        found = [p for p in base.rglob("*.parquet") if p.is_file() and not p.name.startswith(".")]
    else:
        raise SystemExit(f"unknown kind {kind!r} (one of {', '.join(KINDS)})")
    return [str(p) for p in sorted(found, key=lambda p: -p.stat().st_size)]


def lz4_steps(path: str) -> tuple[float, float, int]:
    """(write CPU s, read CPU s, raw bytes) of one heap-map state file."""
    from migrate.codecs.lz4_stream import Lz4BlockStream

    codec = Lz4BlockStream()
    with open(path, "rb") as f:
        data = f.read()
    raw = bytes(codec.decompress(data, path))
    t = time.process_time()
    packed = codec.compress(raw)
    write = time.process_time() - t
    if packed != data:
        raise SystemExit(f"{path}: the LZ4 stream compressed again differs from the file "
                         f"({len(packed)} bytes, the file {len(data)}); the step would not be the tool's work")
    t = time.process_time()
    again = codec.decompress(packed, path)
    read = time.process_time() - t
    if len(again) != len(raw):
        raise SystemExit(f"{path}: decompressed to {len(again)} bytes, first {len(raw)}")
    return write, read, len(raw)


def parquet_steps(path: str) -> tuple[float, float, int]:
    """(write CPU s, 0, rows) of one archive data file."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from migrate.archive.writer import parquet_writer

    source = pq.ParquetFile(path)
    schema = source.schema_arrow
    groups = [source.read_row_group(i) for i in range(source.num_row_groups)]
    t = time.process_time()
    sink = pa.BufferOutputStream()
    writer = parquet_writer(sink, schema)
    for table in groups:
        for batch in table.to_batches():
            writer.write_batch(batch)
    writer.close()
    out = sink.getvalue()
    write = time.process_time() - t
    on_disk = Path(path).stat().st_size
    if out.size != on_disk:
        raise SystemExit(f"{path}: encoded again to {out.size} bytes, the file has {on_disk}; "
                         "the step would not be the tool's work")
    return write, 0.0, sum(g.num_rows for g in groups)


def file_steps(task: tuple[str, str]) -> tuple[float, float, int]:
    kind, path = task
    return lz4_steps(path) if kind == "lz4" else parquet_steps(path)


def main(argv: list[str] | None = None) -> int:
    plan = read_plan(sys.argv[1:] if argv is None else argv,
                     "usage: python -m benchmarks.codec_steps PLAN.json  ({'kind': 'lz4' | 'parquet', 'root', 'jobs'})")
    if plan is None:
        return 2
    paths = files_of(plan["kind"], plan["root"])
    if not paths:
        raise SystemExit(f"{plan['root']}: no {plan['kind']} files to measure")
    results = map_in_tool_env(file_steps, [(plan["kind"], p) for p in paths], plan["jobs"])
    print(json.dumps({
        "kind": plan["kind"],
        "write_cpu_s": round(sum(r[0] for r in results), 6),
        "read_cpu_s": round(sum(r[1] for r in results), 6),
        "files": len(results),
        "units": sum(r[2] for r in results),
    }))
    return 0


if __name__ == "__main__":
    sys.exit(main())
