"""``stateshift convert SRC DST --to PROVIDER``: rebuild a checkpoint on another provider.

Order of work, chosen so that DST is never usable before it is proven:

1. read the source model (logs, operators, stores) and refuse unsafe targets;
2. mark DST incomplete (a ``metadata`` file the engine refuses to parse);
3. per store partition: read the source version, digest it on the way, write the target layout,
   read the target back with our own reader, compare digests;
4. copy operator metadata, schemas and sources verbatim;
5. write the commits, the rewritten offsets entries, and last the real ``metadata``.

With ``--dry-run`` steps 2-5 are replaced by printing the plan; nothing is written.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from .. import faults
from ..checkpoint.engine import nullable_value_schema
from ..checkpoint.files import (
    CopyFile,
    conf_changes,
    is_operator_metadata_v2,
    point_schema_paths_at,
    rewritten_offsets,
    verbatim_files,
)
from ..checkpoint.liveness import changed_since, running_signs
from ..checkpoint.model import Checkpoint, load_checkpoint
from ..checkpoint.schemas import check_schemas, schema_files
from ..checkpoint.uids import (
    check_chain_against_commits,
    checkpoint_format,
    commits_for_target,
    target_format,
    uids_table,
)
from ..codecs.hadoop_crc import crc_name, make_crc
from ..errors import QueryMayBeRunning, VerificationFailed
from ..providers import class_name_for, provider_for
from ..storage import Location
from . import journal
from .common import (
    PartitionResult,
    PartitionTask,
    add_checkpoint_format_argument,
    add_target_arguments,
    checked_jobs,
    digest_partitions,
    digest_task,
    engine_plan,
    guard_target,
    refuse_format_for_engine,
    refuse_unwritable,
    reverify_partition,
    run_partition,
    run_tasks,
    start_workers_early,
    tasks_for,
)


@dataclass
class ConvertReport:
    source: str
    target: str
    query_id: str
    batch: int
    state_version: int
    source_provider: str
    target_provider: str
    uncommitted: tuple[int, ...]
    conf_changes: dict[str, tuple[str | None, str]]
    dry_run: bool
    partitions: list[dict[str, Any]] = field(default_factory=list)
    files: list[dict[str, Any]] = field(default_factory=list)
    source_format: int = 1  # state checkpoint format (checkpoint/uids.py)
    target_format: int = 1
    source_engine: dict[str, Any] = field(default_factory=dict)  # checkpoint.engine.EngineInference.to_json()
    target_engine: str = "4.x"
    schema_rewrites: list[str] = field(default_factory=list)  # made nullable for the target engine
    target_action: str | None = None  # a dry run: what the run would do with DST (journal.plan_target)

    @property
    def rows(self) -> int:
        return sum(int(p["rows"]) for p in self.partitions)

    def to_json(self) -> dict[str, Any]:
        return {
            "command": "convert",
            "checkpoint_format": {"source": self.source_format, "target": self.target_format},
            "source_engine": self.source_engine,
            "target_engine": self.target_engine,
            "schema_rewrites": self.schema_rewrites,
            "dry_run": self.dry_run,
            **({"target_action": self.target_action} if self.dry_run else {}),
            "source": self.source,
            "target": self.target,
            "query_id": self.query_id,
            "batch": self.batch,
            "state_version": self.state_version,
            "source_provider": self.source_provider,
            "target_provider": self.target_provider,
            "uncommitted_batches": list(self.uncommitted),
            "conf_changes": {k: {"old": o, "new": n} for k, (o, n) in self.conf_changes.items()},
            "rows": self.rows,
            "partitions": self.partitions,
            "files": self.files,
            "verified": (not self.dry_run) and all(p.get("verified") for p in self.partitions),
        }


def _write_with_crc(dst: Location, rel: str, data: bytes, crc: bool) -> list[dict[str, Any]]:
    name = rel.rsplit("/", 1)[-1]
    parent = rel.rsplit("/", 1)[0] if "/" in rel else ""
    crc_rel = f"{parent}/{crc_name(name)}" if parent else crc_name(name)
    if dst.is_local:  # sidecars only exist on local disk; never leave a stale one beside new bytes
        dst.remove(crc_rel)
    dst.write_bytes(rel, data)
    out = [{"path": rel, "bytes": len(data), "action": "write"}]
    if crc and dst.is_local:
        sidecar = make_crc(data)
        dst.write_bytes(crc_rel, sidecar)
        out.append({"path": crc_rel, "bytes": len(sidecar), "action": "write"})
    return out


def crc_rel(rel: str) -> str:
    """The checksum sidecar beside ``rel``."""
    parent, _, name = rel.rpartition("/")
    return f"{parent}/{crc_name(name)}" if parent else crc_name(name)


def _copy(src: Location, dst: Location, rel: str) -> dict[str, Any]:
    data = src.read_bytes(rel)
    dst.write_bytes(rel, data)
    return {"path": rel, "bytes": len(data), "action": "copy"}


def plan_files(
    ckpt: Checkpoint, target_provider: str, fmt: int = 1, schema_rewrites: list[str] | tuple[str, ...] = ()
) -> list[dict[str, Any]]:
    early, late = verbatim_files(ckpt)
    changed = commits_for_target(ckpt.commits, ckpt.latest_batch, fmt, {})  # which entries change (ids not chosen yet)
    changed = {**changed, **{rel: b"" for rel in schema_rewrites}}
    files = [{"path": f.rel, "bytes": f.size, "action": "rewrite" if f.rel in changed else "copy"} for f in early + late]
    for rel, data, _ in rewritten_offsets(ckpt, class_name_for(target_provider)):
        files.append({"path": rel, "bytes": len(data), "action": "rewrite"})
    return files


def convert(
    src: Location,
    dst: Location,
    to: str,
    *,
    dry_run: bool = False,
    overwrite: bool = False,
    resume: bool = False,
    force: bool = False,
    jobs: int = 1,
    progress: Callable[[PartitionResult], None] = lambda r: None,
    on_plan: Callable[[int], None] = lambda n: None,
    checkpoint_format_to: int | None = None,
    engine_version: str | None = None,
) -> ConvertReport:
    guard_target(src, dst)
    ckpt = load_checkpoint(src)
    if not dry_run:
        start_workers_early(jobs, ckpt.store_partitions())
    if not force:
        refuse_if_running(ckpt)
    target_class = class_name_for(to)
    target = provider_for(target_class)
    ckpt.provider  # an unknown source provider class raises Unsupported here
    # listed once, now: publish copies exactly these, so a file that vanishes meanwhile is an error,
    # not a file quietly left out of a target that looks complete
    files = verbatim_files(ckpt)
    check_schemas(ckpt, files[0])
    refuse_unwritable(ckpt, target_class)
    check_chain_against_commits(ckpt)  # format 2: the lineage agrees with the commit log
    fmt = target_format(checkpoint_format(ckpt), target.name, checkpoint_format_to, dst.display)
    source_engine, engine, schema_rewrites = engine_plan(ckpt, engine_version, schema_files(files[0]))
    refuse_format_for_engine(fmt, engine, dst.display)
    report = ConvertReport(
        source=src.display,
        target=dst.display,
        query_id=ckpt.query_id,
        batch=ckpt.latest_batch,
        state_version=ckpt.state_version,
        source_provider=ckpt.provider_class,
        target_provider=target_class,
        uncommitted=ckpt.uncommitted,
        conf_changes=conf_changes(ckpt, target_class),
        dry_run=dry_run,
        source_format=checkpoint_format(ckpt),
        target_format=fmt,
        source_engine=source_engine.to_json(),
        target_engine=engine,
        schema_rewrites=schema_rewrites,
    )
    partitions = ckpt.store_partitions()
    identity = {
        "command": "convert",
        "source": src.display,
        "query_id": ckpt.query_id,
        "batch": ckpt.latest_batch,
        "source_provider": ckpt.provider_class,
        "target_provider": target_class,
        "checkpoint_format": fmt,
        "target_engine": engine,
    }
    if dry_run:  # the target checked as the run would check it, before the partitions are read
        report.target_action = journal.plan_target(dst, identity, overwrite=overwrite, resume=resume)
    on_plan(len(partitions))
    if dry_run:
        report.partitions = dry_run_partitions(ckpt, target.name, progress, jobs)
        report.files = plan_files(ckpt, target_class, fmt, schema_rewrites)
        return report

    tasks = tasks_for(ckpt, dst, target.name, dict(ckpt.conf), partitions, target_format=fmt, engine=engine)
    results = run_journaled(dst, identity, tasks, resume=resume, overwrite=overwrite, jobs=jobs, progress=progress)
    report.partitions = [r.to_json() for r in results]
    if not force:
        refuse_if_running(ckpt, after_read=True)
    faults.reached("before-logs")
    publish(ckpt, dst, target_class, report, commits=commits_for_target(ckpt.commits, ckpt.latest_batch, fmt, written_uids(ckpt, tasks)),
            schema_rewrites=schema_rewrites, files=files)
    journal.finish(dst)
    return report


def written_uids(ckpt: Checkpoint, tasks: list[PartitionTask]) -> dict[int, list[list[str]]]:
    """``stateUniqueIds`` of the versions the tasks wrote (stores in operator-metadata order)."""
    order = {op.operator_id: [s.name for s in op.stores] for op in ckpt.operators}
    return uids_table(
        (t.target.operator_id, t.target.partition, order[t.target.operator_id].index(t.target.store_name), t.target_uid)
        for t in tasks
        if t.target_uid
    )


def dry_run_partitions(
    ckpt: Checkpoint, target_name: str, progress: Callable[[Any], None], jobs: int = 1
) -> list[dict[str, Any]]:
    """The plan of each store partition: its rows, source bytes and digest (every partition read,
    ``jobs`` at a time) and the files the target would get."""
    partitions = ckpt.store_partitions()
    results = digest_partitions([digest_task(ckpt, sp) for sp in partitions], jobs, progress)
    out = []
    for sp, d in zip(partitions, results):
        entry = PartitionResult(sp.operator_id, sp.store_name, sp.partition, d.digest, None, d.source_bytes, 0, 0).to_json()
        entry["target_files"] = [f"{sp.dir.rel}/{n}" for n in target_names(target_name, ckpt.state_version)]
        del entry["verified"], entry["written"], entry["target_digest"]
        out.append(entry)
    return out


def refuse_if_running(ckpt: Checkpoint, after_read: bool = False) -> None:
    signs = changed_since(ckpt) if after_read else running_signs(ckpt)
    if signs:
        raise QueryMayBeRunning(
            f"the query may still be running: {signs[0]}"
            + (f" (and {len(signs) - 1} more signs)" if len(signs) > 1 else "")
            + "; stop it, wait until nothing changes for 10 minutes, or pass --force if you are sure it is stopped",
            ckpt.location.display,
        )


def run_journaled(
    dst: Location,
    identity: dict[str, Any],
    tasks: list[PartitionTask],
    *,
    resume: bool,
    overwrite: bool,
    jobs: int,
    progress: Callable[[PartitionResult], None],
) -> list[PartitionResult]:
    """Run partition tasks into ``dst`` with a resume journal; raise if any read-back differs."""

    def key_of(t: PartitionTask) -> str:
        return journal.key(t.source.operator_id, t.source.store_name, t.source.partition)

    results, _ = journal.run_with_journal(
        dst,
        identity,
        tasks,
        key_of=key_of,
        target_rel=lambda t: t.target.rel,
        reverify=reverify_partition,
        run=lambda todo, on_done: run_tasks(todo, run_partition, jobs, on_done),
        result_digest=lambda r: r.source_digest,
        resume=resume,
        overwrite=overwrite,
        progress=progress,
    )
    bad = [r for r in results if not r.ok]
    if bad:
        r = bad[0]
        raise VerificationFailed(
            f"read-back of operator {r.operator_id} store {r.store_name} partition {r.partition} does not match the "
            f"source ({r.source_digest.rows} rows {r.source_digest.hexdigest} vs "
            f"{r.target_digest.rows if r.target_digest else 0} rows {r.target_digest.hexdigest if r.target_digest else '-'}); "
            f"{len(bad)} partition(s) differ; the target is left marked incomplete",
            dst.display,
        )
    return results


def target_names(provider: str, version: int) -> list[str]:
    return [f"{version}.snapshot"] if provider == "hdfs" else [f"{version}.zip", "SSTs/<new>.sst"]


def publish(
    ckpt: Checkpoint, dst: Location, target_class: str, report: ConvertReport, query_metadata: bytes | None = None,
    commits: dict[str, bytes] | None = None, schema_rewrites: list[str] | tuple[str, ...] = (),
    *,
    files: tuple[list[CopyFile], list[CopyFile]],
) -> None:
    """Copy the verbatim files and write the logs; the real ``metadata`` goes last. ``commits``:
    commits entries rewritten for the target's state checkpoint format (checkpoint/uids.py);
    ``schema_rewrites``: schema files whose value schema is made nullable for the target engine
    (``checkpoint.engine.upgrade_schema_rewrites``); ``files``: the verbatim files
    (``verbatim_files``) as listed when the run was planned."""
    src = ckpt.location
    commits = commits or {}
    early, late = files
    moved = {f.rel for f in early if is_operator_metadata_v2(f.rel)}  # schema paths point at dst
    relaxed = set(schema_rewrites)
    for f in early:
        if f.rel in moved:
            data = point_schema_paths_at(src.read_bytes(f.rel), dst, src.describe(f.rel))
            report.files += _write_with_crc(dst, f.rel, data, crc_rel(f.rel) in {g.rel for g in early})
        elif f.rel in relaxed:
            data = nullable_value_schema(src.read_bytes(f.rel), src.describe(f.rel))
            report.files += _write_with_crc(dst, f.rel, data, crc_rel(f.rel) in {g.rel for g in early})
        elif f.rel not in {crc_rel(m) for m in moved | relaxed}:
            report.files.append(_copy(src, dst, f.rel))
    late_rels = {f.rel for f in late}
    for f in late:
        if f.rel in ("metadata", ".metadata.crc") or f.rel in commits or f.rel in {crc_rel(c) for c in commits}:
            continue
        report.files.append(_copy(src, dst, f.rel))
    for rel, data in sorted(commits.items()):
        report.files += _write_with_crc(dst, rel, data, crc_rel(rel) in late_rels)
    for rel, data, had_crc in rewritten_offsets(ckpt, target_class):
        report.files += _write_with_crc(dst, rel, data, had_crc)
    faults.reached("before-metadata")
    if query_metadata is None:
        # the real metadata is the commit point; its sidecar follows (a missing sidecar is harmless)
        report.files.append(_copy(src, dst, "metadata"))
        if ".metadata.crc" in ckpt.root_listing:
            report.files.append(_copy(src, dst, ".metadata.crc"))
    else:
        report.files += _write_with_crc(dst, "metadata", query_metadata, True)


def add_parser(sub: Any, common: argparse.ArgumentParser) -> None:
    c = sub.add_parser("convert", parents=[common], help="rebuild a checkpoint on another state-store provider")
    c.add_argument("source", metavar="SRC", help="checkpoint to read (local path or fsspec URL); never written")
    c.add_argument("target", metavar="DST", help="where to build the converted checkpoint")
    c.add_argument("--dry-run", action="store_true", help="print the plan as a diff and write nothing")
    c.add_argument("--force", action="store_true", help="skip the running-query guard (only if you know the query is stopped)")
    add_target_arguments(c, "conversion")
    add_checkpoint_format_argument(c)
    c.set_defaults(run=run)


def run(args: argparse.Namespace, ctx: Any) -> int:
    from .render import render_convert

    jobs = checked_jobs(args.jobs)
    src = ctx.open(args.source, readonly=True)
    dst = ctx.open(args.target, readonly=args.dry_run, extra=args.target_storage_option)
    report = convert(
        src, dst, args.to, dry_run=args.dry_run, overwrite=args.overwrite, resume=args.resume, force=args.force,
        jobs=jobs,
        progress=ctx.progress.step, on_plan=ctx.progress.start,
        checkpoint_format_to=getattr(args, "checkpoint_format", None),
        engine_version=args.engine_version,
    )
    ctx.progress.close()
    ctx.emit(report.to_json(), render_convert(report))
    return 0
