"""What RocksDB's own steps cost for a case's rows, in the same run as the case: the least a
case that reads or writes RocksDB can cost through the binding the tool must use (rocksdict, which
bundles the engine's RocksDB version), next to the floor, which decodes nothing.

    python -m benchmarks.rocksdb_steps PLAN.json

For each store partition of a RocksDB checkpoint (the table files a case wrote or read), with the
version's files restored into a scratch DB folder first (not timed: the zip's members unpacked,
table files linked, by the tool's own ``RocksDBProvider._restore``), in the place the tool's own
scratch would be (``migrate.scratch``: a tmpfs when there is room, where RocksDB's syncs cost
nothing):

* ``scan``: open the DB read-only and read every row, through the tool's compiled batch loop
  (``rocksdb_db.iterate``: rocksdict's ``items()`` view into Arrow arrays), as every case that
  reads RocksDB must (a convert to RocksDB and an import read their target back as proof);
* ``write`` (targets only): put the scanned rows, already in key order, into a new table file
  through the tool's compiled put loop and ingest it into a fresh DB with its checkpoint taken
  (``rocksdb_db._write_run``, ``rocksdb_db.build_db``), with the engine's table options. The
  table file is written beside the checkpoint, on its file system, and the DB in scratch, as the
  tool writes a partition of one sorted run of 4 MiB or more into a local target (the benchmark's
  10M-key partitions; at 1M they are smaller, and the tool builds them in scratch).

The times are the CPU seconds of those calls alone (``time.process_time``), summed over the
partitions, which run over the same number of worker processes as the tool's. A case that does
these steps can take no less wall clock than their CPU seconds over its jobs, whatever else it
does; that over the floor's wall clock is printed as the least ratio to the floor the case can
reach. Not part of the tool.
"""

from __future__ import annotations

import functools
import json
import os
import shutil
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from multiprocessing import get_context


#: the scratch folders of the steps (``migrate.scratch.make`` adds the process id)
SCRATCH_PREFIX = "stateshift-rocksdb-steps-"


def partition_steps(task: tuple[str, int, bool]) -> tuple[float, float, int]:
    """(scan CPU s, write CPU s, rows) of one store partition (``task``: checkpoint root, index in
    its store partitions, whether to write too)."""
    from migrate import scratch as scratch_dir
    from migrate.checkpoint.model import load_checkpoint
    from migrate.providers.base import ReadContext
    from migrate.providers.rocksdb import RocksDBProvider
    from migrate.providers.rocksdb_db import _write_run, build_db, db_options, iterate
    from migrate.storage import open_location

    root, index, write = task
    ck = load_checkpoint(open_location(root))
    sp = ck.store_partitions()[index]
    provider = RocksDBProvider()
    ctx = ReadContext(conf=ck.conf, listing=sp.listing)
    zip_name, changelogs = provider.plan(sp.dir, ck.state_version, sp.listing, ctx)
    if zip_name is None or changelogs:
        raise SystemExit(f"{sp.dir.describe()}: only a version zip without changelogs is measured")
    # where the tool would build this partition (``migrate.scratch``: a tmpfs when there is room,
    # as the tool's RocksDB reads and builds do), so the steps pay no disk syncs the tool does not;
    # the size asked for is a rough bound (the partition's listed files, three times)
    folder = scratch_dir.make(SCRATCH_PREFIX, 3 * sum(e.size for e in sp.listing.values()))
    try:
        db_dir = os.path.join(folder, "db")
        os.mkdir(db_dir)
        provider._restore(sp.dir, zip_name, provider._metadata(sp.dir, zip_name, sp.listing), db_dir, link=True)
        where = sp.dir.describe(zip_name)
        t = time.process_time()
        batches = list(iterate(db_dir, where))
        scan = time.process_time() - t
        rows = sum(len(k) for k, _ in batches)
        written = 0.0
        if write and rows:
            options = db_options(ck.conf, where)
            out = os.path.join(folder, "out")
            os.mkdir(out)
            # the table file beside the checkpoint, on its file system, as the tool writes a
            # partition's one run in place in a local target (RocksDBProvider.write)
            beside = tempfile.mkdtemp(prefix=SCRATCH_PREFIX, dir=os.path.dirname(os.path.abspath(root)))
            try:
                t = time.process_time()
                place = functools.partial(os.path.join, beside, "run.sst")
                run = _write_run([k for k, _ in batches], [v for _, v in batches], options, place, where, (b"", b""))
                build_db([run], rows, options, out, where)
                written = time.process_time() - t
            finally:
                shutil.rmtree(beside, ignore_errors=True)
        return scan, written, rows
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def read_plan(argv: list[str], usage: str) -> dict | None:
    """The JSON plan named by the one argument of a steps command (None, after the usage, without it)."""
    if len(argv) != 1:
        print(usage, file=sys.stderr)
        return None
    with open(argv[0]) as f:
        return json.load(f)


def map_in_tool_env(fn, tasks: list, jobs: int) -> list:
    """``fn`` over ``tasks`` in ``jobs`` spawned processes (in this one for a single job), in the
    environment the tool's command line gives its own processes (spawned workers start with it):
    Arrow's pool, one OpenBLAS thread, glibc's fixed malloc thresholds; without them the steps
    would pay costs the tool does not."""
    from migrate import cli

    cli.prefer_arrow_pool()
    cli.no_blas_pool()
    cli.keep_freed_memory()
    if jobs <= 1:
        return [fn(t) for t in tasks]
    with ProcessPoolExecutor(max_workers=jobs, mp_context=get_context("spawn")) as pool:
        return list(pool.map(fn, tasks))


def main(argv: list[str] | None = None) -> int:
    plan = read_plan(sys.argv[1:] if argv is None else argv,
                     "usage: python -m benchmarks.rocksdb_steps PLAN.json  ({'root', 'partitions', 'write', 'jobs'})")
    if plan is None:
        return 2
    tasks = [(plan["root"], i, bool(plan["write"])) for i in range(plan["partitions"])]
    results = map_in_tool_env(partition_steps, tasks, plan["jobs"])
    print(json.dumps({
        "scan_cpu_s": round(sum(r[0] for r in results), 3),
        "write_cpu_s": round(sum(r[1] for r in results), 3),
        "rows": sum(r[2] for r in results),
    }))
    return 0


if __name__ == "__main__":
    sys.exit(main())
