"""The checkpoint model: what a checkpoint directory holds, read once, without touching state rows.

``load_checkpoint(location)`` lists each directory once and reads the small metadata files:

* ``metadata``: the query id;
* ``offsets/<b>`` and ``commits/<b>``: the logs; the latest consistent batch is the newest batch
  with both entries, and its state version is ``batch + 1``; newer offsets entries without a
  commit are reported as a trailing uncommitted batch;
* ``sources/``: kept verbatim;
* ``state/<operator>/``: operator metadata under ``_metadata``, partitions ``0..n-1``, the
  default store directly in each partition directory and named stores (join stores) in
  subdirectories, schema files under ``<partition>/_metadata`` and ``_stateSchema``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

from ..errors import CorruptInput, IncompleteCheckpoint, Unsupported
from ..providers import provider_for
from ..providers.base import Provider, StoreDir
from ..storage import Entry, Location
from .logs import (
    PARTITIONS_CONF,
    PROVIDER_CONF,
    CommitEntry,
    OffsetEntry,
    log_batch_ids,
    parse_commit,
    parse_offsets,
    parse_query_metadata,
)

HDFS_CLASS = "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider"
_NOT_STORES = {"_metadata", "SSTs", "logs", "_stateSchema"}
INCOMPLETE_PREFIX = "stateshift:"  # the first bytes of the placeholder `metadata` of an unfinished target
JOURNAL_DIR = "_stateshift"


@dataclass(frozen=True)
class StorePartition:
    """One store of one partition of one operator, with its directory listing."""

    dir: StoreDir
    listing: dict[str, Entry] = field(compare=False, repr=False)

    @property
    def operator_id(self) -> int:
        return self.dir.operator_id

    @property
    def store_name(self) -> str:
        return self.dir.store_name

    @property
    def partition(self) -> int:
        return self.dir.partition

    @property
    def label(self) -> str:
        return f"op {self.operator_id} / {self.store_name} / part {self.partition}"


@dataclass(frozen=True)
class StoreInfo:
    name: str
    num_cols_prefix_key: int = 0
    num_partitions: int | None = None


@dataclass(frozen=True)
class Operator:
    operator_id: int
    name: str | None
    stores: tuple[StoreInfo, ...]
    partitions: tuple[StorePartition, ...]
    metadata: dict[str, Any] | None = field(default=None, compare=False)

    def store_info(self, name: str) -> StoreInfo:
        for s in self.stores:
            if s.name == name:
                return s
        return StoreInfo(name)


@dataclass(frozen=True)
class Checkpoint:
    location: Location
    query_id: str
    offsets: dict[int, OffsetEntry] = field(compare=False)
    commits: dict[int, CommitEntry] = field(compare=False)
    latest_batch: int
    uncommitted: tuple[int, ...]
    conf: dict[str, str] = field(compare=False)
    provider_class: str
    operators: tuple[Operator, ...]
    log_listings: dict[str, dict[str, Entry]] = field(default_factory=dict, compare=False, repr=False)

    @property
    def root_listing(self) -> dict[str, Entry]:
        return self.log_listings.get("") or self.location.list_dir("")

    @property
    def state_version(self) -> int:
        return self.latest_batch + 1

    @property
    def provider(self) -> Provider:
        return provider_for(self.provider_class, self.location.describe(f"offsets/{self.latest_batch}"))

    @property
    def num_partitions(self) -> int | None:
        return _pinned_partitions(self.conf)

    def store_partitions(self) -> list[StorePartition]:
        return [sp for op in self.operators for sp in op.partitions]


def _read_log(loc: Location, name: str, listing: dict[str, Entry], parse: Any) -> dict[int, Any]:
    out = {}
    for b in log_batch_ids(list(listing)):
        rel = f"{name}/{b}"
        out[b] = parse(loc.read_text(rel), b, loc.describe(rel))
    return out


def _operator_metadata(loc: Location, rel: str, listing: dict[str, Entry]) -> dict[str, Any] | None:
    if "metadata" not in listing:
        return None
    where = loc.describe(f"{rel}/metadata")
    text = loc.read_text(f"{rel}/metadata")
    lines = text.split("\n", 1)
    if len(lines) < 2 or not lines[0].startswith("v"):
        raise CorruptInput("operator metadata does not start with a version line", where)
    try:
        value = json.loads(lines[1])
    except json.JSONDecodeError as exc:
        raise CorruptInput(f"operator metadata is not valid JSON ({exc.msg})", where) from exc
    if not isinstance(value, dict):
        raise CorruptInput("operator metadata is not a JSON object", where)
    value["_version"] = lines[0].strip()
    return value


def _load_operator(loc: Location, op_id: int, pinned_partitions: int | None = None) -> Operator:
    rel = f"state/{op_id}"
    listing = loc.list_dir(rel)
    meta_listing = loc.list_dir(f"{rel}/_metadata") if "_metadata" in listing else {}
    meta = _operator_metadata(loc, f"{rel}/_metadata", meta_listing)
    stores: list[StoreInfo] = []
    name = None
    if meta is not None:
        name = (meta.get("operatorInfo") or {}).get("operatorName")
        for s in meta.get("stateStoreInfo") or []:
            stores.append(
                StoreInfo(str(s.get("storeName", "default")), int(s.get("numColsPrefixKey", 0) or 0), s.get("numPartitions"))
            )
    partitions = sorted(int(n) for n, e in listing.items() if n.isdigit() and e.is_dir)
    expected = next((s.num_partitions for s in stores if s.num_partitions), None)
    if expected is not None:
        missing = sorted(set(range(int(expected))) - set(partitions))
        if missing:
            raise CorruptInput(
                f"operator metadata names {expected} partitions but partition directory {missing[0]} is missing",
                loc.describe(f"{rel}/{missing[0]}"),
            )
    limit, named_by = (int(expected), "operator metadata") if expected is not None else (pinned_partitions, "offsets log")
    stray = [p for p in partitions if limit is not None and p >= limit]
    if stray:  # a copy left by hand: moving it would give the target a partition the engine never reads
        raise CorruptInput(
            f"partition directory {stray[0]} is outside the {limit} partitions the {named_by} names "
            "(a stray copy?); move it out of the checkpoint",
            loc.describe(f"{rel}/{stray[0]}"),
        )
    parts: list[StorePartition] = []
    for p in partitions:
        prel = f"{rel}/{p}"
        plisting = loc.list_dir(prel)
        named = sorted(n for n, e in plisting.items() if e.is_dir and n not in _NOT_STORES and not n.startswith("."))
        store_names = [s.name for s in stores] if stores else (named or ["default"])
        for sname in store_names:
            if sname == "default":
                parts.append(StorePartition(StoreDir(loc, prel, op_id, p, "default"), plisting))
            else:
                srel = f"{prel}/{sname}"
                slisting = loc.list_dir(srel) if sname in named else {}
                parts.append(StorePartition(StoreDir(loc, srel, op_id, p, sname), slisting))
    if not stores:
        seen = sorted({sp.store_name for sp in parts})
        part0 = next((sp for sp in parts if sp.dir.partition == 0), None)
        prefix = _session_prefix(loc, part0.dir.rel, part0.listing) if seen == ["default"] and part0 else 0
        stores = [StoreInfo(s, prefix) for s in seen]
    return Operator(op_id, name, tuple(stores), tuple(parts), meta)


def _pinned_partitions(conf: dict[str, str]) -> int | None:
    value = conf.get(PARTITIONS_CONF)
    return int(value) if value and value.isdigit() else None


def _session_prefix(loc: Location, part0: str, listing: dict[str, Entry]) -> int:
    """``numColsPrefixKey`` of an operator without operator metadata (written by engine 3.5), from
    its schema file: a session-window store (key ends with ``sessionStartTime: timestamp``, a value
    field carries the metadata ``spark.sessionWindow: true``; observed on 3.5.9 and 4.3.0) keys
    RocksDB by every key field but the session start (4.3.0's metadata says 1 for one grouping
    column). Anything else has no prefix key (0)."""
    from ..rows.schema import TimestampType, parse_state_schema_file

    if "_metadata" not in listing or "schema" not in loc.list_dir(f"{part0}/_metadata"):  # partition 0 is listed already
        return 0
    rel = f"{part0}/_metadata/schema"
    schemas = parse_state_schema_file(loc.read_bytes(rel), loc.describe(rel))
    if len(schemas) != 1:
        return 0
    key, value = schemas[0].key_schema, schemas[0].value_schema
    last = key.fields[-1] if key.fields else None
    session_value = any(f.metadata_dict.get("spark.sessionWindow") is True for f in value.fields)
    if last is not None and last.name == "sessionStartTime" and isinstance(last.data_type, TimestampType) and session_value:
        return len(key.fields) - 1
    return 0


def _refuse_unexplained_versions(operators: list[Operator], provider: Provider, newest_batch: int) -> None:
    """State files can run ahead of the commit log by one in-flight batch, never further: batch b
    writes version b+1 only after its offsets entry exists. Anything newer is inconsistent."""
    limit = newest_batch + 1
    for op in operators:
        for sp in op.partitions:
            ahead = [v for v in provider.versions(sp.listing) if v > limit]
            if ahead:
                name = next(n for n in sorted(sp.listing) if n.split(".")[0].split("_")[0] == str(ahead[0]))
                raise CorruptInput(
                    f"state version {ahead[0]} is newer than the commit log and the offsets log allow "
                    f"(newest offsets entry is batch {newest_batch}, so at most version {limit} can exist)",
                    sp.dir.describe(name),
                )


def load_checkpoint(loc: Location) -> Checkpoint:
    """Read the model of the checkpoint at ``loc`` (never writes)."""
    root = loc.list_dir("")
    if not root:
        if not loc.exists(""):
            raise CorruptInput("checkpoint directory does not exist", loc.describe())
        raise CorruptInput("directory is empty; not a streaming checkpoint", loc.describe())
    metadata_text = loc.read_text("metadata") if "metadata" in root else ""
    if metadata_text.startswith(INCOMPLETE_PREFIX):
        raise IncompleteCheckpoint(
            "incomplete stateshift target: a convert or import into it did not finish; the engine will refuse "
            "it too. Rerun the same command with --resume, or delete the directory",
            loc.describe(),
        )
    if "offsets" not in root or "metadata" not in root:
        missing = " and ".join(n for n in ("metadata", "offsets") if n not in root)
        hint = ""
        if "manifest.json" in root and "state" in root:  # the name migrate.archive.manifest.MANIFEST_NAME
            hint = " (it looks like a stateshift archive: `stateshift import ARCHIVE DST --to ... --dry-run` checks and describes one)"
        raise CorruptInput(f"not a streaming checkpoint: no {missing} here{hint}", loc.describe())
    query = parse_query_metadata(metadata_text, loc.describe("metadata"))
    offsets_listing = loc.list_dir("offsets")
    commits_listing = loc.list_dir("commits") if "commits" in root else {}
    offsets = _read_log(loc, "offsets", offsets_listing, parse_offsets)
    commits = _read_log(loc, "commits", commits_listing, parse_commit)
    orphan = sorted(set(commits) - set(offsets))
    if orphan:
        raise CorruptInput(f"commit entry for batch {orphan[0]} has no offsets entry", loc.describe(f"commits/{orphan[0]}"))
    consistent = sorted(set(offsets) & set(commits))
    if not consistent:
        where = loc.describe("commits")
        raise Unsupported("no committed micro-batch yet: there is no consistent state to migrate", where)
    latest = consistent[-1]
    uncommitted = tuple(b for b in sorted(offsets) if b > latest)
    conf = offsets[latest].conf
    provider_class = conf.get(PROVIDER_CONF, HDFS_CLASS)
    provider_for(provider_class, loc.describe(f"offsets/{latest}"))  # unknown class -> Unsupported
    operators: list[Operator] = []
    if "state" in root:
        state = loc.list_dir("state")
        for op_id in sorted(int(n) for n, e in state.items() if n.isdigit() and e.is_dir):
            operators.append(_load_operator(loc, op_id, _pinned_partitions(conf)))
    _refuse_unexplained_versions(operators, provider_for(provider_class), max(offsets))
    return Checkpoint(
        location=loc,
        query_id=str(query["id"]),
        offsets=offsets,
        commits=commits,
        latest_batch=latest,
        uncommitted=uncommitted,
        conf=conf,
        provider_class=provider_class,
        operators=tuple(operators),
        log_listings={"": root, "offsets": offsets_listing, "commits": commits_listing},
    )
