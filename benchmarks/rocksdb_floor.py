"""What RocksDB costs per key through rocksdict, the binding the tool uses: the counterpart of
``rocksdb_floor.c`` (same keys, values, table options and steps), to separate RocksDB's own cost
from the binding's.

    python -m benchmarks.rocksdb_floor /tmp/floor-dir-py [keys]

The puts go through ``SstFileWriter`` one call per key, as ``migrate.providers.rocksdb_db`` writes;
the scan is ``rocksdb_db.iterate``, the tool's own read loop (rocksdict's ``items()`` view in
batches of Arrow arrays, its completeness checked at the end). Prints CPU microseconds per key of each.
"""

from __future__ import annotations

import os
import shutil
import struct
import sys
import time


def main(argv: list[str] | None = None) -> int:
    from rocksdict import IngestExternalFileOptions, Rdict, SstFileWriter

    from migrate.providers.rocksdb_db import db_options, iterate

    argv = sys.argv[1:] if argv is None else argv
    if not argv:
        print("usage: python -m benchmarks.rocksdb_floor DIR [keys]", file=sys.stderr)
        return 2
    folder, n = argv[0], int(argv[1]) if len(argv) > 1 else 200_000
    shutil.rmtree(folder, ignore_errors=True)
    os.makedirs(folder)
    keys = [b"key-%016d" % i + b"\x00" * 4 for i in range(n)]  # 24 bytes, ascending, as in the C program
    x, mask, values = 20261202, (1 << 64) - 1, []
    for _ in range(n):  # the C program's 64-bit LCG (Knuth's MMIX constants), little-endian words
        words = []
        for _ in range(5):
            x = (x * 6364136223846793005 + 1442695040888963407) & mask
            words.append(x)
        values.append(struct.pack("<5Q", *words))
    options = db_options({}, folder)  # the engine's table options, as the tool writes them
    sst = os.path.join(folder, "run.sst")
    writer = SstFileWriter(options=options)
    writer.open(sst)
    t = time.process_time()
    for key, value in zip(keys, values):
        writer[key] = value
    writer.finish()
    put_us = (time.process_time() - t) / n * 1e6
    db = Rdict(os.path.join(folder, "db"), options=options)
    ingest = IngestExternalFileOptions()
    ingest.set_move_files(True)
    db.ingest_external_file([sst], ingest)
    db.close()
    t = time.process_time()
    seen = 0
    for k, v in iterate(os.path.join(folder, "db"), folder):
        seen += len(k)
    scan_us = (time.process_time() - t) / max(seen, 1) * 1e6
    if seen != n:
        print(f"read back {seen} keys, wrote {n}", file=sys.stderr)
        return 1
    print(f"rocksdict: {n} keys, put {put_us:.3f} CPU us per key, scan {scan_us:.3f} CPU us per key")
    return 0


if __name__ == "__main__":
    sys.exit(main())
