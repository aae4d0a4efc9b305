"""The checkpoint's text logs: offsets entries and commits entries. Pure functions, bytes in/out.

Offsets entry (``offsets/<batchId>``), as the engine writes it::

    v1
    {"batchWatermarkMs":0,"batchTimestampMs":...,"conf":{...pinned SQL conf...}}
    {"logOffset":2}            <- one line per source, "-" for a source with no offset yet

Commits entry (``commits/<batchId>``)::

    v1
    {"nextBatchWatermarkMs":0}

Rewriting an entry changes only the keys asked for and keeps every other byte of meaning: the
JSON key order is preserved and the source lines are kept verbatim.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from typing import Any

from ..errors import CorruptInput, Unsupported

PROVIDER_CONF = "spark.sql.streaming.stateStore.providerClass"
CODEC_CONF = "spark.sql.streaming.stateStore.compression.codec"
ROCKSDB_FORMAT_CONF = "spark.sql.streaming.stateStore.rocksdb.formatVersion"
PARTITIONS_CONF = "spark.sql.shuffle.partitions"
_VERSION_LINE = re.compile(r"^v(\d+)$")


def _json_line(line: str, what: str, where: str) -> dict[str, Any]:
    try:
        value = json.loads(line)
    except json.JSONDecodeError as exc:
        raise CorruptInput(f"{what} is not valid JSON ({exc.msg} at column {exc.colno})", where) from exc
    if not isinstance(value, dict):
        raise CorruptInput(f"{what} is not a JSON object", where)
    return value


#: log entry formats this version reads and rewrites (observed: offsets v1 in 3.5 and 4.x, v2 with
#: 4.x's ``offsetLog.formatVersion=2``; commits v1, v2 with state checkpoint format 2)
KNOWN_LOG_VERSIONS = {"offsets": (1, 2), "commits": (1, 2)}


def _version(line: str, where: str, log: str) -> int:
    m = _VERSION_LINE.match(line.strip())
    if not m:
        raise CorruptInput(f"first line {line[:20]!r} is not a log version like 'v1'", where)
    version = int(m.group(1))
    known = KNOWN_LOG_VERSIONS[log]
    if version not in known:
        raise Unsupported(
            f"{log} entry format v{version} is not one this version of stateshift knows "
            f"({', '.join(f'v{k}' for k in known)}); it would rewrite it without understanding it",
            where,
        )
    return version


@dataclass(frozen=True)
class OffsetEntry:
    batch_id: int
    log_version: int
    metadata: dict[str, Any]
    source_lines: tuple[str, ...]

    @property
    def conf(self) -> dict[str, str]:
        conf = self.metadata.get("conf") or {}
        return {str(k): str(v) for k, v in conf.items()}

    @property
    def watermark_ms(self) -> int:
        return int(self.metadata.get("batchWatermarkMs", 0))

    @property
    def timestamp_ms(self) -> int:
        return int(self.metadata.get("batchTimestampMs", 0))


@dataclass(frozen=True)
class CommitEntry:
    batch_id: int
    log_version: int
    metadata: dict[str, Any]


def parse_offsets(text: str, batch_id: int, where: str) -> OffsetEntry:
    lines = text.split("\n")
    if text.endswith("\n"):
        lines = lines[:-1]
    if len(lines) < 2:
        raise CorruptInput("offsets entry is truncated: expected a version line and a metadata line", where)
    version = _version(lines[0], where, "offsets")
    metadata = _json_line(lines[1], "batch metadata (line 2)", where)
    if "conf" in metadata and not isinstance(metadata["conf"], dict):
        raise CorruptInput("batch metadata 'conf' is not a JSON object", where)
    for i, line in enumerate(lines[2:], start=3):
        if line != "-":
            if line.startswith("{"):
                _json_line(line, f"source offset (line {i})", where)
    return OffsetEntry(batch_id, version, metadata, tuple(lines[2:]))


def format_offsets(entry: OffsetEntry) -> str:
    body = [f"v{entry.log_version}", json.dumps(entry.metadata, separators=(",", ":"), ensure_ascii=False)]
    return "\n".join(body + list(entry.source_lines))


def with_conf(entry: OffsetEntry, changes: dict[str, str]) -> OffsetEntry:
    """A copy of the entry whose pinned conf has ``changes`` applied (keys kept in order)."""
    metadata = dict(entry.metadata)
    conf = dict(metadata.get("conf") or {})
    conf.update(changes)
    metadata["conf"] = conf
    return OffsetEntry(entry.batch_id, entry.log_version, metadata, entry.source_lines)


def parse_commit(text: str, batch_id: int, where: str) -> CommitEntry:
    lines = [line for line in text.split("\n") if line != ""]
    if len(lines) < 2:
        raise CorruptInput("commits entry is truncated: expected a version line and a JSON line", where)
    version = _version(lines[0], where, "commits")
    metadata = _json_line(lines[1], "commit metadata (line 2)", where)
    return CommitEntry(batch_id, version, metadata)


def format_commit(entry: CommitEntry) -> str:
    return f"v{entry.log_version}\n" + json.dumps(entry.metadata, separators=(",", ":"), ensure_ascii=False)


def parse_query_metadata(text: str, where: str) -> dict[str, Any]:
    """The checkpoint root ``metadata`` file: ``{"id":"<query uuid>"}``."""
    first = text.split("\n", 1)[0]
    value = _json_line(first, "query metadata", where)
    if not isinstance(value.get("id"), str):
        raise CorruptInput("query metadata has no string 'id'", where)
    return value


def log_batch_ids(names: list[str]) -> list[int]:
    """Batch ids among the names of a log directory (``0``, ``1``...; ``.0.crc`` and temp files skipped)."""
    ids = []
    for name in names:
        if name.isdigit():
            ids.append(int(name))
    return sorted(ids)
