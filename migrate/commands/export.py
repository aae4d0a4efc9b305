"""``stateshift export SRC ARCHIVE [--version V]``: write a checkpoint's state as a portable archive.

Order of work:

1. read the source model, refuse a source that looks like a running query (``--force``
   overrides, as for convert), and pick the state version (the latest consistent one, or ``V``, which
   must have a commit entry for batch ``V - 1`` and state files that rebuild it);
2. refuse an unsafe or non-empty ARCHIVE (``--overwrite`` replaces it);
3. per store partition: read the version as batches, digest them, decode the typed columns and
   stream everything into ``state/operator=../store=../partition=../part-0.parquet``;
4. copy the checkpoint's own metadata files verbatim into ``checkpoint/`` (only the offsets and
   commits entries up to the exported batch);
5. write the sealed ``manifest.json`` last: without it the directory is not an archive.

The source is opened read-only and never written.
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

from .. import __version__
from ..archive.columns import RowDecoder, decoder_for, find_schema_file, schema_json
from ..archive.manifest import (
    DATA_DIR,
    DataFile,
    Manifest,
    OperatorEntry,
    StoreEntry,
    seal,
)
from ..archive.reader import PROPERTY_PREFIX
from ..archive.writer import (
    WrittenData,
    checkpoint_rel,
    copy_verbatim,
    data_file_rel,
    write_data_file,
    write_manifest,
)
from ..checkpoint.engine import infer_engine
from ..checkpoint.files import CopyFile, verbatim_files
from ..checkpoint.schemas import check_schemas
from ..checkpoint.logs import CODEC_CONF, PROVIDER_CONF
from ..checkpoint.model import HDFS_CLASS, Checkpoint, load_checkpoint
from ..checkpoint.uids import (
    check_chain_against_commits,
    checkpoint_format,
    partition_uid,
)
from ..errors import UnsafeTarget, UsageError
from ..providers import provider_for
from ..providers.base import ReadContext, StoreDir
from ..storage import Location
from .common import add_jobs_argument, checked_jobs, guard_target, refuse_foreign_files, run_tasks, start_workers_early
from .convert import refuse_if_running

_LOG_FILE = re.compile(r"^(offsets|commits)/\.?(\d+)(\.crc)?$")


@dataclass(frozen=True)
class ExportTask:
    """One store partition to write into the archive (plain data, picklable for ``--jobs``)."""

    source: StoreDir
    provider: str
    version: int
    conf: dict[str, str]
    num_cols_prefix_key: int
    archive: Location
    rel: str
    schema_bytes: bytes | None
    schema_where: str
    metadata: dict[str, str]
    listing: dict[str, Any] | None = field(default=None, compare=False)
    checkpoint_id: str | None = None  # id of the version (state checkpoint format 2)

    @property
    def where(self) -> str:  # what an error while exporting it names
        return self.archive.describe(self.rel)


@dataclass(frozen=True)
class ExportResult:
    operator_id: int
    store_name: str
    partition: int
    written: WrittenData
    source_bytes: int

    @property
    def moved_rows(self) -> int:  # what the progress bar counts
        return self.written.digest.rows


def run_export_task(task: ExportTask) -> ExportResult:
    """Read one store partition and stream it into its Parquet file.

    The rows are asked for in key order (``ReadContext.key_order``; a RocksDB source comes in the
    order of its own keys anyway), so an import into RocksDB skips its sort and its copies. Measured at 10M keys, two
    alternating pairs of whole commands (``benchmarks/results/2026-12-03-ab-export-order.md``):
    export 16.5 / 17.2 -> 17.3 / 18.5 CPU s (in one process, over eight partitions, the read,
    decode and Parquet write cost 1.30-1.39 against 1.31-1.35 CPU us per row), largest process
    210 -> 186 MB; import 33.1 / 28.1 -> 26.0 / 27.5 CPU s, process tree 399-402 -> 337-343 MB;
    archives 8 % smaller (57.6 -> 52.8 bytes per row: Snappy finds the shared prefixes of
    neighbouring keys)."""
    p = provider_for(task.provider)
    ctx = ReadContext(
        conf=task.conf, num_cols_prefix_key=task.num_cols_prefix_key, listing=task.listing, checkpoint_id=task.checkpoint_id,
        key_order=True,
    )
    source_bytes = sum(f.size for f in p.source_files(task.source, task.version, ctx))
    decoder = decoder_for(task.schema_bytes, task.schema_where)
    props = p.store_properties(task.source, task.version, ctx)  # kept with the rows, for import
    metadata = {**task.metadata, **{f"{PROPERTY_PREFIX}{k}": v for k, v in props.items()}}
    # closed when the write fails halfway: a reader's scratch folder goes with it (a worker ends
    # with os._exit, so a reader left suspended in a failed task never ran its clean-up)
    with contextlib.closing(p.read(task.source, task.version, ctx)) as rows:
        written = write_data_file(task.archive, task.rel, rows, decoder, metadata)
    return ExportResult(task.source.operator_id, task.source.store_name, task.source.partition, written, source_bytes)


@dataclass
class ExportReport:
    source: str
    archive: str
    manifest: Manifest | None = None
    manifest_sha256: str = ""
    warnings: list[str] = field(default_factory=list)

    def to_json(self) -> dict[str, Any]:
        m = self.manifest
        assert m is not None
        return {
            "command": "export",
            "source": self.source,
            "archive": self.archive,
            "query_id": m.query_id,
            "batch": m.batch_id,
            "state_version": m.state_version,
            "provider": m.provider_class,
            "codec": m.codec,
            "checkpoint_format": m.checkpoint_format,
            "engine": m.engine,
            "rows": m.rows,
            "data_files": [d.to_json() for d in m.data_files],
            "checkpoint_files": len(m.checkpoint_files),
            "uncommitted_batches": list(m.uncommitted),
            "notes": list(m.notes),
            "warnings": self.warnings,
            "manifest_sha256": self.manifest_sha256,
        }


def at_version(ckpt: Checkpoint, version: int | None) -> Checkpoint:
    """The checkpoint model seen at state ``version`` (written by batch ``version - 1``)."""
    if version is None or version == ckpt.state_version:
        return ckpt
    committed = sorted(set(ckpt.offsets) & set(ckpt.commits))
    rebuildable = ", ".join(str(b + 1) for b in committed[-20:])
    if version < 1:
        raise UsageError(f"--version {version}: state versions start at 1 (versions with a commit: {rebuildable})")
    batch = version - 1
    if batch not in committed:
        missing = "commit entry" if batch in ckpt.offsets else "offsets and commit entries"
        raise UsageError(
            f"--version {version}: state version {version} is written by batch {batch}, which has no {missing}; "
            f"versions with a commit: {rebuildable}",
            ckpt.location.describe("commits"),
        )
    conf = ckpt.offsets[batch].conf
    return dataclasses.replace(ckpt, latest_batch=batch, uncommitted=(), conf=conf, provider_class=conf.get(PROVIDER_CONF, HDFS_CLASS))


def kept_checkpoint_files(ckpt: Checkpoint, latest: bool) -> list[CopyFile]:
    """The checkpoint metadata files the archive keeps, in copy order (``metadata`` last).

    For an older version, offsets and commits entries (and their checksum sidecars) of later
    batches are left out; every other file is kept as it is.
    """
    early, late = verbatim_files(ckpt)
    listing = ckpt.location.list_dir("offsets")
    offsets = [CopyFile(f"offsets/{n}", e.size) for n, e in sorted(listing.items()) if not e.is_dir]
    out: list[CopyFile] = []
    for f in early + offsets + late:
        m = _LOG_FILE.match(f.rel)
        if m and not latest and int(m.group(2)) > ckpt.latest_batch:
            continue
        if f.rel.startswith("offsets/") and not m:
            continue  # temporary or foreign files in the log directory are not part of the log
        out.append(f)
    return out


def _prepare_archive(archive: Location, overwrite: bool) -> None:
    existing = archive.list_dir("")
    if existing and not overwrite:
        raise UnsafeTarget(
            f"archive target is not empty ({len(existing)} entries, e.g. {min(existing)}); pass --overwrite to replace it",
            archive.display,
        )
    if existing:
        refuse_foreign_files(archive, existing)
    for name in existing:
        archive.remove(name, recursive=True)
    archive.makedirs("")


def _store_decoder(ckpt: Checkpoint, paths: list[str], operator_id: int, store: str) -> tuple[str | None, bytes | None, RowDecoder]:
    rel = find_schema_file(paths, operator_id, store, ckpt.latest_batch)
    data = ckpt.location.read_bytes(rel) if rel else None
    where = ckpt.location.describe(rel) if rel else ckpt.location.describe(f"state/{operator_id}")
    return rel, data, decoder_for(data, where)


def _log_entries(ckpt: Checkpoint, kept: set[int]) -> tuple[tuple[dict[str, Any], ...], tuple[dict[str, Any], ...]]:
    offsets = tuple(
        {"batch": b, "log_version": e.log_version, "metadata": e.metadata, "sources": list(e.source_lines)}
        for b, e in sorted(ckpt.offsets.items()) if b in kept
    )
    commits = tuple(
        {"batch": b, "log_version": e.log_version, "metadata": e.metadata}
        for b, e in sorted(ckpt.commits.items()) if b in kept
    )
    return offsets, commits


def export(
    src: Location,
    archive: Location,
    *,
    version: int | None = None,
    overwrite: bool = False,
    force: bool = False,
    jobs: int = 1,
    progress: Callable[[Any], None] = lambda r: None,
    on_plan: Callable[[int], None] = lambda n: None,
) -> ExportReport:
    guard_target(src, archive)
    full = load_checkpoint(src)
    start_workers_early(jobs, full.store_partitions())
    if not force:
        refuse_if_running(full)
    ckpt = at_version(full, version)
    latest = ckpt.latest_batch == full.latest_batch
    provider = ckpt.provider  # unknown provider class -> Unsupported
    partitions = ckpt.store_partitions()
    prefix_of = {(op.operator_id, s.name): s.num_cols_prefix_key for op in ckpt.operators for s in op.stores}

    # every store partition must rebuild this version from the files present (before writing)
    for sp in partitions:
        ctx = ReadContext(
            conf=ckpt.conf, num_cols_prefix_key=prefix_of.get((sp.operator_id, sp.store_name), 0), listing=sp.listing,
            checkpoint_id=partition_uid(ckpt, sp),
        )
        provider.source_files(sp.dir, ckpt.state_version, ctx)
    check_chain_against_commits(ckpt)  # format 2: the lineage agrees with the commit log

    files = kept_checkpoint_files(ckpt, latest)
    check_schemas(ckpt, files)  # an unreadable schema file stops the run, as in a convert
    paths = [f.rel for f in files]
    report = ExportReport(source=src.display, archive=archive.display)
    stores: dict[tuple[int, str], tuple[str | None, bytes | None, RowDecoder]] = {}
    operators: list[OperatorEntry] = []
    for op in ckpt.operators:
        entries = []
        names = [s.name for s in op.stores] or sorted({sp.store_name for sp in op.partitions})
        for name in names:
            rel, data, decoder = _store_decoder(ckpt, paths, op.operator_id, name)
            stores[(op.operator_id, name)] = (rel, data, decoder)
            key_json, value_json = schema_json(decoder) if decoder.key.schema is not None else (None, None)
            entries.append(StoreEntry(
                name=name, num_cols_prefix_key=prefix_of.get((op.operator_id, name), 0),
                schema_file=checkpoint_rel(rel) if rel else None, key_schema=key_json, value_schema=value_json,
                columns=decoder.columns, decoded=decoder.decoded, note=decoder.note,
            ))
            if decoder.note:
                report.warnings.append(f"operator {op.operator_id} store {name}: {decoder.note}")
        operators.append(OperatorEntry(op.operator_id, op.name, op.metadata, tuple(entries)))

    _prepare_archive(archive, overwrite)
    on_plan(len(partitions))
    tasks = []
    for sp in partitions:
        rel, data, _ = stores.get((sp.operator_id, sp.store_name), (None, None, None))
        tasks.append(ExportTask(
            source=sp.dir, provider=ckpt.provider_class, version=ckpt.state_version, conf=ckpt.conf,
            num_cols_prefix_key=prefix_of.get((sp.operator_id, sp.store_name), 0), archive=archive,
            rel=data_file_rel(sp.operator_id, sp.store_name, sp.partition), schema_bytes=data,
            schema_where=src.describe(rel) if rel else src.describe(sp.dir.rel),
            metadata={"stateshift.operator": str(sp.operator_id), "stateshift.store": sp.store_name,
                      "stateshift.partition": str(sp.partition), "stateshift.state_version": str(ckpt.state_version)},
            listing=sp.listing, checkpoint_id=partition_uid(ckpt, sp),
        ))
    results: list[ExportResult] = run_tasks(tasks, run_export_task, jobs, progress)  # type: ignore[arg-type]
    if not force:
        refuse_if_running(full, after_read=True)

    data_files = []
    for r in results:
        w = r.written
        data_files.append(DataFile(w.rel, r.operator_id, r.store_name, r.partition, w.digest.rows, w.bytes, w.sha256,
                                   w.digest, w.key_bytes, w.value_bytes, w.undecoded_rows))
        if w.decode_error:
            report.warnings.append(
                f"operator {r.operator_id} store {r.store_name} partition {r.partition}: {w.undecoded_rows} rows did not "
                f"decode, their typed columns are null ({w.decode_error[:300]})"
            )
    archived = [copy_verbatim(src, f.rel, archive) for f in files]

    kept = set(ckpt.offsets) if latest else {b for b in ckpt.offsets if b <= ckpt.latest_batch}
    offsets, commits = _log_entries(ckpt, kept)
    notes = []
    if not latest:
        notes.append(
            f"state version {ckpt.state_version} is older than the latest consistent version {full.state_version}: offsets "
            f"and commits entries after batch {ckpt.latest_batch} are left out; sources/ and operator metadata are kept "
            "as the query left them, so a source that keeps its own log (the file source) may treat input read by later "
            "batches as already processed"
        )
    elif ckpt.uncommitted:
        notes.append(f"offsets entries of uncommitted batches {list(ckpt.uncommitted)} are kept; the engine re-runs them on restart")
    manifest = Manifest(
        tool_version=__version__,
        created_utc=datetime.now(timezone.utc).isoformat(timespec="seconds").replace("+00:00", "Z"),
        source=src.display,
        query_id=ckpt.query_id,
        batch_id=ckpt.latest_batch,
        state_version=ckpt.state_version,
        provider_class=ckpt.provider_class,
        codec=ckpt.conf.get(CODEC_CONF, "lz4"),
        partitions=ckpt.num_partitions,
        offsets=offsets,
        commits=commits,
        uncommitted=ckpt.uncommitted if latest else (),
        operators=tuple(operators),
        checkpoint_files=tuple(archived),
        data_files=tuple(data_files),
        notes=tuple(notes),
        engine=infer_engine(ckpt).to_json(),
        checkpoint_format=checkpoint_format(ckpt),
    )
    write_manifest(archive, manifest)
    report.manifest = manifest
    report.manifest_sha256 = seal(manifest.body())
    return report


def render(report: ExportReport) -> str:
    m = report.manifest
    assert m is not None
    data_bytes = sum(d.bytes for d in m.data_files)
    lines = [
        f"exported {report.source}",
        f"      to {report.archive}",
        f"  query {m.query_id}, batch {m.batch_id} (state version {m.state_version})",
        f"  provider {m.provider_class}, codec {m.codec}, state checkpoint format {m.checkpoint_format}",
        *([f"  engine {m.engine['family']} wrote it last ({m.engine['evidence']}); recorded in the manifest"] if m.engine else []),
        (f"  {len(m.data_files)} store partition(s), {m.rows} rows, {data_bytes} bytes of Parquet; "
         f"{len(m.checkpoint_files)} checkpoint file(s) kept verbatim"),
    ]
    for op in m.operators:
        for s in op.stores:
            decoded = [c.column for c in s.columns if c.decoded and c.column]
            label = f"  operator {op.operator}" + (f" ({op.name})" if op.name else "") + f" store {s.name}: "
            lines.append(label + (f"typed columns {', '.join(decoded)}" if decoded else "raw bytes only"))
    for note in m.notes:
        lines.append(f"  note: {note}")
    lines.append(f"  query it: SELECT * FROM read_parquet('{report.archive.rstrip('/')}/{DATA_DIR}/operator=0/*/*/*.parquet', hive_partitioning = true)")
    return "\n".join(lines)


def add_parser(sub: Any, common: argparse.ArgumentParser) -> None:
    e = sub.add_parser("export", parents=[common], help="write a checkpoint's state as a portable Parquet archive")
    e.add_argument("source", metavar="SRC", help="checkpoint to read (local path or fsspec URL); never written")
    e.add_argument("archive", metavar="ARCHIVE", help="directory to create the archive in (must be empty)")
    e.add_argument("--version", type=int, default=None, metavar="V",
                   help="state version to export (default: the latest consistent one); needs a commit for batch V-1")
    e.add_argument("--overwrite", action="store_true", help="replace a non-empty ARCHIVE")
    e.add_argument("--force", action="store_true", help="skip the running-query guard (only if you know the query is stopped)")
    add_jobs_argument(e)
    e.add_argument("--target-storage-option", action="append", default=[], metavar="KEY=VALUE", help="filesystem option for ARCHIVE only")
    e.set_defaults(run=run)


def run(args: argparse.Namespace, ctx: Any) -> int:
    import sys

    jobs = checked_jobs(args.jobs)
    src = ctx.open(args.source, readonly=True)
    archive = ctx.open(args.archive, readonly=False, extra=args.target_storage_option)
    report = export(src, archive, version=args.version, overwrite=args.overwrite, force=args.force, jobs=jobs,
                    progress=ctx.progress.step, on_plan=ctx.progress.start)
    ctx.progress.close()
    for w in report.warnings:
        print(f"stateshift: warning: {w}", file=sys.stderr)
    ctx.emit(report.to_json(), render(report))
    return 0

