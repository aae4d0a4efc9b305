"""``stateshift import ARCHIVE DST --to PROVIDER``: rebuild a full checkpoint from an archive.

Order of work, chosen so that DST is never usable before it is proven:

1. check the archive: the manifest's own seal, then every file it lists (size, SHA-256) and that
   no unlisted file exists; the first problem is refused with one line naming the file, before
   anything is written;
2. refuse an unsafe or non-empty DST (``--overwrite`` replaces it) and mark it incomplete;
3. per store partition: stream the raw ``key``/``value`` columns of its Parquet file into the
   target provider's writer, read the written version back with our own reader, and compare
   both digests with the manifest;
4. copy the archived metadata files (operator metadata, schemas, sources), write the offsets
   entries rewritten to name the target provider, the commits, and last ``metadata`` (with
   ``--new-query-id``: a fresh random query id).

With ``--dry-run`` the archive is still checked, then the plan is printed and nothing is written.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import re
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from .. import faults
from ..archive.manifest import CHECKPOINT_DIR, MANIFEST_NAME, DataFile, Manifest
from ..archive.reader import check_archive, load_manifest, read_rows, store_properties
from ..checkpoint.engine import (
    SPARK_35,
    EngineInference,
    infer_from_logs,
    nullable_value_schema,
    parse_engine_version,
    refuse_for_35,
    refuse_target,
    upgrade_schema_rewrites,
)
from ..checkpoint.files import CopyFile, is_operator_metadata_v2, point_schema_paths_at
from ..checkpoint.schemas import schema_files
from ..checkpoint.logs import (
    PROVIDER_CONF,
    CommitEntry,
    format_offsets,
    parse_commit,
    parse_offsets,
    parse_query_metadata,
    with_conf,
)
from ..checkpoint.uids import commits_for_target, derived_uid, target_format, uids_table
from ..digest import Digest, digest_batches
from ..errors import CorruptInput, VerificationFailed
from ..providers import class_name_for, provider_for
from ..providers.base import ReadContext, StoreDir, WriteContext, WrittenFile
from ..rows.schema import parse_state_schema_file
from ..storage import Location
from . import journal
from .common import (
    add_checkpoint_format_argument,
    add_target_arguments,
    checked_jobs,
    guard_target,
    read_back_digest,
    run_tasks,
    start_workers_early,
)
from .convert import _write_with_crc, crc_rel, target_names
from .render import target_verdict

_OFFSET_FILE = re.compile(r"^offsets/(\d+)$")
_OFFSET_CRC = re.compile(r"^offsets/\.(\d+)\.crc$")
_LAST = ("metadata", ".metadata.crc")


def store_rel(operator_id: int, store: str, partition: int) -> str:
    """The checkpoint directory of one store partition (named stores in a subdirectory)."""
    base = f"state/{operator_id}/{partition}"
    return base if store == "default" else f"{base}/{store}"


@dataclass(frozen=True)
class ImportTask:
    archive: Location
    data_file: DataFile
    target: StoreDir
    provider: str
    version: int
    write_conf: dict[str, str]
    num_cols_prefix_key: int = 0
    write_crc: bool = True
    engine: str = "4.x"  # engine family the target is written for (checkpoint.engine)
    target_uid: str | None = None  # id to give the written version (state checkpoint format 2 target)

    @property
    def where(self) -> str:  # what an error while importing it names
        return self.target.describe()


@dataclass(frozen=True)
class ImportResult:
    operator_id: int
    store_name: str
    partition: int
    expected: Digest
    # the rows as read out of the Parquet file: computed only when the target does not match the
    # archive, to tell a bad read from a bad write (a target that matches proves the read too)
    source_digest: Digest | None
    target_digest: Digest  # as read back from the written target
    written: tuple[WrittenFile, ...] = ()

    @property
    def ok(self) -> bool:
        return self.expected == self.target_digest  # the read is digested only when this fails

    @property
    def moved_rows(self) -> int:  # what the progress bar counts
        return self.expected.rows

    def to_json(self) -> dict[str, Any]:
        return {
            "operator": self.operator_id,
            "store": self.store_name,
            "partition": self.partition,
            "rows": self.expected.rows,
            "archive_digest": self.expected.hexdigest,
            "read_digest": self.source_digest.hexdigest if self.source_digest is not None else None,
            "target_digest": self.target_digest.hexdigest,
            "verified": self.ok,
            "written": [{"path": w.rel, "bytes": w.size} for w in self.written],
        }


def run_import_task(task: ImportTask) -> ImportResult:
    """Write one store partition from its Parquet file and prove it by reading it back.

    The proof is the target's digest against the one the archive's manifest records for the
    partition (the archive's files were checked against their SHA-256 before). The rows read
    out of the Parquet file are digested only when the target does not match, to tell a bad
    read from a bad write: a target that matches proves the read as well. Measured on the
    10M-key benchmark import, four alternating pairs of whole commands (medians): 9.56 -> 9.31
    CPU s, 5.20 -> 5.08 s (``benchmarks/results/2026-12-04-ab-import-one-digest.md``)."""
    p = provider_for(task.provider)
    props = store_properties(task.archive, task.data_file)  # what the rows cannot carry
    p.check_writable(props, task.archive.describe(task.data_file.path))
    stream = read_rows(task.archive, task.data_file)  # its end checks the row count against the manifest
    wctx = WriteContext(
        conf=task.write_conf, num_cols_prefix_key=task.num_cols_prefix_key, write_crc=task.write_crc, extra=props, engine=task.engine,
        checkpoint_id=task.target_uid,
    )
    written = p.write(task.target, task.version, stream, wctx)
    for _ in stream:  # a writer that stopped early leaves rows unread: read them, so the count is checked
        pass
    rctx = ReadContext(conf=task.write_conf, num_cols_prefix_key=task.num_cols_prefix_key, extra=props, checkpoint_id=task.target_uid)
    back = digest_batches(p.read(task.target, task.version, rctx))
    d = task.data_file
    read = None if back == d.digest else digest_batches(read_rows(task.archive, d))
    return ImportResult(d.operator, d.store, d.partition, d.digest, read, back, tuple(written))


@dataclass
class ImportReport:
    archive: str
    target: str
    query_id: str
    new_query_id: str | None
    batch: int
    state_version: int
    source_provider: str
    target_provider: str
    dry_run: bool
    checked_files: int = 0
    checked_bytes: int = 0
    source_engine: dict[str, Any] = field(default_factory=dict)  # checkpoint.engine.EngineInference.to_json()
    target_engine: str = "4.x"
    schema_rewrites: list[str] = field(default_factory=list)  # made nullable for the target engine
    partitions: list[dict[str, Any]] = field(default_factory=list)
    files: list[dict[str, Any]] = field(default_factory=list)
    checkpoint_format: dict[str, int] = field(default_factory=lambda: {"source": 1, "target": 1})  # checkpoint/uids.py
    target_action: str | None = None  # a dry run: what the run would do with DST (journal.plan_target)

    @property
    def rows(self) -> int:
        return sum(int(p["rows"]) for p in self.partitions)

    def to_json(self) -> dict[str, Any]:
        changes = {}
        if self.source_provider != self.target_provider:
            changes[PROVIDER_CONF] = {"old": self.source_provider, "new": self.target_provider}
        return {
            "command": "import",
            "dry_run": self.dry_run,
            **({"target_action": self.target_action} if self.dry_run else {}),
            "archive": self.archive,
            "target": self.target,
            "query_id": self.query_id,
            "new_query_id": self.new_query_id,
            "batch": self.batch,
            "state_version": self.state_version,
            "source_provider": self.source_provider,
            "target_provider": self.target_provider,
            "source_engine": self.source_engine,
            "target_engine": self.target_engine,
            "schema_rewrites": self.schema_rewrites,
            "checkpoint_format": self.checkpoint_format,
            "conf_changes": changes,
            "archive_check": {"files": self.checked_files, "bytes": self.checked_bytes, "ok": True},
            "rows": self.rows,
            "partitions": self.partitions,
            "files": self.files,
            "verified": (not self.dry_run) and all(p.get("verified") for p in self.partitions),
        }


@dataclass(frozen=True)
class _Files:
    """The archived checkpoint files sorted into the publish steps (checkpoint-relative paths)."""

    early: tuple[str, ...]
    offsets: tuple[tuple[str, int, bool], ...]  # (path, batch id, had a crc sidecar)
    commits: tuple[str, ...]
    last: tuple[str, ...]


def _sort_files(manifest: Manifest) -> _Files:
    prefix = CHECKPOINT_DIR + "/"
    rels = [f.path[len(prefix):] for f in manifest.checkpoint_files]
    crcs = {int(m.group(1)) for r in rels if (m := _OFFSET_CRC.match(r))}
    early, offsets, commits, last = [], [], [], []
    for rel in rels:
        if (m := _OFFSET_FILE.match(rel)) is not None:
            offsets.append((rel, int(m.group(1)), int(m.group(1)) in crcs))
        elif _OFFSET_CRC.match(rel):
            continue  # rewritten entries get a new sidecar
        elif rel.startswith("commits/"):
            commits.append(rel)
        elif rel in _LAST:
            last.append(rel)
        else:
            early.append(rel)
    last.sort(key=_LAST.index)
    return _Files(tuple(early), tuple(sorted(offsets, key=lambda o: o[1])), tuple(commits), tuple(last))


def _archived(archive: Location, rel: str) -> bytes:
    return archive.read_bytes(f"{CHECKPOINT_DIR}/{rel}")


def _check_logs(archive: Location, manifest: Manifest, files: _Files) -> dict[str, str]:
    """The pinned conf of the archived batch; refuses an archive whose logs do not hold that batch."""
    where = archive.describe(MANIFEST_NAME)
    if "metadata" not in files.last:
        raise CorruptInput(f"archive keeps no {CHECKPOINT_DIR}/metadata (the query id file)", where)
    if f"commits/{manifest.batch_id}" not in files.commits:
        raise CorruptInput(f"archive keeps no commits entry for its batch {manifest.batch_id}", where)
    if manifest.batch_id not in {b for _, b, _ in files.offsets}:
        raise CorruptInput(f"archive keeps no offsets entry for its batch {manifest.batch_id}", where)
    rel = f"offsets/{manifest.batch_id}"
    entry = parse_offsets(_archived(archive, rel).decode("utf-8", "replace"), manifest.batch_id, archive.describe(f"{CHECKPOINT_DIR}/{rel}"))
    return entry.conf


def _engine_plan(
    archive: Location, manifest: Manifest, files: _Files, conf: dict[str, str], requested: str | None
) -> tuple[EngineInference, str, list[str]]:
    """(the engine that wrote the exported checkpoint last, the family to write for, the archived
    schema files to rewrite for it), refused before anything is written like ``common.engine_plan``. Archives from before the manifest
    recorded the engine: inferred from the archived logs the same way."""
    describe = lambda rel: archive.describe(f"{CHECKPOINT_DIR}/{rel}")  # noqa: E731
    offsets = {b: parse_offsets(_archived(archive, r).decode("utf-8", "replace"), b, describe(r)) for r, b, _ in files.offsets}
    commits = {}
    for rel in files.commits:
        name = rel.split("/", 1)[1]
        if name.isdigit():
            commits[int(name)] = parse_commit(_archived(archive, rel).decode("utf-8", "replace"), int(name), describe(rel))
    if manifest.engine is not None:
        source = EngineInference.from_json(manifest.engine, archive.describe(MANIFEST_NAME))
    else:
        source = infer_from_logs(offsets, commits)
    target = parse_engine_version(requested) if requested else source.family
    refuse_target(source, target, describe)
    if target == SPARK_35:
        refuse_for_35(offsets, commits, conf, describe)
    for rel in schema_files([CopyFile(r, 0) for r in files.early]):  # as convert and export check them
        parse_state_schema_file(_archived(archive, rel), describe(rel))
    rewrites = upgrade_schema_rewrites(source.family, target, files.early)
    for rel in rewrites:
        nullable_value_schema(_archived(archive, rel), describe(rel))
    return source, target, rewrites


def _new_metadata(archive: Location, new_id: str) -> bytes:
    rel = f"{CHECKPOINT_DIR}/metadata"
    meta = parse_query_metadata(archive.read_text(rel), archive.describe(rel))
    meta["id"] = new_id
    return (json.dumps(meta, separators=(",", ":"), ensure_ascii=False) + "\n").encode("utf-8")


def _plan_files(files: _Files, target_class: str, new_query_id: bool) -> list[dict[str, Any]]:
    plan = [{"path": r, "action": "copy"} for r in files.early]
    plan += [{"path": r, "action": "rewrite", "change": f"{PROVIDER_CONF}={target_class}"} for r, _, _ in files.offsets]
    plan += [{"path": r, "action": "copy"} for r in files.commits]
    for r in files.last:
        if new_query_id:
            if r == "metadata":
                plan.append({"path": r, "action": "write", "change": "new random query id"})
        else:
            plan.append({"path": r, "action": "copy"})
    return plan


def _archived_commits(archive: Location, files: _Files) -> dict[int, CommitEntry]:
    out = {}
    for rel in files.commits:
        name = rel.split("/", 1)[1]
        if name.isdigit():
            out[int(name)] = parse_commit(_archived(archive, rel).decode("utf-8", "replace"), int(name), archive.describe(f"{CHECKPOINT_DIR}/{rel}"))
    return out


def _written_uids(manifest: Manifest, tasks: list[ImportTask]) -> dict[int, list[list[str]]]:
    """``stateUniqueIds`` of the versions the tasks wrote (stores in the archived operator order)."""
    def index(t: ImportTask) -> int:
        names = [s.name for s in manifest.operator(t.data_file.operator).stores]
        return names.index(t.data_file.store) if t.data_file.store in names else 0

    return uids_table((t.data_file.operator, t.data_file.partition, index(t), t.target_uid) for t in tasks if t.target_uid)


def _publish(
    archive: Location, dst: Location, files: _Files, target_class: str, metadata: bytes | None,
    commits: dict[str, bytes] | None = None, schema_rewrites: list[str] | tuple[str, ...] = (),
) -> list[dict[str, Any]]:
    """``commits``: entries rewritten for the target's state checkpoint format (checkpoint/uids.py);
    ``schema_rewrites``: schema files made nullable for the target engine (checkpoint/engine.py)."""
    out: list[dict[str, Any]] = []
    commits = commits or {}
    relaxed = set(schema_rewrites)

    def copy(rel: str) -> None:
        data = _archived(archive, rel)
        dst.write_bytes(rel, data)
        out.append({"path": rel, "bytes": len(data), "action": "copy"})

    moved = {rel for rel in files.early if is_operator_metadata_v2(rel)}  # schema paths point at dst
    for rel in files.early:
        if rel in moved:
            data = point_schema_paths_at(_archived(archive, rel), dst, archive.describe(f"{CHECKPOINT_DIR}/{rel}"))
            out += _write_with_crc(dst, rel, data, crc_rel(rel) in files.early)
        elif rel in relaxed:
            data = nullable_value_schema(_archived(archive, rel), archive.describe(f"{CHECKPOINT_DIR}/{rel}"))
            out += _write_with_crc(dst, rel, data, crc_rel(rel) in files.early)
        elif rel not in {crc_rel(m) for m in moved | relaxed}:
            copy(rel)
    for rel, batch, had_crc in files.offsets:
        entry = parse_offsets(_archived(archive, rel).decode("utf-8"), batch, archive.describe(f"{CHECKPOINT_DIR}/{rel}"))
        data = format_offsets(with_conf(entry, {PROVIDER_CONF: target_class})).encode("utf-8")
        out += _write_with_crc(dst, rel, data, had_crc)
    for rel in files.commits:
        if rel not in commits and rel not in {crc_rel(c) for c in commits}:
            copy(rel)
    for rel, data in sorted(commits.items()):
        out += _write_with_crc(dst, rel, data, crc_rel(rel) in files.commits)
    faults.reached("before-metadata")
    if metadata is None:
        for rel in files.last:  # the real metadata is the commit point; its sidecar follows
            copy(rel)
    else:
        out += _write_with_crc(dst, "metadata", metadata, True)
    return out


def import_archive(
    archive: Location,
    dst: Location,
    to: str,
    *,
    dry_run: bool = False,
    new_query_id: bool = False,
    overwrite: bool = False,
    resume: bool = False,
    jobs: int = 1,
    progress: Callable[[Any], None] = lambda r: None,
    on_plan: Callable[[int], None] = lambda n: None,
    engine_version: str | None = None,
    checkpoint_format_to: int | None = None,
) -> ImportReport:
    guard_target(archive, dst)
    target_class = class_name_for(to)
    target = provider_for(target_class)
    manifest = load_manifest(archive)
    if not dry_run:
        start_workers_early(jobs, list(manifest.data_files))  # its imports overlap the archive check
    checked = check_archive(archive, manifest)
    files = _sort_files(manifest)
    conf = _check_logs(archive, manifest, files)
    source_engine, engine, schema_rewrites = _engine_plan(archive, manifest, files, conf, engine_version)
    report = ImportReport(
        archive=archive.display, target=dst.display, query_id=manifest.query_id,
        new_query_id=str(uuid.uuid4()) if new_query_id else None, batch=manifest.batch_id,
        state_version=manifest.state_version, source_provider=manifest.provider_class, target_provider=target_class,
        dry_run=dry_run, checked_files=len(manifest.all_paths()), checked_bytes=checked,
        source_engine=source_engine.to_json(), target_engine=engine, schema_rewrites=schema_rewrites,
    )
    write_conf = {**conf, PROVIDER_CONF: target_class}
    fmt = target_format(manifest.checkpoint_format, target.name, checkpoint_format_to, dst.display)
    report.checkpoint_format = {"source": manifest.checkpoint_format, "target": fmt}
    seed = f"import:{manifest.query_id}:{manifest.batch_id}:{manifest.created_utc}:{target.name}"
    tasks = []
    for d in manifest.data_files:
        prefix = manifest.operator(d.operator).store(d.store).num_cols_prefix_key
        rel = store_rel(d.operator, d.store, d.partition)
        uid = derived_uid(seed, d.operator, d.partition, d.store) if fmt == 2 else None
        tasks.append(ImportTask(archive, d, StoreDir(dst, rel, d.operator, d.partition, d.store), target.name,
                                manifest.state_version, write_conf, prefix, dst.is_local, engine, uid))
    seen: set[tuple[int, str]] = set()
    for d in manifest.data_files:  # refuse stores the target cannot hold before anything is written
        if (d.operator, d.store) not in seen:
            seen.add((d.operator, d.store))
            target.check_writable(store_properties(archive, d), archive.describe(d.path))
    identity = {
        "command": "import",
        "archive": archive.display,
        "query_id": manifest.query_id,
        "batch": manifest.batch_id,
        "target_provider": target_class,
        "manifest_sha256": hashlib.sha256(archive.read_bytes(MANIFEST_NAME)).hexdigest(),
        "new_query_id": new_query_id,
        "target_engine": engine,
        "checkpoint_format": fmt,
    }
    if dry_run:  # the target checked as the run would check it
        report.target_action = journal.plan_target(dst, identity, overwrite=overwrite, resume=resume)
    on_plan(len(tasks))
    if dry_run:
        for t in tasks:
            d = t.data_file
            report.partitions.append({
                "operator": d.operator, "store": d.store, "partition": d.partition, "rows": d.rows,
                "archive_digest": d.digest.hexdigest, "from": d.path,
                "target_files": [f"{t.target.rel}/{n}" for n in target_names(target.name, manifest.state_version)],
            })
        report.files = _plan_files(files, target_class, new_query_id)
        for f in report.files:
            if f["path"] in schema_rewrites:
                f.update(action="rewrite", change="value schema made nullable for engine 4.x")
        return report

    def key_of(t: ImportTask) -> str:
        return journal.key(t.data_file.operator, t.data_file.store, t.data_file.partition)

    results, state = journal.run_with_journal(
        dst,
        identity,
        tasks,
        key_of=key_of,
        target_rel=lambda t: t.target.rel,
        reverify=_reverify,
        run=lambda todo, on_done: run_tasks(todo, run_import_task, jobs, on_done),  # type: ignore[arg-type]
        result_digest=lambda r: r.expected,
        resume=resume,
        overwrite=overwrite,
        progress=progress,
    )
    if report.new_query_id:  # a resumed clone keeps the identity its first attempt chose
        report.new_query_id = state.setdefault("chosen_query_id", report.new_query_id)
        journal.save(dst, state)
    report.partitions = [r.to_json() for r in results]
    bad = [r for r in results if not r.ok]
    if bad:
        r = bad[0]
        raise VerificationFailed(
            f"operator {r.operator_id} store {r.store_name} partition {r.partition} does not match the archive "
            f"(archive {r.expected.rows} rows {r.expected.hexdigest}, {_read_part(r.source_digest)}"
            f"written {r.target_digest.rows} rows {r.target_digest.hexdigest}); "
            f"{len(bad)} partition(s) differ; the target is left marked incomplete",
            dst.display,
        )
    metadata = _new_metadata(archive, report.new_query_id) if report.new_query_id else None
    faults.reached("before-logs")
    commits = commits_for_target(_archived_commits(archive, files), manifest.batch_id, fmt, _written_uids(manifest, tasks))
    report.files = _publish(archive, dst, files, target_class, metadata, commits, schema_rewrites)
    journal.finish(dst)
    return report


def _read_part(read: Digest | None) -> str:
    """What the Parquet file gave, for the message of a partition that does not match."""
    return "" if read is None else f"read {read.rows} rows {read.hexdigest}, "


def _reverify(task: ImportTask, recorded: Digest) -> ImportResult | None:
    """A partition an interrupted run wrote, if it still reads back with the archive's digest."""
    d = task.data_file
    if recorded != d.digest:
        return None
    back = read_back_digest(task.provider, task.target, task.version, task.write_conf, task.num_cols_prefix_key, task.target_uid)
    if back != d.digest:
        return None
    return ImportResult(d.operator, d.store, d.partition, d.digest, None, back, ())


def render(report: ImportReport) -> str:
    head = "plan: import (dry run, nothing written)" if report.dry_run else "imported"
    identity = f"query {report.query_id}" + (f" -> new query id {report.new_query_id}" if report.new_query_id else "")
    lines = [
        f"{head} {report.archive}",
        f"  into {report.target}",
        f"  archive checked: {report.checked_files} file(s), {report.checked_bytes} bytes, sizes and SHA-256 match {MANIFEST_NAME}",
        f"  {identity}, batch {report.batch} (state version {report.state_version})",
        f"  provider {report.source_provider}",
        f"        -> {report.target_provider}",
        f"  engine {report.source_engine.get('family')} -> {report.target_engine} "
        f"(source written by {report.source_engine.get('family')}: {report.source_engine.get('evidence')})",
    ]
    if report.dry_run:
        for p in report.partitions:
            lines.append(f"  op {p['operator']} / {p['store']} / part {p['partition']}: {p['rows']} rows -> {', '.join(p['target_files'])}")
        for f in report.files:
            lines.append(f"  {f['action']:<7} {f['path']}" + (f"  ({f['change']})" if f.get("change") else ""))
        lines.append(f"  {target_verdict(report.target_action)}")
    else:
        lines.append(f"  {len(report.partitions)} store partition(s), {report.rows} rows: written, read back, digests match the archive")
        lines.append(f"  {len(report.files)} checkpoint file(s) written; metadata last")
    return "\n".join(lines)


def add_parser(sub: Any, common: argparse.ArgumentParser) -> None:
    i = sub.add_parser("import", parents=[common], help="rebuild a checkpoint from an archive, on either provider")
    i.add_argument("archive", metavar="ARCHIVE", help="archive written by 'stateshift export'; never written")
    i.add_argument("target", metavar="DST", help="where to build the checkpoint (must be empty)")
    i.add_argument("--dry-run", action="store_true", help="check the archive, print the plan, write nothing")
    i.add_argument("--new-query-id", action="store_true", help="give the restored checkpoint a fresh random query id (for clones)")
    add_target_arguments(i, "import")
    add_checkpoint_format_argument(i)
    i.set_defaults(run=run)


def run(args: argparse.Namespace, ctx: Any) -> int:
    jobs = checked_jobs(args.jobs)
    archive = ctx.open(args.archive, readonly=True)
    dst = ctx.open(args.target, readonly=args.dry_run, extra=args.target_storage_option)
    report = import_archive(
        archive, dst, args.to, dry_run=args.dry_run, new_query_id=args.new_query_id, overwrite=args.overwrite,
        resume=args.resume,
        jobs=jobs, progress=ctx.progress.step, on_plan=ctx.progress.start,
        engine_version=args.engine_version,
        checkpoint_format_to=args.checkpoint_format,
    )
    ctx.progress.close()
    ctx.emit(report.to_json(), render(report))
    return 0
