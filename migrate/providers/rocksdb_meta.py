"""The RocksDB state-store version zip: its members, their names, and the ``metadata`` member.

Observed in zips written by Spark 4.3.0 (RocksDB 9.8.4): the member ``metadata`` is the text
``"v1\\n"`` followed by one compact JSON object::

    {"sstFiles":[{"localFileName":"000008.sst","dfsSstFileName":"000008-<uuid>.sst","sizeBytes":1268}],
     "numKeys":2,"numInternalKeys":0,"columnFamilyMapping":{},"columnFamilyTypeMap":{},
     "maxColumnFamilyId":0}

``sstFiles`` maps each table file the RocksDB instance needs (under its local name, which the
MANIFEST refers to) to the shared copy in the partition's ``SSTs/`` folder. Older engines also
write ``logFiles`` (same shape, ``dfsLogFileName``, copies in ``logs/``) - the field name and the
folder are from memory, not observed; empty lists are left out by the engine's JSON writer (the
4.3 sample has no ``logFiles`` key). ``columnFamilyMapping`` is non-empty only for stores that use
RocksDB column families (newer stateful APIs).

The other members are the RocksDB checkpoint's own small files (CURRENT, MANIFEST-*, OPTIONS-*,
WAL ``*.log``), always at the top level of the zip. Any member name that is not such a plain
name is refused before anything is extracted, so a crafted zip cannot write outside the folder.

Parsing and rendering are pure (bytes in, objects out, and the reverse); ``zip_checkpoint`` only
reads the local checkpoint folder it is given.
"""

from __future__ import annotations

import json
import os
import re
import struct
import time
import zipfile
import zlib
from dataclasses import dataclass, field
from io import BytesIO
from typing import Any

from ..errors import CorruptInput, Unsupported

METADATA_MEMBER = "metadata"
_HEADER = "v1"
_SST_LOCAL = re.compile(r"^\d+\.sst$")
_LOG_LOCAL = re.compile(r"^\d+\.log$")
# what the zip module raises on damaged archives (seen in fuzzing: zlib.error, EOFError, ...)
_ZIP_ERRORS = (zipfile.BadZipFile, zlib.error, EOFError, OSError, ValueError, NotImplementedError, RuntimeError,
               struct.error, OverflowError)  # fmt: skip
MAX_MEMBER_BYTES = 1 << 30  # a MANIFEST is capped at 1 GiB by the engine's options (max_manifest_file_size)
_ZIP_MEMBER = re.compile(r"^(CURRENT|MANIFEST-\d+|OPTIONS-\d+|\d+\.log)$")


@dataclass(frozen=True)
class SharedFile:
    """One immutable file of a version: its local name in the RocksDB dir and its shared copy."""

    local_name: str
    dfs_name: str
    size: int


@dataclass(frozen=True)
class VersionMetadata:
    """The parsed ``metadata`` member."""

    sst_files: tuple[SharedFile, ...]
    num_keys: int
    log_files: tuple[SharedFile, ...] = ()
    num_internal_keys: int = 0
    column_family_mapping: dict[str, Any] = field(default_factory=dict)
    column_family_type_map: dict[str, Any] = field(default_factory=dict)
    max_column_family_id: int = 0


def check_plain_name(name: str, what: str, where: str) -> str:
    """``name`` must be a bare file name: no folder part, no ``..``, nothing absolute."""
    if (
        not isinstance(name, str)
        or not name
        or name in (".", "..")
        or "/" in name
        or "\\" in name
        or "\x00" in name
        or re.match(r"^[A-Za-z]:", name)
    ):
        raise CorruptInput(f"{what} {name!r} is not a plain file name (absolute paths, folders and '..' are refused)", where)
    return name


def _int(obj: dict[str, Any], key: str, where: str, default: int | None = None) -> int:
    if key not in obj:
        if default is None:
            raise CorruptInput(f"metadata has no {key!r}", where)
        return default
    value = obj[key]
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise CorruptInput(f"metadata field {key!r} is not a non-negative integer: {value!r}", where)
    return value


def _files(obj: dict[str, Any], key: str, dfs_key: str, local_pattern: re.Pattern[str], where: str) -> tuple[SharedFile, ...]:
    raw = obj.get(key, [])
    if not isinstance(raw, list):
        raise CorruptInput(f"metadata field {key!r} is not a list", where)
    out: list[SharedFile] = []
    seen: set[str] = set()
    for i, item in enumerate(raw):
        if not isinstance(item, dict):
            raise CorruptInput(f"metadata {key}[{i}] is not an object", where)
        for k in ("localFileName", dfs_key):
            if not isinstance(item.get(k), str):
                raise CorruptInput(f"metadata {key}[{i}] has no string {k!r}", where)
        local = check_plain_name(item["localFileName"], f"{key}[{i}].localFileName", where)
        dfs = check_plain_name(item[dfs_key], f"{key}[{i}].{dfs_key}", where)
        if not local_pattern.match(local):
            raise CorruptInput(f"metadata {key}[{i}].localFileName {local!r} is not a RocksDB file name", where)
        if local in seen:
            raise CorruptInput(f"metadata names local file {local} twice", where)
        seen.add(local)
        out.append(SharedFile(local, dfs, _int(item, "sizeBytes", where)))
    return tuple(out)


def parse_metadata(data: bytes, where: str) -> VersionMetadata:
    """Parse the ``metadata`` member; ``where`` names the zip for error messages."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise CorruptInput("metadata member is not UTF-8 text", where) from exc
    header, sep, body = text.partition("\n")
    if not sep:
        raise CorruptInput("metadata member has no version line", where)
    if header.strip() != _HEADER:
        if re.fullmatch(r"v\d+", header.strip()):
            raise Unsupported(f"metadata format {header.strip()} is not supported (only {_HEADER})", where)
        raise CorruptInput(f"metadata member starts with {header[:20]!r}, expected {_HEADER!r}", where)
    try:
        obj = json.loads(body)
    except ValueError as exc:
        raise CorruptInput(f"metadata JSON does not parse: {exc}", where) from exc
    if not isinstance(obj, dict):
        raise CorruptInput("metadata JSON is not an object", where)
    if "sstFiles" not in obj:
        raise CorruptInput("metadata has no 'sstFiles'", where)
    cf_map = obj.get("columnFamilyMapping") or {}
    cf_types = obj.get("columnFamilyTypeMap") or {}
    if not isinstance(cf_map, dict) or not isinstance(cf_types, dict):
        raise CorruptInput("metadata column family maps are not objects", where)
    return VersionMetadata(
        sst_files=_files(obj, "sstFiles", "dfsSstFileName", _SST_LOCAL, where),
        log_files=_files(obj, "logFiles", "dfsLogFileName", _LOG_LOCAL, where),
        num_keys=_int(obj, "numKeys", where),
        num_internal_keys=_int(obj, "numInternalKeys", where, default=0),
        column_family_mapping=dict(cf_map),
        column_family_type_map=dict(cf_types),
        max_column_family_id=_int(obj, "maxColumnFamilyId", where, default=0),
    )


def render_metadata(meta: VersionMetadata, engine: str = "4.x") -> bytes:
    """The ``metadata`` member for ``meta``, with the field order and spacing the engine writes.

    For engine ``3.5`` only the fields 3.5.9 writes (observed: ``sstFiles``, ``numKeys``; it has no
    column families, which the caller refuses before writing)."""
    obj: dict[str, Any] = {
        "sstFiles": [
            {"localFileName": f.local_name, "dfsSstFileName": f.dfs_name, "sizeBytes": f.size} for f in meta.sst_files
        ]
    }
    if meta.log_files:
        obj["logFiles"] = [
            {"localFileName": f.local_name, "dfsLogFileName": f.dfs_name, "sizeBytes": f.size} for f in meta.log_files
        ]
    obj["numKeys"] = meta.num_keys
    if engine == "3.5":
        return (_HEADER + "\n" + json.dumps(obj, separators=(",", ":"))).encode("utf-8")
    obj["numInternalKeys"] = meta.num_internal_keys
    obj["columnFamilyMapping"] = meta.column_family_mapping
    obj["columnFamilyTypeMap"] = meta.column_family_type_map
    obj["maxColumnFamilyId"] = meta.max_column_family_id
    return (_HEADER + "\n" + json.dumps(obj, separators=(",", ":"))).encode("utf-8")


# ------------------------------------------------------------------------ zip members
def unzip_members(raw: bytes, where: str) -> dict[str, bytes]:
    """The members of a version zip, refusing any name that is not a plain RocksDB file name."""
    try:
        archive = zipfile.ZipFile(BytesIO(raw))
    except _ZIP_ERRORS as exc:
        raise CorruptInput(f"is not a zip file ({exc})", where) from exc
    members: dict[str, bytes] = {}
    with archive:
        for info in archive.infolist():
            name = check_plain_name(info.filename, "zip member", where)
            if name != METADATA_MEMBER and not _ZIP_MEMBER.match(name):
                raise CorruptInput(f"unexpected zip member {name!r}", where)
            if name in members:
                raise CorruptInput(f"zip member {name} appears twice", where)
            if info.file_size > MAX_MEMBER_BYTES:
                raise CorruptInput(f"zip member {name} claims {info.file_size} bytes (more than any RocksDB small file)", where)
            try:
                members[name] = archive.read(info)
            except _ZIP_ERRORS as exc:
                raise CorruptInput(f"zip member {name} cannot be read ({exc})", where) from exc
    return members


def zip_checkpoint(checkpoint: str, metadata: bytes, where: str) -> bytes:
    """The version zip of a RocksDB checkpoint dir: every file but the SSTs, plus ``metadata``.

    Member order as observed in the engine's zips: MANIFEST, CURRENT, WAL logs, OPTIONS, metadata.
    """
    names = [n for n in os.listdir(checkpoint) if _ZIP_MEMBER.match(n)]
    order = {"MANIFEST": 0, "CURRENT": 1, "OPTIONS": 3}
    names.sort(key=lambda n: (order.get(n.split("-")[0], 2), n))
    if not any(n.startswith("MANIFEST-") for n in names) or "CURRENT" not in names:
        raise CorruptInput("internal error: the RocksDB checkpoint has no MANIFEST/CURRENT", where)
    buf = BytesIO()
    stamp = time.localtime()[:6]
    with zipfile.ZipFile(buf, "w") as archive:
        for name in names:
            with open(os.path.join(checkpoint, name), "rb") as f:
                _add_member(archive, name, f.read(), stamp)
        _add_member(archive, METADATA_MEMBER, metadata, stamp)
    return buf.getvalue()


def _add_member(archive: zipfile.ZipFile, name: str, data: bytes, stamp: tuple[int, ...]) -> None:
    info = zipfile.ZipInfo(name, date_time=stamp)  # type: ignore[arg-type]
    info.compress_type = zipfile.ZIP_DEFLATED
    info.create_system = 0
    info.external_attr = 0
    archive.writestr(info, data)


# ------------------------------------------------------------------------ column families
@dataclass(frozen=True)
class ColumnFamilies:
    """The column-family table of a store (observed with transformWithState on Spark 4.3.0).

    All families live in RocksDB's default column family; each key starts with its family id as
    a 2-byte little-endian short (``mapping``: name -> id, ``default`` is 1 when present);
    ``internal`` marks the engine's own families (names starting with ``$``: timers, TTL
    indexes, list counters); their rows count in ``numInternalKeys``, the others in ``numKeys``.
    """

    mapping: dict[str, int]
    internal: dict[str, bool]
    max_id: int

    def to_json(self) -> str:
        return json.dumps(
            {"columnFamilyMapping": self.mapping, "columnFamilyTypeMap": self.internal, "maxColumnFamilyId": self.max_id},
            separators=(",", ":"),
        )

    def internal_ids(self) -> set[int]:
        return {i for name, i in self.mapping.items() if self.internal.get(name, False)}


def column_families(meta: VersionMetadata, where: str) -> ColumnFamilies | None:
    """The table of a version that uses column families, else None (checked)."""
    if not (meta.column_family_mapping or meta.column_family_type_map or meta.max_column_family_id):
        return None
    return _check_families(meta.column_family_mapping, meta.column_family_type_map, meta.max_column_family_id, where)


def parse_column_families(text: str, where: str) -> ColumnFamilies:
    """The table from its ``to_json`` form (a store property)."""
    try:
        obj = json.loads(text)
    except ValueError as exc:
        raise CorruptInput(f"the column-family table does not parse ({exc})", where) from None
    if not isinstance(obj, dict):
        raise CorruptInput("the column-family table is not a JSON object", where)
    return _check_families(obj.get("columnFamilyMapping"), obj.get("columnFamilyTypeMap"), obj.get("maxColumnFamilyId"), where)


def _check_families(mapping: Any, types: Any, max_id: Any, where: str) -> ColumnFamilies:
    if not isinstance(mapping, dict) or not isinstance(types, dict):
        raise CorruptInput("column-family mapping or type map is not an object", where)
    if isinstance(max_id, bool) or not isinstance(max_id, int) or not 0 <= max_id < 1 << 16:
        raise CorruptInput(f"maxColumnFamilyId {max_id!r} is not a 2-byte id", where)
    seen: dict[int, str] = {}
    for name, cf_id in mapping.items():
        if isinstance(cf_id, bool) or not isinstance(cf_id, int) or not 0 <= cf_id <= max_id:
            raise CorruptInput(f"column family {name!r} has id {cf_id!r}, not in 0..maxColumnFamilyId={max_id}", where)
        if cf_id in seen:
            raise CorruptInput(f"column families {seen[cf_id]!r} and {name!r} share id {cf_id}", where)
        seen[cf_id] = name
    for name, flag in types.items():
        if name not in mapping or not isinstance(flag, bool):
            raise CorruptInput(f"column-family type map entry {name!r}: {flag!r} does not match the mapping", where)
    return ColumnFamilies(dict(mapping), dict(types), max_id)
