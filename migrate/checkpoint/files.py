"""Which checkpoint files travel verbatim, and how the rewritten logs are produced.

Verbatim: the query ``metadata``, ``commits/``, ``sources/``, anything else at the root the tool
does not know (kept, never dropped), and the operator metadata and schema files under
``state/<op>/_metadata``, ``state/<op>/_stateSchema`` and ``state/<op>/<partition>/_metadata``.
Not verbatim: ``offsets/`` (the pinned provider class is rewritten) and the state files
themselves (rewritten in the target layout by the providers). Operator metadata v2
(``state/<op>/_metadata/v2/<batch>``, transformWithState on Spark 4.3.0) names its state schema
files by absolute path (observed: ``"stateSchemaFilePaths":["file:/abs/ckpt/state/0/_stateSchema/default/0_<uuid>"]``,
and a restart fails when that path does not exist): :func:`point_schema_paths_at` rewrites those
paths to the target.
"""

from __future__ import annotations

import json
import os
import re
from dataclasses import dataclass

from ..codecs.hadoop_crc import crc_name
from ..errors import CorruptInput
from ..storage import Location
from .logs import PROVIDER_CONF, OffsetEntry, format_offsets, with_conf
from .model import Checkpoint

_STATE_META_DIRS = {"_metadata", "_stateSchema"}


@dataclass(frozen=True)
class CopyFile:
    rel: str
    size: int


def _walk(loc: Location, rel: str) -> list[CopyFile]:
    out: list[CopyFile] = []
    for name, entry in sorted(loc.list_dir(rel).items()):
        child = f"{rel}/{name}" if rel else name
        if entry.is_dir:
            out += _walk(loc, child)
        elif not name.startswith(".stateshift-"):
            out.append(CopyFile(child, entry.size))
    return out


def verbatim_files(ckpt: Checkpoint) -> tuple[list[CopyFile], list[CopyFile]]:
    """(files copied before the logs: state metadata, sources, unknown; the commits and metadata copied last)."""
    loc = ckpt.location
    early: list[CopyFile] = []
    late: list[CopyFile] = []
    for name, entry in sorted(ckpt.root_listing.items()):
        if name in ("offsets", "state"):
            continue
        if name in ("metadata", ".metadata.crc"):
            late.append(CopyFile(name, entry.size))
        elif name == "commits":
            late += _walk(loc, "commits")
        elif entry.is_dir:
            early += _walk(loc, name)
        elif not name.startswith(".stateshift-"):
            early.append(CopyFile(name, entry.size))
    for op in ckpt.operators:
        oprel = f"state/{op.operator_id}"
        for name, entry in sorted(loc.list_dir(oprel).items()):
            if entry.is_dir and name in _STATE_META_DIRS:
                early += _walk(loc, f"{oprel}/{name}")
        for sp in op.partitions:
            for name, entry in sorted(sp.listing.items()):
                if entry.is_dir and name in _STATE_META_DIRS:
                    early += _walk(loc, f"{sp.dir.rel}/{name}")
    # de-duplicate (a partition listing is shared by its default store and seen once per store)
    seen: set[str] = set()
    early = [f for f in early if not (f.rel in seen or seen.add(f.rel))]
    return early, late


def rewritten_offsets(ckpt: Checkpoint, target_class: str, extra: dict[str, str] | None = None) -> list[tuple[str, bytes, bool]]:
    """(relative path, new content, whether the source had a crc sidecar) for every offsets entry."""
    listing = ckpt.log_listings["offsets"]
    out = []
    changes = {PROVIDER_CONF: target_class, **(extra or {})}
    for batch_id in sorted(ckpt.offsets):
        entry: OffsetEntry = with_conf(ckpt.offsets[batch_id], changes)
        out.append((f"offsets/{batch_id}", format_offsets(entry).encode("utf-8"), crc_name(str(batch_id)) in listing))
    return out


def conf_changes(ckpt: Checkpoint, target_class: str) -> dict[str, tuple[str | None, str]]:
    old = ckpt.conf.get(PROVIDER_CONF)
    return {PROVIDER_CONF: (old, target_class)} if old != target_class else {}


_OPERATOR_METADATA_V2 = re.compile(r"^state/\d+/_metadata/v2/\d+$")
_SCHEMA_REL = re.compile(r"/(state/\d+/_stateSchema/[^/]+/[^/]+)$")
_SCHEME = re.compile(r"^([A-Za-z][A-Za-z0-9+.-]*):")


def is_operator_metadata_v2(rel: str) -> bool:
    return bool(_OPERATOR_METADATA_V2.match(rel))


def engine_root(dst: Location, like: str) -> str:
    """The root of ``dst`` the way the engine writes it inside a path: ``file:<absolute path>``
    on local disk (observed); elsewhere the scheme of ``like`` (the path being replaced) when it
    is not ``file``, ``s3a`` for s3 (common practice: the engine reaches S3 through Hadoop's S3A
    connector), else the filesystem's own protocol."""
    if dst.is_local:
        return "file:" + os.path.abspath(dst.root)
    m = _SCHEME.match(like)
    scheme = m.group(1) if m and m.group(1) != "file" else None
    if scheme is None:
        protocol = dst.protocols[0]
        scheme = "s3a" if protocol in ("s3", "s3a") else str(protocol)
    return f"{scheme}://{dst.root.strip('/')}"


def point_schema_paths_at(data: bytes, dst: Location, where: str) -> bytes:
    """Operator metadata v2 with every state schema file path moved under ``dst`` (unchanged
    bytes when it names none)."""
    text = data.decode("utf-8", "replace")
    header, sep, body = text.partition("\n")
    if not sep or not header.startswith("v"):
        raise CorruptInput("operator metadata does not start with a version line", where)
    try:
        obj = json.loads(body)
    except ValueError as exc:
        raise CorruptInput(f"operator metadata is not valid JSON ({exc})", where) from None
    changed = False
    for info in obj.get("stateStoreInfo") or [] if isinstance(obj, dict) else []:
        paths = info.get("stateSchemaFilePaths") if isinstance(info, dict) else None
        if not isinstance(paths, list):
            continue
        new = []
        for path in paths:
            m = _SCHEMA_REL.search(path) if isinstance(path, str) else None
            if m is None:
                raise CorruptInput(f"state schema file path {path!r} is not under state/<op>/_stateSchema/", where)
            new.append(f"{engine_root(dst, path)}/{m.group(1)}")
        changed = changed or new != paths
        info["stateSchemaFilePaths"] = new
    if not changed:
        return data
    return (header + "\n" + json.dumps(obj, separators=(",", ":"), ensure_ascii=False)).encode("utf-8")
