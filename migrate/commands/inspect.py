"""``stateshift inspect SRC``: the checkpoint model as a table or JSON (reads only metadata).

With ``--rows`` it also rebuilds the latest consistent version of every store partition and
reports its row count and digest (reads all state; still writes nothing).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable
from typing import Any

from ..checkpoint.engine import infer_engine
from ..checkpoint.logs import CODEC_CONF, PARTITIONS_CONF
from ..checkpoint.model import Checkpoint, StorePartition, load_checkpoint
from ..checkpoint.uids import checkpoint_format, partition_uid
from ..errors import CorruptInput, StateshiftError
from ..storage import Location
from .common import DigestResult, add_jobs_argument, checked_jobs, digest_partitions, digest_task


def describe(ckpt: Checkpoint, rows: bool = False, jobs: int = 1, progress: Callable[[DigestResult], None] = lambda r: None,
             on_plan: Callable[[int], None] = lambda n: None) -> dict[str, Any]:
    provider = ckpt.provider
    latest_offsets = ckpt.offsets[ckpt.latest_batch]
    to_digest: list[tuple[dict[str, Any], StorePartition]] = []  # --rows: the rebuildable ones
    ops = []
    for op in ckpt.operators:
        stores = []
        for info in op.stores:
            parts = [sp for sp in op.partitions if sp.store_name == info.name]
            entries = []
            for sp in parts:
                versions = provider.versions(sp.listing)
                entry: dict[str, Any] = {
                    "partition": sp.partition,
                    "versions": [min(versions), max(versions)] if versions else [],
                    "newer_than_commit": [v for v in versions if v > ckpt.state_version],
                }
                try:
                    uid = partition_uid(ckpt, sp)
                    if uid is not None:
                        entry["checkpoint_id"] = uid  # the id the commit log names for this version (format 2)
                    files = provider.source_files(sp.dir, ckpt.state_version, _ctx(ckpt, sp.listing, uid))
                    entry["files"] = len(files)
                    entry["bytes"] = sum(f.size for f in files)
                    entry["rebuildable"] = True
                except StateshiftError as exc:
                    entry["rebuildable"] = False
                    entry["problem"] = str(exc)
                if rows and entry["rebuildable"]:
                    to_digest.append((entry, sp))
                entries.append(entry)
            stores.append({"name": info.name, "num_cols_prefix_key": info.num_cols_prefix_key, "partitions": entries})
        ops.append({"operator": op.operator_id, "name": op.name, "stores": stores})
    if to_digest:
        on_plan(len(to_digest))
        done = digest_partitions([digest_task(ckpt, sp) for _, sp in to_digest], jobs, progress)
        for (entry, _), result in zip(to_digest, done):
            entry["rows"] = result.digest.rows
            entry["digest"] = result.digest.hexdigest
    sources = sorted(n for n, e in ckpt.location.list_dir("sources").items() if e.is_dir)
    return {
        "checkpoint": ckpt.location.display,
        "query_id": ckpt.query_id,
        "provider": ckpt.provider_class,
        "layout": provider.name,
        "codec": ckpt.conf.get(CODEC_CONF, "lz4"),
        "engine": infer_engine(ckpt, zip_evidence=rows).to_json(),  # --rows reads every zip anyway
        "shuffle_partitions": ckpt.conf.get(PARTITIONS_CONF),
        "latest_committed_batch": ckpt.latest_batch,
        "checkpoint_format": checkpoint_format(ckpt),
        "state_version": ckpt.state_version,
        "watermark_ms": latest_offsets.watermark_ms,
        "batch_timestamp_ms": latest_offsets.timestamp_ms,
        "offsets_entries": [min(ckpt.offsets), max(ckpt.offsets)],
        "commits_entries": [min(ckpt.commits), max(ckpt.commits)],
        "uncommitted_batches": list(ckpt.uncommitted),
        "sources": [{"id": s, "line": _source_line(latest_offsets.source_lines, s)} for s in sources],
        "operators": ops,
    }


def _source_line(lines: tuple[str, ...], sid: str) -> str | None:
    i = int(sid) if sid.isdigit() else -1
    return lines[i] if 0 <= i < len(lines) else None


def _ctx(ckpt: Checkpoint, listing: Any, uid: str | None = None) -> Any:
    from ..providers.base import ReadContext

    return ReadContext(conf=ckpt.conf, listing=listing, checkpoint_id=uid)


def inspect(src: Location, rows: bool = False, jobs: int = 1, progress: Callable[[DigestResult], None] = lambda r: None,
            on_plan: Callable[[int], None] = lambda n: None) -> dict[str, Any]:
    return describe(load_checkpoint(src), rows=rows, jobs=jobs, progress=progress, on_plan=on_plan)


def render(info: dict[str, Any]) -> str:
    lines = [
        f"checkpoint      {info['checkpoint']}",
        f"query id        {info['query_id']}",
        f"provider        {info['provider']} ({info['layout']} layout, codec {info['codec']})",
        f"engine          {info['engine']['family']} wrote it last: {info['engine']['evidence']} ({info['engine']['evidence_file']})",
        *[f"                {h}" for h in info["engine"]["hints"]],
        f"partitions      {info['shuffle_partitions']}",
        f"state format    {info['checkpoint_format']}"
        + (" (unique ids: <v>_<id>.zip/.changelog, v2 commits name the ids)" if info["checkpoint_format"] == 2 else ""),
        f"latest batch    {info['latest_committed_batch']} (offsets and commit present) -> state version {info['state_version']}",
        f"watermark       {info['watermark_ms']} ms",
        f"offsets log     batches {info['offsets_entries'][0]}..{info['offsets_entries'][1]}",
        f"commits log     batches {info['commits_entries'][0]}..{info['commits_entries'][1]}",
    ]
    if info["uncommitted_batches"]:
        lines.append(
            f"UNCOMMITTED     batch(es) {', '.join(map(str, info['uncommitted_batches']))} planned but not committed "
            "(kept on convert; the engine re-runs them)"
        )
    for s in info["sources"]:
        lines.append(f"source {s['id']:<8} {s['line']}")
    if not info["operators"]:
        lines.append("state           none (stateless query)")
    header = f"{'operator':<22}{'store':<28}{'part':>5}  {'versions':<11}{'files':>6}{'bytes':>11}"
    if any("rows" in p for op in info["operators"] for st in op["stores"] for p in st["partitions"]):
        header += f"{'rows':>10}  digest"
    if info["operators"]:
        lines += ["", header, "-" * len(header)]
    for op in info["operators"]:
        label = f"{op['operator']} {op['name'] or ''}".strip()
        for st in op["stores"]:
            for p in st["partitions"]:
                vr = f"{p['versions'][0]}..{p['versions'][1]}" if p["versions"] else "-"
                row = f"{label:<22.22}{st['name']:<28.28}{p['partition']:>5}  {vr:<11}{p.get('files', '-'):>6}{p.get('bytes', '-'):>11}"
                if "rows" in p:
                    row += f"{p['rows']:>10}  {p['digest']}"
                if not p["rebuildable"]:
                    row += f"  PROBLEM: {p['problem']}"
                if p["newer_than_commit"]:
                    row += f"  (files for uncommitted versions {p['newer_than_commit']})"
                lines.append(row)
    return "\n".join(lines)


def add_parser(sub: Any, common: argparse.ArgumentParser) -> None:
    i = sub.add_parser("inspect", parents=[common], help="show what a checkpoint holds")
    i.add_argument("source", metavar="SRC")
    i.add_argument("--rows", action="store_true", help="also rebuild every store partition and count rows (reads all state)")
    add_jobs_argument(i)
    i.set_defaults(run=run)


def run(args: argparse.Namespace, ctx: Any) -> int:
    info = inspect(ctx.open(args.source), rows=args.rows, jobs=checked_jobs(args.jobs), progress=ctx.progress.step,
                   on_plan=ctx.progress.start)
    ctx.progress.close()
    ctx.emit(info, render(info))
    broken = [(op["operator"], st["name"], p["partition"]) for op in info["operators"] for st in op["stores"]
              for p in st["partitions"] if not p["rebuildable"]]
    if broken:  # the report is printed; the exit code tells a script what a convert would meet
        op, store, part = broken[0]
        print(f"stateshift: error: {len(broken)} store partition(s) cannot be rebuilt at state version "
              f"{info['state_version']} (first: operator {op} store {store} partition {part}; the report says why)",
              file=sys.stderr)
        return CorruptInput.exit_code
    return 0
