"""Which engine version family wrote a checkpoint last, and which one a target is written for.

Two families are told apart, by what Spark 3.5.9 and 4.3.0 were observed to write
(``tests/fixtures/engine_versions/FINDINGS.md``):

* **3.5**: offsets and commits entries ``v1`` and a pinned ``conf`` of 10 keys; RocksDB zips
  whose ``metadata`` holds only ``sstFiles`` and ``numKeys``; OPTIONS ``rocksdb_version=8.3.2``.
* **4.x**: every offsets entry pins 7 more conf keys (:data:`FOUR_ONLY_CONFS`), also when a 4.x
  engine continues a 3.5 checkpoint; opt-in offsets / commits ``v2``; zips with the column-family
  fields; OPTIONS ``rocksdb_version=9.8.4``.

The newest offsets entry decides (it is what the engine that ran last wrote; a checkpoint's
history can mix both families). Commits ``v2`` also mean 4.x. On request the newest RocksDB zip
of one store partition is read as extra evidence and reported beside the decision; it does not
override the logs (a zip can be older than the last batch with changelog checkpointing, and a
zip written by this tool carries the RocksDB version of its own binding).

Command-line syntax of a target version (:func:`parse_engine_version`): ``3.5`` (also ``3.5.x``,
``3.5.<patch>``) or ``4`` (also ``4.x``, ``4.<minor>``, ``4.<minor>.<patch>``). Only the family
matters to what is written.

Pure functions over logs and bytes, plus :func:`infer_engine`, which reads one zip.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

from ..errors import CorruptInput, StateshiftError, Unsupported, UsageError
from .logs import CommitEntry, OffsetEntry

SPARK_35 = "3.5"
SPARK_4 = "4.x"
FAMILIES = (SPARK_35, SPARK_4)  # oldest first
_RANK = {f: i for i, f in enumerate(FAMILIES)}

#: conf keys pinned in offsets entries by 4.3.0 and never by 3.5.9 (observed, FINDINGS.md)
FOUR_ONLY_CONFS = (
    "spark.sql.dropDuplicates.deterministicKeyOrder.enabled",
    "spark.sql.streaming.stateStore.rocksdb.mergeOperatorVersion",
    "spark.sql.streaming.queryEvolution.enableSourceEvolution",
    "spark.sql.streaming.stateStore.encodingFormat",
    "spark.sql.streaming.stateStore.rowChecksum.enabled",
    "spark.sql.streaming.statefulOperator.alwaysNullableOutput.enabled",
    "spark.sql.function.protobufExtensions.enabled",
)
#: fields of the RocksDB zip ``metadata`` member that 4.3.0 writes and 3.5.9 does not (observed)
FOUR_ONLY_ZIP_FIELDS = ("numInternalKeys", "columnFamilyMapping", "columnFamilyTypeMap", "maxColumnFamilyId")
#: the highest RocksDB table format_version the RocksDB in 3.5.9 (8.3.2) opens (observed: 6 is refused)
MAX_TABLE_FORMAT_35 = 5

_VERSION_TEXT = re.compile(r"^(\d+)(?:\.(\d+|x))?(?:\.(\d+|x))?$")
_ROCKSDB_VERSION = re.compile(rb"^\s*rocksdb_version=([0-9.]+)\s*$", re.M)


def parse_engine_version(text: str) -> str:
    """The family for a ``--engine-version`` value; :class:`UsageError` for anything else."""
    m = _VERSION_TEXT.match(text.strip().lower())
    if m:
        major, minor = m.group(1), m.group(2)
        if major == "3" and minor == "5":
            return SPARK_35
        if major == "4":
            return SPARK_4
    raise UsageError(
        f"--engine-version {text!r} is not a supported engine version: use 3.5 (Spark 3.5.x) or 4.x (Spark 4.x, e.g. 4.3)"
    )


def is_newer(a: str, b: str) -> bool:
    """Whether family ``a`` is newer than family ``b``."""
    return _RANK[a] > _RANK[b]


@dataclass(frozen=True)
class EngineInference:
    """The family that wrote a checkpoint last, why (one line), the file that says so (relative to
    the checkpoint root), and other hints."""

    family: str
    evidence: str
    evidence_file: str
    hints: tuple[str, ...] = ()

    def to_json(self) -> dict[str, Any]:
        return {"family": self.family, "evidence": self.evidence, "evidence_file": self.evidence_file, "hints": list(self.hints)}

    @staticmethod
    def from_json(obj: Any, where: str) -> EngineInference:
        if not isinstance(obj, dict) or obj.get("family") not in FAMILIES or not isinstance(obj.get("evidence"), str):
            raise CorruptInput(f"engine record {str(obj)[:80]!r} is not a family in {FAMILIES} with its evidence", where)
        hints = obj.get("hints") or []
        return EngineInference(obj["family"], obj["evidence"], str(obj.get("evidence_file") or ""), tuple(str(h) for h in hints))


def infer_from_logs(offsets: dict[int, OffsetEntry], commits: dict[int, CommitEntry]) -> EngineInference:
    """The family from the newest offsets entry (and commits ``v2``)."""
    if not offsets:
        raise CorruptInput("no offsets entry to tell the engine version from", "offsets")
    newest = max(offsets)
    entry = offsets[newest]
    where = f"offsets/{newest}"
    if entry.log_version >= 2:
        return EngineInference(SPARK_4, f"offsets entry format v{entry.log_version} (only 4.x writes it)", where)
    keys = [k for k in FOUR_ONLY_CONFS if k in entry.conf]
    if keys:
        return EngineInference(SPARK_4, f"newest offsets entry pins {len(keys)} conf key(s) only 4.x writes (e.g. {keys[0]})", where)
    v2 = sorted(b for b, c in commits.items() if c.log_version >= 2)
    if v2:
        return EngineInference(SPARK_4, f"commits entry format v{commits[v2[-1]].log_version} (only 4.x writes it)", f"commits/{v2[-1]}")
    return EngineInference(SPARK_35, "newest offsets entry is v1 and pins none of the conf keys 4.x adds", where)


def zip_hints(members: dict[str, bytes], where: str) -> tuple[str, ...]:
    """What one RocksDB version zip says about the engine that wrote it (pure)."""
    hints = []
    meta = members.get("metadata", b"")
    _, _, body = meta.decode("utf-8", "replace").partition("\n")
    try:
        fields = json.loads(body) if body else {}
    except ValueError:
        fields = {}
    if isinstance(fields, dict) and fields:
        extra = [f for f in FOUR_ONLY_ZIP_FIELDS if f in fields]
        hints.append(f"{where}: metadata has {'the 4.x fields' if extra else 'only the 3.5 fields'} ({', '.join(sorted(fields))})")
    for name, data in sorted(members.items()):
        if name.startswith("OPTIONS-") and (m := _ROCKSDB_VERSION.search(data)):
            hints.append(f"{where}: {name} rocksdb_version={m.group(1).decode()}")
    return tuple(hints)


def infer_engine(ckpt: Any, zip_evidence: bool = False) -> EngineInference:
    """The family of a loaded :class:`~migrate.checkpoint.model.Checkpoint`; with ``zip_evidence``
    also the hints of the newest zip of the first RocksDB store partition (one more read of that
    zip, so ``inspect`` asks for it only with ``--rows``, which reads all state anyway: a plain
    inspect reads each object once, as object stores bill per request)."""
    from ..providers.rocksdb_meta import unzip_members

    base = infer_from_logs(ckpt.offsets, ckpt.commits)
    if not zip_evidence:
        return base
    zip_re = re.compile(r"^(\d+)(?:_[0-9A-Za-z-]+)?\.zip$")
    for sp in ckpt.store_partitions():
        zips = sorted((int(m.group(1)), n) for n in sp.listing if (m := zip_re.match(n)) and int(m.group(1)) <= ckpt.state_version)
        if not zips:
            continue
        rel = f"{sp.dir.rel}/{zips[-1][1]}"
        try:
            hints = zip_hints(unzip_members(ckpt.location.read_bytes(rel), ckpt.location.describe(rel)), rel)
        except StateshiftError:
            hints = ()  # a damaged zip is reported by the reader, with its own message
        return EngineInference(base.family, base.evidence, base.evidence_file, hints)
    return base


def refuse_target(source: EngineInference, target: str, describe: Callable[[str], str]) -> None:
    """Refuse (:class:`Unsupported`) writing a checkpoint last written by a newer engine for an
    older one; ``describe`` turns the evidence file into a path for the message."""
    if is_newer(source.family, target):
        raise Unsupported(
            f"checkpoint was last written by engine {source.family} ({source.evidence}); an engine {target} cannot "
            f"restart it; choose --engine-version {source.family}",
            describe(source.evidence_file),
        )


def refuse_for_35(
    offsets: dict[int, OffsetEntry], commits: dict[int, CommitEntry], conf: dict[str, str], describe: Callable[[str], str]
) -> None:
    """Refuse what 3.5 cannot read in logs that are kept (older entries can be 4.x ones)."""
    for name, log in (("offsets", offsets), ("commits", commits)):
        for b in sorted(log):
            if log[b].log_version >= 2:
                raise Unsupported(
                    f"{name} entry format v{log[b].log_version} cannot be read by engine 3.5 (it refuses logs newer than v1)",
                    describe(f"{name}/{b}"),
                )
    from ..providers.rocksdb_db import FORMAT_VERSION_CONF

    raw = conf.get(FORMAT_VERSION_CONF)
    if raw is not None and raw.strip().isdigit() and int(raw) > MAX_TABLE_FORMAT_35:
        raise Unsupported(
            f"{FORMAT_VERSION_CONF}={raw} is pinned, and the RocksDB of engine 3.5 refuses table format versions "
            f"above {MAX_TABLE_FORMAT_35}",
            describe(f"offsets/{max(offsets)}"),
        )


_JOIN_SCHEMA = re.compile(r"^state/\d+/\d+/(?:left|right)-(?:keyToNumValues|keyWithIndexToValue)/_metadata/schema$")


def upgrade_schema_rewrites(source: str, target: str, schema_rels: Iterable[str]) -> list[str]:
    """The schema files to rewrite when a checkpoint last written by 3.5 is written for 4.x: those
    of stream-stream join stores, whose value fields 3.5 can declare non-null where 4.x declares
    them nullable, which 4.3.0 refuses on restart (observed: STATE_STORE_VALUE_SCHEMA_NOT_COMPATIBLE);
    :func:`nullable_value_schema` makes the stored value schema accept both."""
    if not (source == SPARK_35 and target == SPARK_4):
        return []
    return sorted(rel for rel in schema_rels if _JOIN_SCHEMA.match(rel))


def _relax(node: Any) -> None:
    """Every ``nullable`` / ``containsNull`` / ``valueContainsNull`` flag of a schema JSON set true."""
    if isinstance(node, dict):
        for flag in ("nullable", "containsNull", "valueContainsNull"):
            if flag in node:
                node[flag] = True
        for child in node.values():
            _relax(child)
    elif isinstance(node, list):
        for child in node:
            _relax(child)


def _utf_chunks(text: str) -> bytes:
    """``writeInt(count)`` then ``writeUTF`` chunks of ``text`` (ASCII JSON: modified UTF-8 is ASCII)."""
    raw = text.encode("ascii")
    step = 65535  # writeUTF's limit per chunk
    chunks = [raw[i : i + step] for i in range(0, len(raw), step)] or [b""]
    return len(chunks).to_bytes(4, "big") + b"".join(len(c).to_bytes(2, "big") + c for c in chunks)


def nullable_value_schema(data: bytes, where: str) -> bytes:
    """A v2 state schema file whose value schema declares every field nullable (the key schema and
    the framing unchanged). Row bytes do not depend on nullability; a stored nullable field accepts
    a new non-null or nullable one in the engine's schema check (from memory; proven for 3.5 joins
    continued by 4.3.0 in tests/engine/test_engine_upgrade_35_to_4_engine.py)."""
    import struct

    from ..rows.schema import parse_state_schema_file

    (schema,) = parse_state_schema_file(data, where)  # checks the whole file first
    if schema.format_version != 2:
        raise Unsupported(f"state schema file v{schema.format_version}: only v2 join schemas can be upgraded", where)

    def chunked(pos: int) -> tuple[str, int]:
        (count,) = struct.unpack(">i", data[pos : pos + 4])
        pos += 4
        parts = []
        for _ in range(count):
            (n,) = struct.unpack(">H", data[pos : pos + 2])
            parts.append(data[pos + 2 : pos + 2 + n].decode("utf-8", "surrogatepass"))
            pos += 2 + n
        return "".join(parts), pos

    head = 2 + int.from_bytes(data[:2], "big")
    key_end = chunked(head)[1]
    value_text, _ = chunked(key_end)
    value = json.loads(value_text)
    _relax(value)
    return data[:key_end] + _utf_chunks(json.dumps(value, separators=(",", ":")))
