"""Pieces every command shares: opening locations safely, target guards, per-partition work.

A *partition task* moves one store partition: read the source version as batches, digest them on
the way through, write the target layout, read the target back with our own reader, digest again
and compare. Tasks are plain picklable data so ``--jobs`` can run them in worker processes.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import signal
from collections.abc import Callable, Iterable
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field
from typing import Any, ClassVar

from .. import faults, scratch, workers
from ..checkpoint.engine import (
    SPARK_35,
    EngineInference,
    infer_engine,
    nullable_value_schema,
    parse_engine_version,
    refuse_for_35,
    refuse_target,
    upgrade_schema_rewrites,
)
from ..checkpoint.model import Checkpoint, StorePartition
from ..checkpoint.uids import derived_uid, partition_uid
from ..digest import Digest, DigestingIterator, digest_batches
from ..errors import StateshiftError, SystemFailure, UnsafeTarget, UsageError, os_failure
from ..providers import provider_for
from ..providers.base import ReadContext, StoreDir, WriteContext, WrittenFile
from ..storage import TEMP_PREFIX, Location

INCOMPLETE_TEXT = (  # must start with checkpoint.model.INCOMPLETE_PREFIX
    "stateshift: this checkpoint is being written by stateshift and is NOT usable yet.\n"
    "If no stateshift command is running, the command was interrupted: rerun it (with --resume)\n"
    "or delete this directory.\n"
)


def _norm(loc: Location) -> tuple[str, str]:
    proto = loc.protocols[0]
    path = os.path.realpath(loc.root) if loc.is_local else loc.root.rstrip("/")
    return str(proto), path.rstrip("/")


def guard_target(src: Location, dst: Location) -> None:
    """Refuse a target equal to, inside, or containing the source, and a local target that is a
    file, not a directory."""
    if dst.is_local and os.path.lexists(dst.root) and not os.path.isdir(dst.root):
        raise UnsafeTarget("target exists and is not a directory; name a new or empty directory", dst.display)
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


def not_empty(dst: Location, existing: dict[str, Any]) -> UnsafeTarget:
    """The refusal of a non-empty target without ``--overwrite``."""
    return UnsafeTarget(
        f"target is not empty ({len(existing)} entries, e.g. {sorted(existing)[0]}); pass --overwrite to replace it",
        dst.display,
    )


#: the top-level names of what ``--overwrite`` may replace: a checkpoint (the engine's or one of
#: ours, finished or not, its resume journal included) or an archive (finished or not)
REPLACEABLE = {"metadata", ".metadata.crc", "offsets", "commits", "sources", "state", "_stateshift",
               "manifest.json", "checkpoint"}


def refuse_foreign_files(dst: Location, existing: dict[str, Any]) -> None:
    """``--overwrite`` deletes DST's contents: refuse when they are not a checkpoint's or an
    archive's (a mistyped path must not cost someone's directory)."""
    foreign = sorted(n for n in existing if n not in REPLACEABLE and not n.startswith(TEMP_PREFIX))
    if foreign:
        raise UnsafeTarget(
            f"--overwrite refused: the target holds {len(foreign)} entr{'y' if len(foreign) == 1 else 'ies'} that no "
            f"checkpoint or archive has (e.g. {foreign[0]}); stateshift deletes only what it could have written: "
            "check the path, and empty the directory yourself if it is the right one",
            dst.display,
        )


def prepare_target(dst: Location, overwrite: bool) -> None:
    """Refuse a non-empty target unless ``overwrite`` (and then one holding anything but a
    checkpoint or an archive); mark it incomplete before any state."""
    existing = dst.list_dir("")
    if existing and not overwrite:
        raise not_empty(dst, existing)
    if existing:
        refuse_foreign_files(dst, existing)
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
    source_uid: str | None = None  # id of the source version (state checkpoint format 2)
    target_uid: str | None = None  # id to give the written version (format 2 target)
    engine: str = "4.x"  # engine family the target is written for (checkpoint.engine)

    @property
    def where(self) -> str:  # what an error while moving it names
        return self.target.describe()


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
    reused: bool = False  # --resume: written by the interrupted run, read back and matched

    @property
    def ok(self) -> bool:
        return self.target_digest is not None and self.target_digest == self.source_digest

    @property
    def moved_rows(self) -> int:  # what the progress bar counts
        return self.source_digest.rows

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
            **({"reused": True} if self.reused else {}),
            "written": [{"path": w.rel, "bytes": w.size} for w in self.written],
        }


def run_partition(task: PartitionTask) -> PartitionResult:
    """Move one store partition and prove it by reading the target back."""
    src = provider_for(task.source_provider)
    dst = provider_for(task.target_provider)
    rctx = ReadContext(
        conf=task.read_conf, num_cols_prefix_key=task.num_cols_prefix_key, listing=task.listing, checkpoint_id=task.source_uid,
        key_order=dst.wants_key_order,
    )
    source_bytes = sum(f.size for f in src.source_files(task.source, task.version, rctx))
    props = src.store_properties(task.source, task.version, rctx)  # what the rows cannot carry
    dst.check_writable(props, task.source.describe())
    wctx = WriteContext(
        conf=task.write_conf, num_cols_prefix_key=task.num_cols_prefix_key, write_crc=task.write_crc, extra=props,
        checkpoint_id=task.target_uid, engine=task.engine,
    )
    # closed when the write fails halfway: a reader's scratch folder goes with it (a worker ends
    # with os._exit, so a reader left suspended in a failed task never ran its clean-up)
    with contextlib.closing(src.read(task.source, task.version, rctx)) as rows:
        stream = DigestingIterator(rows)
        written = dst.write(task.target, task.version, stream, wctx)
    rctx_back = ReadContext(conf=task.write_conf, num_cols_prefix_key=task.num_cols_prefix_key, extra=props, checkpoint_id=task.target_uid)
    back = digest_batches(dst.read(task.target, task.version, rctx_back))
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


def read_back_digest(
    provider: str, target: StoreDir, version: int, conf: dict[str, str], prefix: int, uid: str | None = None
) -> Digest | None:
    """Digest of what an earlier run left in a target store directory, or None if unreadable."""
    try:
        listing = target.location.list_dir(target.rel)
        if not listing:
            return None
        ctx = ReadContext(conf=conf, num_cols_prefix_key=prefix, listing=listing, checkpoint_id=uid)
        return digest_batches(provider_for(provider).read(target, version, ctx))
    except StateshiftError:
        return None


def reverify_partition(task: PartitionTask, expected: Digest) -> PartitionResult | None:
    """Read back a partition an earlier run wrote; a result if it still matches, else None."""
    back = read_back_digest(
        task.target_provider, task.target, task.version, task.write_conf, task.num_cols_prefix_key, task.target_uid
    )
    if back != expected:
        return None
    return PartitionResult(
        task.source.operator_id, task.source.store_name, task.source.partition, expected, back, 0, 0, 0, (), reused=True
    )


def add_target_arguments(parser: argparse.ArgumentParser, what: str) -> None:
    """The options every command that builds a checkpoint shares."""
    from ..providers import PROVIDER_NAMES

    parser.add_argument("--to", required=True, metavar="PROVIDER", help=f"target provider: {' | '.join(PROVIDER_NAMES)} | <provider class>")
    parser.add_argument("--overwrite", action="store_true", help="replace a non-empty DST")
    parser.add_argument("--resume", action="store_true", help=f"finish an interrupted {what} into DST, reusing verified partitions")
    parser.add_argument(
        "--engine-version", metavar="VERSION", default=None,
        help="engine the target is written for: 3.5 (Spark 3.5.x) or 4.x (Spark 4.x; 4, 4.3, 4.3.0 also work); "
        "default: the engine that wrote the source last",
    )
    add_jobs_argument(parser)
    parser.add_argument("--target-storage-option", action="append", default=[], metavar="KEY=VALUE", help="filesystem option for DST only")


def add_checkpoint_format_argument(parser: argparse.ArgumentParser) -> None:
    """``--checkpoint-format {1,2}``: the state checkpoint format to write (checkpoint/uids.py)."""
    parser.add_argument(
        "--checkpoint-format", type=int, choices=(1, 2), default=None, metavar="{1,2}",
        help="state checkpoint format to write: 2 = unique ids in RocksDB file names and commits (rocksdb only); "
        "default: the source's format for rocksdb, 1 for hdfs",
    )


def add_jobs_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--jobs", "-j", type=int, default=None,
        help="store partitions in parallel (default: the CPUs this process may use, within a container's CPU quota)",
    )


def checked_jobs(jobs: int | None) -> int:
    """``--jobs`` as given, else its default (``workers.default_jobs``, read once, by the command
    that runs: not by every subcommand's parser at start-up)."""
    if jobs is None:
        return workers.default_jobs()
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
            ctx = ReadContext(conf=ckpt.conf, num_cols_prefix_key=prefix, listing=sp.listing, checkpoint_id=partition_uid(ckpt, sp))
            dst.check_writable(src.store_properties(sp.dir, ckpt.state_version, ctx), sp.dir.describe())


@dataclass(frozen=True)
class DigestTask:
    """Read one store partition of a checkpoint at its latest consistent version and digest it
    (``verify``, ``inspect --rows``, ``convert --dry-run``): plain data, run in a worker like a
    :class:`PartitionTask`."""

    dir: StoreDir
    provider: str
    version: int
    conf: dict[str, str]
    num_cols_prefix_key: int = 0
    uid: str | None = None  # id of the version (state checkpoint format 2)
    listing: dict[str, Any] | None = field(default=None, compare=False)
    action: ClassVar[str] = "read this store partition"  # what an OS error in it failed to do

    @property
    def where(self) -> str:
        return self.dir.describe()


def digest_task(ckpt: Checkpoint, sp: StorePartition) -> DigestTask:
    op = next(o for o in ckpt.operators if o.operator_id == sp.operator_id)
    return DigestTask(sp.dir, ckpt.provider_class, ckpt.state_version, ckpt.conf,
                      op.store_info(sp.store_name).num_cols_prefix_key, partition_uid(ckpt, sp), sp.listing)


@dataclass(frozen=True)
class DigestResult:
    digest: Digest
    source_bytes: int

    @property
    def moved_rows(self) -> int:  # what the progress bar counts
        return self.digest.rows


def run_digest_task(task: DigestTask) -> DigestResult:
    """Digest of one store partition, plus its source bytes."""
    p = provider_for(task.provider)
    ctx = ReadContext(conf=task.conf, num_cols_prefix_key=task.num_cols_prefix_key, listing=task.listing, checkpoint_id=task.uid)
    size = sum(f.size for f in p.source_files(task.dir, task.version, ctx))
    return DigestResult(digest_batches(p.read(task.dir, task.version, ctx)), size)


def digest_partitions(
    tasks: list[DigestTask], jobs: int, on_done: Callable[[DigestResult], None] = lambda r: None
) -> list[DigestResult]:
    """The digest and source bytes of each task's store partition, in order; ``jobs`` of them at
    a time in worker processes (:func:`run_tasks`), so a read-only command reads a large
    checkpoint as fast as a convert does."""
    start_workers_early(jobs, tasks)
    return run_tasks(tasks, run_digest_task, jobs, on_done)


PARALLEL_MIN_BYTES = workers.MIN_BYTES
PARALLEL_MIN_TASKS = workers.MIN_TASKS


def _known_bytes(units: list[Any]) -> int:
    """Source bytes the units show: the listing of a task or store partition, the data file of an
    archive task, or a manifest's data file entry itself."""
    total = 0
    for u in units:
        listing = getattr(u, "listing", None)
        if listing:
            total += sum(getattr(e, "size", 0) for e in listing.values())
            continue
        sized = getattr(u, "data_file", None) or u
        size = getattr(sized, "bytes", None) or getattr(sized, "size", None)
        if not isinstance(size, int):
            return PARALLEL_MIN_BYTES  # unknown: assume it is worth it
        total += size
    return total


def uses_workers(jobs: int, units: list[Any]) -> bool:
    """Whether :func:`run_tasks` runs these tasks (or the tasks of these store partitions) in
    worker processes: more than one job and one task, and not a small job (fewer than
    ``PARALLEL_MIN_TASKS`` partitions with less than ``PARALLEL_MIN_BYTES`` of source state by the
    listings they carry), which runs in this process because starting the pool costs about a
    second."""
    small = len(units) < PARALLEL_MIN_TASKS and _known_bytes(units) < PARALLEL_MIN_BYTES
    return jobs > 1 and len(units) > 1 and not small


def start_workers_early(jobs: int, units: list[Any]) -> None:
    """Start the workers' fork server now if :func:`run_tasks` will use it for these units, so its
    imports (about a CPU second) overlap the checks and planning before the pool starts; stop one
    the command line started on a guess (``migrate.workers.likely_parallel``) if it will not.
    :func:`run_tasks`, or :func:`stop_workers` on any other way out, stops it (one stopped here
    on a wrong guess is waited for by :func:`stop_workers`)."""
    if uses_workers(jobs, units):
        workers.start()
    else:
        workers.stop_soon()  # a server still importing only notices once it has finished


def run_tasks(
    tasks: list[PartitionTask],
    fn: Callable[[PartitionTask], PartitionResult],
    jobs: int,
    on_done: Callable[[PartitionResult], None],
) -> list[PartitionResult]:
    """Run tasks in order (``jobs`` <= 1) or in worker processes; memory is bounded by jobs in flight.

    Workers are forked from a fork server that has the heavy modules imported (see
    ``migrate.workers``; :func:`start_workers_early` may have started it already). Small jobs
    (:func:`uses_workers`) run in this process.
    """
    results: list[PartitionResult] = []
    if not uses_workers(jobs, tasks):
        workers.stop_soon()  # one started on a guess
        for t in tasks:
            r = run_task(fn, t)
            on_done(r)
            results.append(r)
        return results
    died: tuple[PartitionTask, list[Any]] | None = None
    stopped: list[Any] = []  # the workers an interruption ended
    try:
        with ProcessPoolExecutor(max_workers=jobs, mp_context=workers.context()) as pool:
            pending = [pool.submit(_run_in_worker, fn, t) for t in tasks]
            try:
                for fut, task in zip(pending, tasks):
                    try:
                        r = fut.result()
                    except StateshiftError:
                        for other in pending:
                            other.cancel()
                        raise
                    except BrokenProcessPool:
                        # the pool fails every other task itself (a future cancelled here first
                        # would make its thread raise InvalidStateError); the workers' exit codes
                        # are read once the pool has joined them, on the way out of this block
                        died = (task, _pool_processes(pool))
                        break
                    on_done(r)
                    results.append(r)
            except Exception:
                raise  # an error of ours: the partitions in flight finish, the rest are cancelled
            except BaseException:
                stopped = _stop_pool(pool)  # interrupted (Ctrl-C, SIGTERM): the workers stop now
                raise
    finally:
        if stopped:  # joined by the pool on the way out of its block: their exit codes are known
            scratch.remove_left_by({p.pid for p in stopped if p.exitcode is not None})
        workers.stop_soon()  # its exit overlaps the command's next steps; stop_workers waits for it
    if died is not None:
        raise SystemFailure(_worker_death(*died))
    return results


def run_task(fn: Callable[[Any], Any], task: Any) -> Any:
    """``fn(task)``, with an operating-system error that no step turned into a one-line error
    (a full scratch disk met where nobody expected one) made one, naming the file and the
    partition (``task.where``), and so is running out of memory."""
    action = getattr(task, "action", "move this store partition")
    try:
        return fn(task)
    except OSError as exc:
        if exc.filename is None:
            raise os_failure(exc, action, task.where) from exc
        raise os_failure(exc, f"use this file while {_ing(action).split(' ', 1)[0]} {task.where}") from exc
    except MemoryError as exc:  # Python's, or Arrow's (ArrowMemoryError is one): a limit on this process
        raise SystemFailure(
            f"ran out of memory {_ing(action)} (a memory limit on the process, or the machine's); "
            "lower --jobs, then run the command again", task.where,
        ) from exc


def _ing(action: str) -> str:
    """"move this store partition" -> "moving this store partition"."""
    verb, _, rest = action.partition(" ")
    return f"{verb[:-1] if verb.endswith('e') else verb}ing {rest}"


def _run_in_worker(fn: Callable[[Any], Any], task: Any) -> Any:
    faults.reached("worker-task")
    return run_task(fn, task)


def _pool_processes(pool: ProcessPoolExecutor) -> list[Any]:
    """The pool's worker processes (the executor's own list: there is no public one)."""
    return list((getattr(pool, "_processes", None) or {}).values())


def _stop_pool(pool: ProcessPoolExecutor) -> list[Any]:
    """End the workers at once (SIGTERM), for a command that was interrupted: a worker only gets
    the signal the command got when it went to the whole process group (Ctrl-C does, ``kill PID``
    does not), and a pool left waiting for its tasks would keep writing into the target after the
    command is gone. The pool then fails every task left itself (cancelling them here first made
    its thread raise InvalidStateError on a cancelled future: CPython 3.11, seen as a traceback
    before the command's one line). Returns the workers. They are not joined here: the pool's own
    thread joins them as the pool shuts down (two threads waiting for one process through the fork
    server would read its exit status from one pipe)."""
    processes = _pool_processes(pool)
    for p in processes:
        try:
            p.terminate()
        except Exception:  # noqa: BLE001 - one already gone
            pass
    return processes


def _worker_death(task: Any, processes: list[Any]) -> str:
    """The message for a pool whose worker died: how (from the workers' exit codes, those the
    pool ended itself with SIGTERM after the death left out) and the first partition not done.
    The scratch folders of the workers that are gone are removed here (they could not)."""
    how = "ended abruptly"
    try:
        ended = [(p.pid, p.exitcode) for p in processes]
    except Exception:  # noqa: BLE001 - the diagnosis is a courtesy; the failure stands without it
        ended = []
    scratch.remove_left_by({pid for pid, code in ended if code is not None})
    for _, code in ended:
        if code is None or code == -signal.SIGTERM:
            continue
        if code < 0:
            name = signal.Signals(-code).name if -code in signal.valid_signals() else "unknown"
            how = f"was killed by signal {-code} ({name}"
            how += ", the signal of the kernel's out-of-memory killer)" if -code == signal.SIGKILL else ")"
        else:
            how = f"exited with status {code}"
        break
    if isinstance(task, DigestTask):  # a read-only command: nothing to resume
        return (
            f"a worker process {how} while store partitions were being read (the first not finished: {task.where}); "
            "lower --jobs if memory ran short, then run the command again"
        )
    return (
        f"a worker process {how} while store partitions were being moved (the first not finished: {task.where}); "
        "lower --jobs if memory ran short, then run the command again (convert and import: with --resume)"
    )


def stop_workers() -> None:
    """Stop the fork server this process started, if any, and wait for it (and for one
    ``run_tasks`` left stopping), so its workers' CPU time and memory are accounted to this process
    like spawned children's (``wait4``/``RUSAGE_CHILDREN``, which the benchmarks read); the next
    ``run_tasks`` starts a new one. The CLI calls it on every way out (so a server started early is
    never left behind by an error before the pool)."""
    workers.stop()


def tasks_for(
    ckpt: Checkpoint, dst: Location, target_provider: str, write_conf: dict[str, str], partitions: Iterable[StorePartition],
    target_format: int = 1,
    engine: str = "4.x",
) -> list[PartitionTask]:
    """One task per store partition; ``target_format`` 2 gives each written version a unique id."""
    tasks = []
    for sp in partitions:
        op = next(o for o in ckpt.operators if o.operator_id == sp.operator_id)
        prefix = op.store_info(sp.store_name).num_cols_prefix_key
        source_uid = partition_uid(ckpt, sp)
        seed = f"convert:{ckpt.query_id}:{ckpt.latest_batch}:{source_uid or ''}:{target_provider}"
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
                source_uid=source_uid,
                target_uid=derived_uid(seed, sp.operator_id, sp.partition, sp.store_name) if target_format == 2 else None,
                engine=engine,
            )
        )
    return tasks


def engine_plan(ckpt: Checkpoint, requested: str | None, schema_rels: Iterable[str] = ()) -> tuple[EngineInference, str, list[str]]:
    """(the engine that wrote ``ckpt`` last, the family to write for, the schema files among
    ``schema_rels`` to rewrite for it); refuses, before anything is written, a target engine older
    than the source's and logs or confs 3.5 cannot read (see ``checkpoint.engine``); the schema
    files to rewrite are parsed here, so a bad one stops the run before anything is written."""
    source = infer_engine(ckpt)
    target = parse_engine_version(requested) if requested else source.family
    refuse_target(source, target, ckpt.location.describe)
    if target == SPARK_35:
        refuse_for_35(ckpt.offsets, ckpt.commits, ckpt.conf, ckpt.location.describe)
    rewrites = upgrade_schema_rewrites(source.family, target, schema_rels)
    for rel in rewrites:
        nullable_value_schema(ckpt.location.read_bytes(rel), ckpt.location.describe(rel))
    return source, target, rewrites


def refuse_format_for_engine(fmt: int, engine: str, where: str) -> None:
    """Engine 3.5 has only the state checkpoint format 1 (it refuses commits ``v2``, observed)."""
    if engine == SPARK_35 and fmt >= 2:
        from ..errors import Unsupported

        raise Unsupported(
            f"state checkpoint format {fmt} (unique ids, commits v2) cannot be written for engine 3.5, which reads only "
            "format 1; write format 1 or target engine 4.x",
            where,
        )
