"""CPU time of the archive's Parquet write under other writer options, on real archive batches.

    python -m benchmarks.parquet_options benchmarks/data/narrow-10m-p64-hdfs [--partitions 4] [--rounds 3]

Reads the first N store partitions (after the first) of a generated heap-map checkpoint in key
order, decodes them into the archive's batches (raw ``key``/``value`` plus typed columns) as
export does, then writes each variant into memory, the variants alternating round by round. Prints
CPU microseconds per row for each round and the bytes per row written. "current" is what
``migrate.archive.writer`` uses; the others change one thing at a time.
"""

from __future__ import annotations

import argparse
import io
import json
import sys
import time
from pathlib import Path


def main(argv: list[str] | None = None) -> int:
    from migrate.cli import prefer_arrow_pool

    prefer_arrow_pool()  # the pool the tool runs with
    import pyarrow.parquet as pq

    from migrate.archive.writer import PARQUET_COMPRESSION, RAW_COLUMNS, dictionary_columns
    from migrate.checkpoint.model import load_checkpoint
    from migrate.commands.export import _store_decoder, kept_checkpoint_files
    from migrate.providers.base import ReadContext
    from migrate.storage import open_location

    ap = argparse.ArgumentParser(prog="python -m benchmarks.parquet_options")
    ap.add_argument("checkpoint", type=Path)
    ap.add_argument("--partitions", type=int, default=4)
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args(argv)
    ck = load_checkpoint(open_location(str(args.checkpoint)))
    paths = [f.rel for f in kept_checkpoint_files(ck, True)]
    parts = []
    for sp in ck.store_partitions()[1 : args.partitions + 1]:
        _, _, decoder = _store_decoder(ck, paths, sp.operator_id, sp.store_name)
        ctx = ReadContext(conf=ck.conf, listing=sp.listing, key_order=True)
        parts.append([decoder.decode(b)[0] for b in ck.provider.read(sp.dir, ck.state_version, ctx)])
    schema = decoder.schema
    rows = sum(b.num_rows for p in parts for b in p)
    dictionary = dictionary_columns(schema)
    stats = [f.name for f in schema if f.name not in RAW_COLUMNS]
    base = {"compression": PARQUET_COMPRESSION, "use_dictionary": dictionary, "write_statistics": stats}
    per_column = lambda raw, typed: {f.name: raw if f.name in RAW_COLUMNS else typed for f in schema}  # noqa: E731
    variants = {
        "current": base,
        "no dictionary": {**base, "use_dictionary": False},
        "no compression": {**base, "compression": "none"},
        "lz4": {**base, "compression": "lz4"},
        "zstd 1": {**base, "compression": "zstd", "compression_level": 1},
        "zstd -3": {**base, "compression": "zstd", "compression_level": -3},
        "zstd -7": {**base, "compression": "zstd", "compression_level": -7},
        "snappy on raw columns only": {**base, "compression": per_column("snappy", "none")},
        "snappy on typed columns only": {**base, "compression": per_column("none", "snappy")},
    }
    us: dict[str, list[float]] = {k: [] for k in variants}
    size: dict[str, float] = {}
    for _ in range(args.rounds):
        for name, options in variants.items():
            t = time.process_time()
            written = 0
            for batches in parts:
                sink = io.BytesIO()
                writer = pq.ParquetWriter(sink, schema, **options)
                for b in batches:
                    writer.write_batch(b)
                writer.close()
                written += sink.tell()
            us[name].append(round((time.process_time() - t) / rows * 1e6, 3))
            size[name] = round(written / rows, 1)
    print(json.dumps({"rows": rows, "partitions": len(parts), "us_per_row": us, "bytes_per_row": size}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
