"""Which checkpoint files travel verbatim, and how the rewritten logs are produced.

Verbatim: the query ``metadata``, ``commits/``, ``sources/``, anything else at the root the tool
does not know (kept, never dropped), and the operator metadata and schema files under
``state/<op>/_metadata``, ``state/<op>/_stateSchema`` and ``state/<op>/<partition>/_metadata``.
Not verbatim: ``offsets/`` (the pinned provider class is rewritten) and the state files
themselves (rewritten in the target layout by the providers).
"""

from __future__ import annotations

from dataclasses import dataclass

from ..codecs.hadoop_crc import crc_name
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
