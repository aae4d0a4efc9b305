"""The newer state checkpoint format (``checkpointFormatVersion=2``): unique ids per state version.

Observed on Spark 4.3.0 with ``spark.sql.streaming.stateStore.checkpointFormatVersion=2`` on
the RocksDB provider (the heap-map provider refuses it; the setting is a session conf and is
not pinned in the offsets log):

* every state file of version v carries the id of the attempt that wrote it:
  ``<v>_<uid>.zip``, ``<v>_<uid>.changelog``; a retried or abandoned batch leaves files of the
  same version with other ids, so the id decides, never the version alone;
* the commits entry of batch b is ``v2`` and names the id of state version b+1 of every store::

      v2
      {"nextBatchWatermarkMs":0,"stateUniqueIds":{"<opId>":[[<uid>, ...], [<uid>, ...]]}}

  one list per partition (index = partition id), inside it one id per store in the order of
  the operator metadata's ``stateStoreInfo`` (a join: ``left-keyToNumValues``,
  ``left-keyWithIndexToValue``, ``right-keyToNumValues``, ``right-keyWithIndexToValue``);
* a changelog ``<v>_<uid>.changelog`` starts with ``writeUTF("v3")`` and ``writeUTF(lineage)``,
  the lineage being JSON ``[{"version":1,"checkpointUniqueId":"<uid>"}, ...]``: the versions
  before v that it builds on, ascending (see ``providers/rocksdb_changelog.py``);
* beside each zip and changelog a visible ``<name>.crc`` JSON checksum file
  ``{"algorithm":"CRC32C","value":<signed int32>,"mainFileSize":<bytes>,...}`` (which has its own
  Hadoop sidecar ``.<name>.crc.crc``); the zip contents are the same as in format 1.

This module holds the pure functions over those facts: reading the ids out of commit entries,
rewriting commit entries for a target format, the lineage JSON and the checksum files.
``checkpoint_format(ckpt)`` is the one question other modules ask (e.g. the engine-version
check: format 2 needs a 4.x engine).
"""

from __future__ import annotations

import json
import struct
import uuid
from typing import Any

from ..errors import CorruptInput, Unsupported
from .logs import CommitEntry, format_commit

FORMAT_CONF = "spark.sql.streaming.stateStore.checkpointFormatVersion"
UIDS_KEY = "stateUniqueIds"
CHECKSUM_SUFFIX = ".crc"  # the visible JSON checksum file: "<name>.crc" (the Hadoop sidecar is ".<name>.crc")
FORMATS = (1, 2)


# ------------------------------------------------------------------------ commit entries
def commit_uids(entry: CommitEntry, where: str) -> dict[int, list[list[str]]] | None:
    """``{operator id: [[uid per store] per partition]}`` of a commits entry, or None (format 1)."""
    raw = entry.metadata.get(UIDS_KEY)
    if raw is None:
        return None
    if not isinstance(raw, dict):
        raise CorruptInput(f"commit metadata '{UIDS_KEY}' is not a JSON object", where)
    out: dict[int, list[list[str]]] = {}
    for op, parts in raw.items():
        if not str(op).isdigit() or not isinstance(parts, list):
            raise CorruptInput(f"commit metadata '{UIDS_KEY}' has a bad entry for operator {op!r}", where)
        rows: list[list[str]] = []
        for p, ids in enumerate(parts):
            if not isinstance(ids, list) or not all(isinstance(u, str) and u for u in ids):
                raise CorruptInput(f"commit metadata '{UIDS_KEY}' operator {op} partition {p} is not a list of ids", where)
            rows.append(list(ids))
        out[int(op)] = rows
    return out


def checkpoint_format(ckpt: Any) -> int:
    """2 when the latest consistent batch's commits entry names unique ids (or is ``v2``), else 1.

    ``ckpt`` is a :class:`~migrate.checkpoint.model.Checkpoint`. Format 2 needs a 4.x engine
    (3.5.9 refuses ``v2`` commits: observed, see tests/fixtures/engine_versions/FINDINGS.md).
    """
    entry = ckpt.commits.get(ckpt.latest_batch)
    if entry is None:
        return 1
    return 2 if entry.log_version >= 2 or UIDS_KEY in entry.metadata else 1


def newest_log_version(ckpt: Any) -> int:
    """The highest log version (``v<n>``) among the checkpoint's offsets and commits entries."""
    versions = [e.log_version for e in ckpt.offsets.values()] + [e.log_version for e in ckpt.commits.values()]
    return max(versions, default=1)


def store_uid(ckpt: Any, operator_id: int, partition: int, store_name: str, batch: int | None = None) -> str | None:
    """The unique id of state version ``batch + 1`` (default: the latest consistent one) of one
    store partition, or None when that commit names none (format 1).

    Raises CorruptInput when the commit names ids but not for this store."""
    batch = ckpt.latest_batch if batch is None else batch
    entry = ckpt.commits.get(batch)
    if entry is None:
        return None
    where = ckpt.location.describe(f"commits/{batch}")
    ids = commit_uids(entry, where)
    if ids is None:
        return None
    op = next((o for o in ckpt.operators if o.operator_id == operator_id), None)
    names = [s.name for s in op.stores] if op is not None and op.stores else ["default"]
    if operator_id not in ids:
        raise CorruptInput(f"commit names unique ids but none for operator {operator_id}", where)
    parts = ids[operator_id]
    if partition >= len(parts):
        raise CorruptInput(f"commit names unique ids for {len(parts)} partitions of operator {operator_id}, not for partition {partition}", where)
    index = names.index(store_name) if store_name in names else -1
    if index < 0 or index >= len(parts[partition]):
        raise CorruptInput(
            f"commit names {len(parts[partition])} unique id(s) for operator {operator_id} partition {partition}, "
            f"none for store {store_name!r} (stores: {', '.join(names)})",
            where,
        )
    return parts[partition][index]


def partition_uid(ckpt: Any, sp: Any) -> str | None:
    """:func:`store_uid` of a :class:`~migrate.checkpoint.model.StorePartition` at the checkpoint's batch."""
    return store_uid(ckpt, sp.operator_id, sp.partition, sp.store_name)


def check_chain_against_commits(ckpt: Any) -> None:
    """Refuse (CorruptInput naming the file) a store partition whose files for the latest
    consistent version - the zip and changelogs its lineage leads to - carry an id that the commit
    log gives another value for (commit of batch v-1 names the id of version v)."""
    import re

    from ..providers.base import ReadContext

    if checkpoint_format(ckpt) != 2:
        return
    named = re.compile(r"^(\d+)_(.+)\.(zip|changelog)$")
    provider = ckpt.provider
    for op in ckpt.operators:
        for sp in op.partitions:
            ctx = ReadContext(
                conf=ckpt.conf, num_cols_prefix_key=op.store_info(sp.store_name).num_cols_prefix_key,
                listing=sp.listing, checkpoint_id=partition_uid(ckpt, sp),
            )
            base, chain = provider.plan(sp.dir, ckpt.state_version, sp.listing, ctx)
            for name in ([base] if base else []) + chain:
                m = named.match(name)
                if m is None or int(m.group(1)) - 1 not in ckpt.commits:
                    continue
                expected = store_uid(ckpt, sp.operator_id, sp.partition, sp.store_name, int(m.group(1)) - 1)
                if expected is not None and expected != m.group(2):
                    raise CorruptInput(
                        f"the lineage of version {ckpt.state_version} builds on {name}, but commits/{int(m.group(1)) - 1} "
                        f"names id {expected} for version {m.group(1)}",
                        sp.dir.describe(name),
                    )


_NAMESPACE = uuid.UUID("5b0c3f7e-2d1a-4c8e-9f61-0a7d3e2b9c14")  # our own, for derived ids


def derived_uid(seed: str, operator_id: int, partition: int, store_name: str) -> str:
    """The id we give a state version we write: a UUID (the shape the engine uses: observed) derived
    from ``seed`` (the run's identity) and the store, so an interrupted run resumed with the same
    inputs names the same files; different from any id the engine chose."""
    return str(uuid.uuid5(_NAMESPACE, f"{seed}/{operator_id}/{partition}/{store_name}"))


def uids_table(entries: Any) -> dict[int, list[list[str]]]:
    """``stateUniqueIds`` from ``(operator, partition, store index, uid)`` tuples (dense lists)."""
    table: dict[int, dict[int, dict[int, str]]] = {}
    for op, part, index, uid in entries:
        table.setdefault(op, {}).setdefault(part, {})[index] = uid
    out: dict[int, list[list[str]]] = {}
    for op, parts in table.items():
        if sorted(parts) != list(range(len(parts))):
            raise CorruptInput(f"cannot name unique ids for operator {op}: partitions {sorted(parts)} are not 0..n-1")
        out[op] = [[parts[p][i] for i in sorted(parts[p])] for p in range(len(parts))]
    return out


def commit_for_format(entry: CommitEntry, fmt: int, uids: dict[int, list[list[str]]] | None = None) -> CommitEntry:
    """The commits entry rewritten for a target format.

    Format 1: ``v1`` without ``stateUniqueIds`` (what the engine writes with format 1; every
    other key kept in order). Format 2: ``v2`` with ``stateUniqueIds`` replaced by ``uids``
    (``None``: the entry as it is)."""
    meta = {k: v for k, v in entry.metadata.items() if k != UIDS_KEY}
    if fmt == 1:
        return CommitEntry(entry.batch_id, 1, meta)
    if fmt != 2:
        raise Unsupported(f"state checkpoint format {fmt} is not one this tool writes ({', '.join(map(str, FORMATS))})")
    if uids is None:
        return entry
    meta[UIDS_KEY] = {str(op): parts for op, parts in sorted(uids.items())}
    return CommitEntry(entry.batch_id, 2, meta)


def commits_for_target(
    commits: dict[int, CommitEntry], latest_batch: int, fmt: int, new_ids: dict[int, list[list[str]]] | None
) -> dict[str, bytes]:
    """``{"commits/<b>": new bytes}`` for the entries a target of format ``fmt`` needs changed.

    Format 1: every entry that names ids or is ``v2`` becomes ``v1`` without them. Format 2: the
    latest consistent batch's entry names ``new_ids`` (the versions we wrote); older entries are
    kept as they are (their ids name versions the target does not hold; the engine only reads
    the latest entry's ids to load state)."""
    out: dict[str, bytes] = {}
    for b, entry in sorted(commits.items()):
        if fmt == 1 and (entry.log_version >= 2 or UIDS_KEY in entry.metadata):
            out[f"commits/{b}"] = format_commit(commit_for_format(entry, 1)).encode("utf-8")
        elif fmt == 2 and b == latest_batch:
            out[f"commits/{b}"] = format_commit(commit_for_format(entry, 2, new_ids or {})).encode("utf-8")
    return out


def target_format(source_format: int, target_provider: str, requested: int | None = None, where: str = "") -> int:
    """Which state checkpoint format to write: the heap map has only format 1 (the engine refuses
    format 2 for it: observed); RocksDB keeps the source's format unless one is requested."""
    if requested is not None and requested not in FORMATS:
        raise Unsupported(f"state checkpoint format {requested} is not one this tool writes (1, 2)", where or None)
    if target_provider == "hdfs":
        if requested == 2:
            raise Unsupported(
                "the heap-map provider supports only state checkpoint format 1 "
                "(the engine refuses checkpointFormatVersion=2 for it)", where or None,
            )
        return 1
    return requested if requested is not None else source_format


# ------------------------------------------------------------------------ lineage
def parse_lineage(text: str, where: str) -> list[tuple[int, str]]:
    """The lineage JSON of a v3 changelog header: ``[(version, uid), ...]``, ascending."""
    try:
        raw = json.loads(text)
    except ValueError as exc:
        raise CorruptInput(f"changelog lineage is not valid JSON ({exc})", where) from None
    if not isinstance(raw, list):
        raise CorruptInput("changelog lineage is not a JSON list", where)
    out: list[tuple[int, str]] = []
    for item in raw:
        v = item.get("version") if isinstance(item, dict) else None
        u = item.get("checkpointUniqueId") if isinstance(item, dict) else None
        if not isinstance(v, int) or isinstance(v, bool) or v < 1 or not isinstance(u, str) or not u:
            raise CorruptInput(f"changelog lineage entry {json.dumps(item)[:80]} is not {{version, checkpointUniqueId}}", where)
        if out and v <= out[-1][0]:
            raise CorruptInput(f"changelog lineage is not in ascending version order (version {v} after {out[-1][0]})", where)
        out.append((v, u))
    return out


def render_lineage(lineage: list[tuple[int, str]]) -> str:
    return json.dumps([{"version": v, "checkpointUniqueId": u} for v, u in lineage], separators=(",", ":"))


# ------------------------------------------------------------------------ JSON checksum files
def checksum_name(name: str) -> str:
    return name + CHECKSUM_SUFFIX


def crc32c_signed(data: bytes) -> int:
    """CRC32C (Castagnoli) of ``data`` as the signed 32-bit int the engine's JSON holds (observed:
    ``value`` is negative for values >= 2**31). Computed by the ``crc32c`` library."""
    import crc32c

    return struct.unpack(">i", struct.pack(">I", crc32c.crc32c(data)))[0]


def verify_checksum_file(data: bytes, checksum_json: bytes, where: str) -> None:
    """Check a main file's bytes against its visible ``<name>.crc`` JSON (CRC32C and size)."""
    try:
        meta = json.loads(checksum_json.decode("utf-8"))
    except (ValueError, UnicodeDecodeError) as exc:
        raise CorruptInput(f"checksum file {where.rsplit('/', 1)[-1]}.crc is not valid JSON ({exc})", where) from None
    if not isinstance(meta, dict):
        raise CorruptInput("checksum file is not a JSON object", where)
    algorithm = str(meta.get("algorithm", ""))
    if algorithm.upper() != "CRC32C":
        raise Unsupported(f"checksum file uses algorithm {algorithm!r}; only CRC32C is known", where)
    size = meta.get("mainFileSize")
    if isinstance(size, int) and size != len(data):
        raise CorruptInput(f"file is {len(data)} bytes, its .crc checksum file records {size}", where)
    value = meta.get("value")
    if not isinstance(value, int):
        raise CorruptInput("checksum file has no integer 'value'", where)
    actual = crc32c_signed(data)
    if actual != value:
        raise CorruptInput(f"CRC32C mismatch: file has {actual}, its .crc checksum file records {value}", where)


def render_checksum_file(data: bytes, timestamp_ms: int) -> bytes:
    """The visible checksum JSON for ``data``, in the engine's key order (observed); ``creator``
    names this tool."""
    meta = {
        "algorithm": "CRC32C",
        "value": crc32c_signed(data),
        "mainFileSize": len(data),
        "timestampMs": int(timestamp_ms),
        "creator": {"executorId": "stateshift", "taskInfo": "stateshift"},
    }
    return json.dumps(meta, separators=(",", ":")).encode("utf-8")
