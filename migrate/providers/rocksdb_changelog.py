"""RocksDB changelog files (``<v>.changelog``): their records, and which files rebuild a version.

With ``spark.sql.streaming.stateStore.rocksdb.changelogCheckpointing.enabled=true`` the engine
commits each version as a changelog of the keys it changed and uploads a full ``<v>.zip``
snapshot only now and then (from its maintenance task). Version V is the newest zip S <= V (or
the empty store when there is none) plus the changelogs S+1..V applied in order; a missing
changelog in that chain is an error, never a partial state.

A changelog is one stream compressed with the state codec (``spark.sql.streaming.stateStore
.compression.codec``, lz4 by default: the same framing as the heap-map files, see
``migrate.codecs``). Observed on Spark 4.3.0, the decompressed records are (``int`` = 32-bit
big-endian, as Java's DataOutputStream writes):

* format v1 (stores without column families), no header::

      int keyLen, key, int valueLen, value     -- put
      int keyLen, key, int -1                  -- delete
      int -1                                   -- end

* format v2 (stores with column families: transformWithState), header ``writeUTF("v2")``
  (``00 02 76 32``), then records led by a type byte::

      0x01 int keyLen, key, int valueLen, value   -- put
      0x10 int keyLen, key, int -1                -- delete
      0x11 int keyLen, key, int valueLen, value   -- merge (list state: append one element)
      0x00                                        -- end

* format v3 (state checkpoint format 2, ``<v>_<uid>.changelog``; observed on 4.3.0), header
  ``writeUTF("v3")`` then ``writeUTF(lineage JSON)`` (see ``checkpoint/uids.py``), then v1
  records. :func:`changelog_lineage` returns the lineage; ``parse_changelog`` reports the record
  format (1).

Keys and values are the RocksDB bytes themselves (encoding-version byte, prefix-key layout and
column-family id included). Header ``v4`` (column families with unique ids; not observed) is
refused.
A v1 file cannot be told from a versioned one by a magic number; a v1 file whose first key is
161 330 bytes long or more and starts like a header would be misread (keys that long do not
occur in practice; common practice for this file family).

A merge appends its operand to the current value with the delimiter of the engine's string-append
merge operator: none with ``spark.sql.streaming.stateStore.rocksdb.mergeOperatorVersion=2``
(observed: values the engine itself merged during compaction are the operands back to back),
``,`` before that (RocksDB's StringAppendOperator default; from memory).

``parse_changelog`` / ``render_changelog`` are pure; ``ChangelogReplay`` applies records to an
open RocksDB (``rocksdict``) in the caller's temporary folder.
"""

from __future__ import annotations

import re
import struct
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

from ..errors import CorruptInput, Unsupported

PUT, DELETE, MERGE = "put", "delete", "merge"
_V2_TYPES = {0x01: PUT, 0x10: DELETE, 0x11: MERGE}
_V2_BYTES = {v: k for k, v in _V2_TYPES.items()}
_V2_END = 0x00
_HEADER = re.compile(rb"^v(\d+)$")
_INT = struct.Struct(">i")

MERGE_VERSION_CONF = "spark.sql.streaming.stateStore.rocksdb.mergeOperatorVersion"


@dataclass(frozen=True)
class Record:
    kind: str  # PUT, DELETE or MERGE
    key: bytes
    value: bytes | None  # None for DELETE


def merge_delimiter(conf: dict[str, str], where: str = "") -> bytes:
    """The delimiter the engine's merge operator puts between list elements (see the docstring)."""
    raw = conf.get(MERGE_VERSION_CONF, "1").strip()
    if raw == "2":
        return b""
    if raw == "1":
        return b","
    raise Unsupported(f"{MERGE_VERSION_CONF}={raw!r} is not a merge operator version this tool knows (1, 2)", where or None)


def format_version(data: bytes) -> int:
    """1 for a headerless file, else the number of its ``v<n>`` header."""
    if len(data) >= 4:
        (n,) = struct.unpack_from(">H", data, 0)
        if 2 <= n <= 4 and _HEADER.match(data[2 : 2 + n]):
            return int(data[3 : 2 + n])
    return 1


def parse_changelog(data: bytes, where: str) -> tuple[int, list[Record]]:
    """(format version, records in file order) of one decompressed changelog."""
    version = format_version(data)
    if version == 1:
        return 1, list(_v1_records(data, 0, where))
    if version == 2:
        return 2, list(_v2_records(data, 4, where))
    if version == 3:
        return 1, list(_v1_records(data, _lineage_end(data, where), where))
    raise Unsupported(f"changelog format v{version} is not supported (known: v1, v2, v3)", where)


def _lineage_end(data: bytes, where: str) -> int:
    """Offset of the first record of a v3 file (after ``writeUTF("v3")`` and the lineage)."""
    if len(data) < 6:
        raise CorruptInput("changelog v3 header is truncated (no lineage length)", where)
    (n,) = struct.unpack_from(">H", data, 4)
    if 6 + n > len(data):
        raise CorruptInput(f"changelog v3 lineage of {n} bytes runs past the end of the file", where)
    return 6 + n


def changelog_lineage(data: bytes, where: str) -> list[tuple[int, str]] | None:
    """The lineage ``[(version, uid), ...]`` in a v3 changelog's header; None for v1/v2 files."""
    if format_version(data) != 3:
        return None
    from ..checkpoint.uids import parse_lineage

    end = _lineage_end(data, where)
    try:
        text = data[6:end].decode("utf-8")
    except UnicodeDecodeError:
        raise CorruptInput("changelog v3 lineage is not valid UTF-8", where) from None
    return parse_lineage(text, where)


def _int(data: bytes, pos: int, what: str, where: str) -> int:
    if pos + 4 > len(data):
        raise CorruptInput(f"changelog ends inside {what} at byte {pos} (truncated)", where)
    return _INT.unpack_from(data, pos)[0]


def _bytes(data: bytes, pos: int, n: int, what: str, where: str) -> bytes:
    if n < 0 or pos + n > len(data):
        raise CorruptInput(f"changelog {what} of {n} bytes at byte {pos} runs past the end of the file", where)
    return data[pos : pos + n]


def _v1_records(data: bytes, pos: int, where: str) -> Iterator[Record]:
    while True:
        klen = _int(data, pos, "a key length", where)
        pos += 4
        if klen == -1:
            break
        if klen < 0:
            raise CorruptInput(f"changelog has a bad key length {klen} at byte {pos - 4}", where)
        key = _bytes(data, pos, klen, "key", where)
        pos += klen
        vlen = _int(data, pos, "a value length", where)
        pos += 4
        if vlen == -1:
            yield Record(DELETE, key, None)
            continue
        if vlen < 0:
            raise CorruptInput(f"changelog has a bad value length {vlen} at byte {pos - 4}", where)
        yield Record(PUT, key, _bytes(data, pos, vlen, "value", where))
        pos += vlen
    if pos != len(data):
        raise CorruptInput(f"changelog has {len(data) - pos} unexpected bytes after its end marker", where)


def _v2_records(data: bytes, pos: int, where: str) -> Iterator[Record]:
    while True:
        if pos >= len(data):
            raise CorruptInput(f"changelog ends without its end record (truncated at byte {pos})", where)
        code = data[pos]
        pos += 1
        if code == _V2_END:
            break
        kind = _V2_TYPES.get(code)
        if kind is None:
            raise CorruptInput(f"changelog has an unknown record type 0x{code:02x} at byte {pos - 1}", where)
        klen = _int(data, pos, "a key length", where)
        pos += 4
        key = _bytes(data, pos, klen, "key", where)
        pos += klen
        vlen = _int(data, pos, "a value length", where)
        pos += 4
        if kind == DELETE:
            if vlen != -1:
                raise CorruptInput(f"changelog delete record at byte {pos - 9 - klen} has value length {vlen}, not -1", where)
            yield Record(DELETE, key, None)
            continue
        yield Record(kind, key, _bytes(data, pos, vlen, "value", where))
        pos += vlen
    if pos != len(data):
        raise CorruptInput(f"changelog has {len(data) - pos} unexpected bytes after its end record", where)


def render_changelog(records: Iterable[Record], version: int = 1, lineage: list[tuple[int, str]] | None = None) -> bytes:
    """The decompressed bytes of a changelog (the reverse of :func:`parse_changelog`); version 3
    takes the ``lineage`` for its header."""
    parts: list[bytes] = []
    if version == 2:
        parts.append(b"\x00\x02v2")
    elif version == 3:
        from ..checkpoint.uids import render_lineage

        text = render_lineage(lineage or []).encode("utf-8")
        parts.append(b"\x00\x02v3" + struct.pack(">H", len(text)) + text)
    elif version != 1:
        raise Unsupported(f"changelog format v{version} cannot be written (known: v1, v2, v3)")
    for r in records:
        if version in (1, 3) and r.kind == MERGE:
            raise Unsupported("changelog format v1 has no merge records")
        if version == 2:
            parts.append(bytes([_V2_BYTES[r.kind]]))
        parts.append(_INT.pack(len(r.key)) + r.key)
        parts.append(_INT.pack(-1) if r.value is None else _INT.pack(len(r.value)) + r.value)
    parts.append(b"\x00" if version == 2 else _INT.pack(-1))
    return b"".join(parts)


# ------------------------------------------------------------------------ which files
def replay_plan(version: int, zips: Iterable[int], changelogs: Iterable[int], where: str) -> tuple[int | None, list[int]]:
    """(snapshot version to start from, or None for the empty store; changelog versions to apply)."""
    have = set(changelogs)
    base = max((z for z in zips if z <= version), default=None)
    start = base if base is not None else 0
    missing = [v for v in range(start + 1, version + 1) if v not in have]
    if missing:
        after = f"snapshot {base}.zip" if base is not None else "the start (no snapshot zip at or before it)"
        raise CorruptInput(
            f"cannot rebuild version {version}: {missing[0]}.changelog is missing (gap in the changelog chain after {after})",
            where,
        )
    return base, list(range(start + 1, version + 1))


# ------------------------------------------------------------------------ applying records
class ChangelogReplay:
    """Applies changelog records to an open ``rocksdict.Rdict`` (raw mode), one file at a time.

    Records of one file are resolved in memory first (the last record of a key wins; a merge
    extends the value it finds, in the file or in the database), then written as one batch.
    """

    def __init__(self, db, delimiter: bytes) -> None:  # db: rocksdict.Rdict
        self.db = db
        self.delimiter = delimiter

    def apply(self, records: Iterable[Record]) -> int:
        from rocksdict import WriteBatch

        pending: dict[bytes, bytes | None] = {}
        count = 0
        for r in records:
            count += 1
            if r.kind == MERGE:
                assert r.value is not None
                current = pending[r.key] if r.key in pending else self.db.get(r.key)
                pending[r.key] = r.value if current is None else current + self.delimiter + r.value
            else:
                pending[r.key] = r.value
        batch = WriteBatch(raw_mode=True)
        for key, value in pending.items():
            if value is None:
                batch.delete(key)
            else:
                batch.put(key, value)
        self.db.write(batch)
        return count
