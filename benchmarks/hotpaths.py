"""CPU time of each hot path on a generated checkpoint, in one process (for before/after numbers).

    python -m benchmarks.hotpaths benchmarks/data/narrow-1m-p64-hdfs [--partitions 8]

Stages, per store partition (after one untimed warm-up partition), timed with ``time.process_time`` (CPU seconds, so other load on the
machine disturbs them less than wall clock): reading the source version into batches, digesting
them, writing them as RocksDB and as a heap-map snapshot into a temporary directory, and reading
each target back. To compare with another version of the tool, run this from a directory whose
``migrate`` package is that version (the working directory comes first on Python's path), with
this repository on ``PYTHONPATH``.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path


def main(argv: list[str] | None = None) -> int:
    import migrate
    from migrate.checkpoint.model import load_checkpoint
    from migrate.digest import digest_batches
    from migrate.providers import provider_for
    from migrate.providers.base import ReadContext, StoreDir, WriteContext
    from migrate.storage import open_location

    ap = argparse.ArgumentParser(prog="python -m benchmarks.hotpaths")
    ap.add_argument("checkpoint", type=Path)
    ap.add_argument("--partitions", type=int, default=0, help="only the first N partitions (default: all)")
    ap.add_argument("--stages", default="read,digest,write-rocksdb,read-rocksdb,write-hdfs,read-hdfs")
    ap.add_argument("--key-order", action="store_true", help="read the source in key order (ReadContext.key_order), as a convert to RocksDB does")
    args = ap.parse_args(argv)
    stages = args.stages.split(",")
    ck = load_checkpoint(open_location(str(args.checkpoint)))
    everything = ck.store_partitions()
    # the first partition only warms up (imports, first calls of library kernels): not timed
    warm = len(everything) > 1
    parts = ([everything[0]] if warm else []) + everything[int(warm) : (args.partitions + int(warm)) if args.partitions else None]
    src = ck.provider
    totals = {s: 0.0 for s in stages}
    rows = 0
    tmp = tempfile.mkdtemp(prefix="stateshift-hot-")
    try:
        dst = open_location(tmp, readonly=False)
        for i, sp in enumerate(parts):
            if warm and i == 1:
                totals = {s: 0.0 for s in stages}
                rows = 0
            t = time.process_time()
            order = {"key_order": True} if args.key_order else {}  # absent from trees older than the hint
            batches = list(src.read(sp.dir, ck.state_version, ReadContext(conf=ck.conf, listing=sp.listing, **order)))
            totals["read"] = totals.get("read", 0) + time.process_time() - t
            rows += sum(b.num_rows for b in batches)
            if "digest" in stages:
                t = time.process_time()
                digest_batches(batches)
                totals["digest"] += time.process_time() - t
            for name in ("rocksdb", "hdfs"):
                if f"write-{name}" not in stages:
                    continue
                p = provider_for(name)
                store = StoreDir(dst, f"{name}/{sp.partition}", 0, sp.partition)
                t = time.process_time()
                p.write(store, ck.state_version, iter(batches), WriteContext(conf=ck.conf))
                totals[f"write-{name}"] += time.process_time() - t
                if f"read-{name}" in stages:
                    t = time.process_time()
                    for _ in p.read(store, ck.state_version, ReadContext(conf=ck.conf)):
                        pass
                    totals[f"read-{name}"] += time.process_time() - t
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    out = {"migrate": str(Path(migrate.__file__).parent), "rows": rows, "partitions": len(parts) - int(warm),
           "cpu_s": {k: round(v, 3) for k, v in totals.items()},
           "us_per_row": {k: round(v / max(rows, 1) * 1e6, 3) for k, v in totals.items()}}
    print(json.dumps(out, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
