"""Pieces every command shares: opening locations safely, target guards, per-partition work.

A *partition task* moves one store partition: read the source version as batches, digest them on
the way through, write the target layout, read the target back with our own reader, digest again
and compare. Tasks are plain picklable data so ``--jobs`` can run them in worker processes.
"""

from __future__ import annotations

import argparse
import os
from collections.abc import Callable, Iterable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from multiprocessing import get_context
from typing import Any

from ..checkpoint.model import Checkpoint, StorePartition
from ..digest import Digest, DigestingIterator, digest_batches
from ..errors import StateshiftError, UnsafeTarget, UsageError
from ..providers import provider_for
from ..providers.base import ReadContext, StoreDir, WriteContext, WrittenFile
from ..storage import Location

INCOMPLETE_TEXT = (  # must start with checkpoint.model.INCOMPLETE_PREFIX
    "stateshift: this checkpoint is being written by stateshift and is NOT usable yet.\n"
    "If no stateshift command is running, the command was interrupted: rerun it (with --resume)\n"
    "or delete this directory.\n"
)


def _norm(loc: Location) -> tuple[str, str]:
    protocol = loc.fs.protocol
    proto = protocol[0] if isinstance(protocol, (tuple, list)) else protocol
    path = os.path.realpath(loc.root) if loc.is_local else loc.root.rstrip("/")
    return str(proto), path.rstrip("/")


def guard_target(src: Location, dst: Location) -> None:
    """Refuse a target equal to, inside, or containing the source."""
    sp, spath = _norm(src)
    dp, dpath = _norm(dst)
    if sp != dp:
        return
    if spath == dpath:
        raise UnsafeTarget("target is the source itself; stateshift never writes to the source", dst.display)
    if dpath.startswith(spath + "/"):
        raise UnsafeTarget("target is inside the source checkpoint; choose a location outside it", dst.display)
    if spath.startswith(dpath + "/"):
        raise UnsafeTarget("target contains the source checkpoint; choose a location outside it", dst.display)


def prepare_target(dst: Location, overwrite: bool) -> None:
    """Refuse a non-empty target unless ``overwrite``; then mark it incomplete before any state."""
    existing = dst.list_dir("")
    if existing and not overwrite:
        raise UnsafeTarget(
            f"target is not empty ({len(existing)} entries, e.g. {sorted(existing)[0]}); pass --overwrite to replace it",
            dst.display,
        )
    if existing:
        for name in existing:
            dst.remove(name, recursive=True)
    dst.makedirs("")
    # The engine reads `metadata` first; this text is not valid JSON, so the engine refuses to start
    # on a half-written target, and `stateshift inspect` reports it as incomplete.
    dst.write_bytes("metadata", INCOMPLETE_TEXT.encode())


@dataclass(frozen=True)
class PartitionTask:
    source: StoreDir
    source_provider: str
    target: StoreDir
    target_provider: str
    version: int
    read_conf: dict[str, str]
    write_conf: dict[str, str]
    num_cols_prefix_key: int = 0
    write_crc: bool = True
    listing: dict[str, Any] | None = field(default=None, compare=False)


@dataclass(frozen=True)
class PartitionResult:
    operator_id: int
    store_name: str
    partition: int
    source_digest: Digest
    target_digest: Digest | None
    source_bytes: int
    key_bytes: int
    value_bytes: int
    written: tuple[WrittenFile, ...] = ()

    @property
    def ok(self) -> bool:
        return self.target_digest is not None and self.target_digest == self.source_digest

    def to_json(self) -> dict[str, Any]:
        return {
            "operator": self.operator_id,
            "store": self.store_name,
            "partition": self.partition,
            "rows": self.source_digest.rows,
            "source_bytes": self.source_bytes,
            "source_digest": self.source_digest.hexdigest,
            "target_digest": self.target_digest.hexdigest if self.target_digest else None,
            "verified": self.ok,
            "written": [{"path": w.rel, "bytes": w.size} for w in self.written],
        }


def run_partition(task: PartitionTask) -> PartitionResult:
    """Move one store partition and prove it by reading the target back."""
    src = provider_for(task.source_provider)
    dst = provider_for(task.target_provider)
    rctx = ReadContext(conf=task.read_conf, num_cols_prefix_key=task.num_cols_prefix_key, listing=task.listing)
    source_bytes = sum(f.size for f in src.source_files(task.source, task.version, rctx))
    props = src.store_properties(task.source, task.version, rctx)  # what the rows cannot carry
    dst.check_writable(props, task.source.describe())
    stream = DigestingIterator(src.read(task.source, task.version, rctx))
    wctx = WriteContext(conf=task.write_conf, num_cols_prefix_key=task.num_cols_prefix_key, write_crc=task.write_crc, extra=props)
    written = dst.write(task.target, task.version, stream, wctx)
    back = digest_batches(
        dst.read(task.target, task.version, ReadContext(conf=task.write_conf, num_cols_prefix_key=task.num_cols_prefix_key, extra=props))
    )
    return PartitionResult(
        task.source.operator_id,
        task.source.store_name,
        task.source.partition,
        stream.digest,
        back,
        source_bytes,
        stream.key_bytes,
        stream.value_bytes,
        tuple(written),
    )


def read_back_digest(provider: str, target: StoreDir, version: int, conf: dict[str, str], prefix: int) -> Digest | None:
    """Digest of what an earlier run left in a target store directory, or None if unreadable."""
    try:
        listing = target.location.list_dir(target.rel)
        if not listing:
            return None
        ctx = ReadContext(conf=conf, num_cols_prefix_key=prefix, listing=listing)
        return digest_batches(provider_for(provider).read(target, version, ctx))
    except StateshiftError:
        return None


def reverify_partition(task: PartitionTask, expected: Digest) -> PartitionResult | None:
    """Read back a partition an earlier run wrote; a result if it still matches, else None."""
    back = read_back_digest(task.target_provider, task.target, task.version, task.write_conf, task.num_cols_prefix_key)
    if back != expected:
        return None
    return PartitionResult(
        task.source.operator_id, task.source.store_name, task.source.partition, expected, back, 0, 0, 0, ()
    )


def add_target_arguments(parser: argparse.ArgumentParser, what: str) -> None:
    """The options every command that builds a checkpoint shares."""
    from ..providers import PROVIDER_NAMES

    parser.add_argument("--to", required=True, metavar="PROVIDER", help=f"target provider: {' | '.join(PROVIDER_NAMES)} | <provider class>")
    parser.add_argument("--overwrite", action="store_true", help="replace a non-empty DST")
    parser.add_argument("--resume", action="store_true", help=f"finish an interrupted {what} into DST, reusing verified partitions")
    add_jobs_argument(parser)
    parser.add_argument("--target-storage-option", action="append", default=[], metavar="KEY=VALUE", help="filesystem option for DST only")


def add_jobs_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--jobs", "-j", type=int, default=os.cpu_count() or 1, help="store partitions in parallel (default: cores)")


def checked_jobs(jobs: int) -> int:
    if jobs < 1:
        raise UsageError("--jobs must be at least 1")
    return jobs


def refuse_unwritable(ckpt: Checkpoint, target_provider: str) -> None:
    """Refuse, before anything is written, stores the target provider cannot hold (one store
    partition per operator store is asked: the kind of a store is the same in all its partitions)."""
    src = provider_for(ckpt.provider_class)
    dst = provider_for(target_provider)
    seen: set[tuple[int, str]] = set()
    for op in ckpt.operators:
        for sp in op.partitions:
            if (sp.operator_id, sp.store_name) in seen or not src.versions(sp.listing):
                continue
            seen.add((sp.operator_id, sp.store_name))
            prefix = op.store_info(sp.store_name).num_cols_prefix_key
            ctx = ReadContext(conf=ckpt.conf, num_cols_prefix_key=prefix, listing=sp.listing)
            dst.check_writable(src.store_properties(sp.dir, ckpt.state_version, ctx), sp.dir.describe())


def digest_partition(sp: StorePartition, provider: str, version: int, conf: dict[str, str], prefix: int) -> tuple[Digest, int]:
    """Digest of one store partition of a checkpoint, plus its source bytes."""
    p = provider_for(provider)
    ctx = ReadContext(conf=conf, num_cols_prefix_key=prefix, listing=sp.listing)
    size = sum(f.size for f in p.source_files(sp.dir, version, ctx))
    return digest_batches(p.read(sp.dir, version, ctx)), size


PARALLEL_MIN_BYTES = 16 << 20
PARALLEL_MIN_TASKS = 8


def _known_bytes(tasks: list[Any]) -> int:
    """Source bytes the tasks' listings show (archive tasks: their data file sizes)."""
    total = 0
    for t in tasks:
        listing = getattr(t, "listing", None)
        if listing:
            total += sum(getattr(e, "size", 0) for e in listing.values())
        data_file = getattr(t, "data_file", None)
        if data_file is not None:
            total += int(getattr(data_file, "bytes", 0) or getattr(data_file, "size", 0) or 0)
        if not listing and data_file is None:
            return PARALLEL_MIN_BYTES  # unknown: assume it is worth it
    return total


def run_tasks(
    tasks: list[PartitionTask],
    fn: Callable[[PartitionTask], PartitionResult],
    jobs: int,
    on_done: Callable[[PartitionResult], None],
) -> list[PartitionResult]:
    """Run tasks in order (``jobs`` <= 1) or in worker processes; memory is bounded by jobs in flight.

    Starting worker processes costs about a second each, so small jobs (fewer than
    ``PARALLEL_MIN_TASKS`` partitions with less than ``PARALLEL_MIN_BYTES`` of source state by the
    listings the tasks carry) run in this process.
    """
    results: list[PartitionResult] = []
    small = len(tasks) < PARALLEL_MIN_TASKS and _known_bytes(tasks) < PARALLEL_MIN_BYTES
    if jobs <= 1 or len(tasks) <= 1 or small:
        for t in tasks:
            r = fn(t)
            on_done(r)
            results.append(r)
        return results
    ctx = get_context("spawn")
    with ProcessPoolExecutor(max_workers=jobs, mp_context=ctx) as pool:
        pending = [pool.submit(fn, t) for t in tasks]
        for fut in pending:
            try:
                r = fut.result()
            except StateshiftError:
                for other in pending:
                    other.cancel()
                raise
            on_done(r)
            results.append(r)
    return results


def tasks_for(
    ckpt: Checkpoint, dst: Location, target_provider: str, write_conf: dict[str, str], partitions: Iterable[StorePartition]
) -> list[PartitionTask]:
    tasks = []
    for sp in partitions:
        op = next(o for o in ckpt.operators if o.operator_id == sp.operator_id)
        prefix = op.store_info(sp.store_name).num_cols_prefix_key
        tasks.append(
            PartitionTask(
                source=sp.dir,
                source_provider=ckpt.provider_class,
                target=StoreDir(dst, sp.dir.rel, sp.operator_id, sp.partition, sp.store_name),
                target_provider=target_provider,
                version=ckpt.state_version,
                read_conf=ckpt.conf,
                write_conf=write_conf,
                num_cols_prefix_key=prefix,
                write_crc=dst.is_local,
                listing=sp.listing,
            )
        )
    return tasks
