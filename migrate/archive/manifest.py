"""The archive manifest: a frozen model of ``manifest.json`` and its JSON form, sealed by a hash.

``manifest.json`` sits at the archive root and is written last (it is the archive's commit point:
a directory without it is not an archive). It says where the state came from (source URL with
credentials removed, query id, batch id, state version, provider, codec), keeps the offsets and
commits entries the archive restores, describes each operator and store (metadata, key and value
schemas, the Parquet column of every schema field and whether it was decoded), and lists every
file of the archive with its size and SHA-256; data files also carry their row count and state
digest (``migrate.digest``).

Sealing: ``manifest_sha256`` is the SHA-256 of the canonical JSON of every other member
(``json.dumps(sort_keys=True, separators=(",", ":"), ensure_ascii=False)``, UTF-8). An edited
manifest no longer matches its own seal and is refused. This catches accidental edits and
corruption; it is not a signature (anyone can recompute it).

Pure functions: dict/str in, model out, and the reverse. No I/O.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from typing import Any

from ..digest import Digest
from ..errors import CorruptInput, Unsupported

FORMAT_NAME = "stateshift-state-archive"
FORMAT_VERSION = 1
MANIFEST_NAME = "manifest.json"
CHECKPOINT_DIR = "checkpoint"  # the checkpoint's own metadata files, verbatim
DATA_DIR = "state"  # state/operator=<id>/store=<name>/partition=<n>/part-0.parquet
SEAL_KEY = "manifest_sha256"


@dataclass(frozen=True)
class ArchivedFile:
    """A file of the archive that is not a data file (a verbatim checkpoint metadata file)."""

    path: str  # relative to the archive root, "/"-separated
    bytes: int
    sha256: str

    def to_json(self) -> dict[str, Any]:
        return {"path": self.path, "bytes": self.bytes, "sha256": self.sha256}


@dataclass(frozen=True)
class DataFile:
    """One Parquet file: all rows of one store partition at the archived state version."""

    path: str
    operator: int
    store: str
    partition: int
    rows: int
    bytes: int
    sha256: str
    digest: Digest
    key_bytes: int = 0
    value_bytes: int = 0
    undecoded_rows: int = 0

    def to_json(self) -> dict[str, Any]:
        return {
            "path": self.path,
            "operator": self.operator,
            "store": self.store,
            "partition": self.partition,
            "rows": self.rows,
            "bytes": self.bytes,
            "sha256": self.sha256,
            "state_digest": self.digest.to_json(),
            "key_bytes": self.key_bytes,
            "value_bytes": self.value_bytes,
            "undecoded_rows": self.undecoded_rows,
        }


@dataclass(frozen=True)
class Column:
    """Where one field of the key or value schema went in the Parquet files."""

    side: str  # "key" or "value"
    field: str  # the schema field name
    spark_type: str  # the type the column is decoded as, a simple string (the schema's, see archive.columns)
    column: str | None  # the Parquet column, None when the field is not in the files
    decoded: bool

    def to_json(self) -> dict[str, Any]:
        return {"side": self.side, "field": self.field, "type": self.spark_type, "column": self.column, "decoded": self.decoded}


@dataclass(frozen=True)
class StoreEntry:
    name: str
    num_cols_prefix_key: int = 0
    schema_file: str | None = None  # archive path of the schema file the columns come from
    key_schema: Any = None  # the engine's schema JSON, or None when no schema file was found
    value_schema: Any = None
    columns: tuple[Column, ...] = ()
    decoded: bool = False
    note: str | None = None

    def to_json(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "num_cols_prefix_key": self.num_cols_prefix_key,
            "schema_file": self.schema_file,
            "key_schema": self.key_schema,
            "value_schema": self.value_schema,
            "decoded": self.decoded,
            "note": self.note,
            "columns": [c.to_json() for c in self.columns],
        }


@dataclass(frozen=True)
class OperatorEntry:
    operator: int
    name: str | None
    metadata: dict[str, Any] | None = field(default=None, compare=False)
    stores: tuple[StoreEntry, ...] = ()

    def store(self, name: str) -> StoreEntry:
        for s in self.stores:
            if s.name == name:
                return s
        return StoreEntry(name)

    def to_json(self) -> dict[str, Any]:
        return {"operator": self.operator, "name": self.name, "metadata": self.metadata, "stores": [s.to_json() for s in self.stores]}


@dataclass(frozen=True)
class Manifest:
    tool_version: str
    created_utc: str
    source: str
    query_id: str
    batch_id: int
    state_version: int
    provider_class: str
    codec: str
    partitions: int | None
    offsets: tuple[dict[str, Any], ...]  # {"batch", "log_version", "metadata", "sources"}
    commits: tuple[dict[str, Any], ...]  # {"batch", "log_version", "metadata"}
    uncommitted: tuple[int, ...]
    operators: tuple[OperatorEntry, ...]
    checkpoint_files: tuple[ArchivedFile, ...]
    data_files: tuple[DataFile, ...]
    notes: tuple[str, ...] = ()
    format_version: int = FORMAT_VERSION
    #: the engine that wrote the source last (``checkpoint.engine.EngineInference.to_json()``);
    #: None in archives written before stateshift recorded it (import infers it from the logs)
    engine: dict[str, Any] | None = None
    #: state checkpoint format of the source (2: unique ids, see checkpoint/uids.py); import keeps it for RocksDB
    checkpoint_format: int = 1

    @property
    def rows(self) -> int:
        return sum(d.rows for d in self.data_files)

    def operator(self, operator_id: int) -> OperatorEntry:
        for op in self.operators:
            if op.operator == operator_id:
                return op
        return OperatorEntry(operator_id, None)

    def all_paths(self) -> list[str]:
        return [f.path for f in self.checkpoint_files] + [d.path for d in self.data_files]

    def body(self) -> dict[str, Any]:
        return {
            "format": FORMAT_NAME,
            "format_version": self.format_version,
            "tool_version": self.tool_version,
            "created_utc": self.created_utc,
            "source": self.source,
            "query_id": self.query_id,
            "batch_id": self.batch_id,
            "state_version": self.state_version,
            "provider_class": self.provider_class,
            "codec": self.codec,
            **({"engine": self.engine} if self.engine is not None else {}),
            "partitions": self.partitions,
            "rows": self.rows,
            "uncommitted_batches": list(self.uncommitted),
            "notes": list(self.notes),
            "checkpoint_format": self.checkpoint_format,
            "how_to_query": {
                "layout": f"{DATA_DIR}/operator=<id>/store=<name>/partition=<n>/part-0.parquet",
                "raw_columns": "key and value: the engine's row bytes exactly as read (restore uses only these)",
                "typed_columns": "key_<field> and value_<field>, see operators[].stores[].columns",
                "duckdb": f"SELECT * FROM read_parquet('{DATA_DIR}/operator=0/*/*/*.parquet', hive_partitioning = true)",
            },
            "offsets": list(self.offsets),
            "commits": list(self.commits),
            "operators": [op.to_json() for op in self.operators],
            "checkpoint_files": [f.to_json() for f in self.checkpoint_files],
            "data_files": [d.to_json() for d in self.data_files],
        }


def _canonical(body: dict[str, Any]) -> bytes:
    return json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


def seal(body: dict[str, Any]) -> str:
    """The SHA-256 over the canonical JSON of ``body`` (without the seal itself)."""
    return hashlib.sha256(_canonical({k: v for k, v in body.items() if k != SEAL_KEY})).hexdigest()


def manifest_text(manifest: Manifest) -> str:
    """The human-readable, sealed ``manifest.json`` content."""
    body = manifest.body()
    body[SEAL_KEY] = seal(body)
    return json.dumps(body, indent=2, ensure_ascii=False) + "\n"


# ------------------------------------------------------------------------------------ parsing


class _Fields:
    """Typed access to one JSON object of the manifest, with one-line errors naming the member."""

    def __init__(self, obj: Any, what: str, where: str) -> None:
        if not isinstance(obj, dict):
            raise CorruptInput(f"{what} is not a JSON object", where)
        self.obj, self.what, self.where = obj, what, where

    def get(self, key: str, kinds: tuple[type, ...], optional: bool = False) -> Any:
        if key not in self.obj:
            if optional:
                return None
            raise CorruptInput(f"{self.what} has no '{key}'", self.where)
        value = self.obj[key]
        if value is None and optional:
            return None
        if not isinstance(value, kinds) or (isinstance(value, bool) and bool not in kinds):
            raise CorruptInput(f"{self.what} member '{key}' has the wrong type ({type(value).__name__})", self.where)
        return value


def _rel_path(value: str, what: str, where: str) -> str:
    parts = value.split("/")
    if not value or value.startswith("/") or "\\" in value or any(p in ("", ".", "..") for p in parts):
        raise CorruptInput(f"{what} has an unsafe path {value!r}", where)
    return value


def _sha(value: str, what: str, where: str) -> str:
    if len(value) != 64 or any(c not in "0123456789abcdef" for c in value):
        raise CorruptInput(f"{what} has a malformed sha256 {value[:80]!r}", where)
    return value


def _archived_file(obj: Any, i: int, where: str) -> ArchivedFile:
    f = _Fields(obj, f"checkpoint_files[{i}]", where)
    path = _rel_path(f.get("path", (str,)), f"checkpoint_files[{i}]", where)
    if not path.startswith(CHECKPOINT_DIR + "/"):
        raise CorruptInput(f"checkpoint_files[{i}] path {path!r} is outside {CHECKPOINT_DIR}/", where)
    return ArchivedFile(path, int(f.get("bytes", (int,))), _sha(f.get("sha256", (str,)), path, where))


def _data_file(obj: Any, i: int, where: str) -> DataFile:
    what = f"data_files[{i}]"
    f = _Fields(obj, what, where)
    path = _rel_path(f.get("path", (str,)), what, where)
    if not path.startswith(DATA_DIR + "/"):
        raise CorruptInput(f"{what} path {path!r} is outside {DATA_DIR}/", where)
    d = _Fields(f.get("state_digest", (dict,)), f"{what} state_digest", where)
    hexdigest = d.get("hash", (str,))
    if len(hexdigest) != 32 or any(c not in "0123456789abcdef" for c in hexdigest):
        raise CorruptInput(f"{what} state_digest hash {hexdigest[:40]!r} is malformed", where)
    digest = Digest.from_json({"rows": d.get("rows", (int,)), "hash": hexdigest})
    rows = int(f.get("rows", (int,)))
    if digest.rows != rows:
        raise CorruptInput(f"{what} says {rows} rows but its state digest counts {digest.rows}", where)
    return DataFile(
        path=path,
        operator=int(f.get("operator", (int,))),
        store=str(f.get("store", (str,))),
        partition=int(f.get("partition", (int,))),
        rows=rows,
        bytes=int(f.get("bytes", (int,))),
        sha256=_sha(f.get("sha256", (str,)), path, where),
        digest=digest,
        key_bytes=int(f.get("key_bytes", (int,), optional=True) or 0),
        value_bytes=int(f.get("value_bytes", (int,), optional=True) or 0),
        undecoded_rows=int(f.get("undecoded_rows", (int,), optional=True) or 0),
    )


def _column(obj: Any, what: str, where: str) -> Column:
    f = _Fields(obj, what, where)
    return Column(
        side=f.get("side", (str,)),
        field=f.get("field", (str,)),
        spark_type=f.get("type", (str,)),
        column=f.get("column", (str,), optional=True),
        decoded=bool(f.get("decoded", (bool,))),
    )


def _store(obj: Any, what: str, where: str) -> StoreEntry:
    f = _Fields(obj, what, where)
    return StoreEntry(
        name=f.get("name", (str,)),
        num_cols_prefix_key=int(f.get("num_cols_prefix_key", (int,), optional=True) or 0),
        schema_file=f.get("schema_file", (str,), optional=True),
        key_schema=f.obj.get("key_schema"),
        value_schema=f.obj.get("value_schema"),
        columns=tuple(_column(c, f"{what} column {j}", where) for j, c in enumerate(f.get("columns", (list,)))),
        decoded=bool(f.get("decoded", (bool,))),
        note=f.get("note", (str,), optional=True),
    )


def _operator(obj: Any, i: int, where: str) -> OperatorEntry:
    what = f"operators[{i}]"
    f = _Fields(obj, what, where)
    stores = tuple(_store(s, f"{what} store {j}", where) for j, s in enumerate(f.get("stores", (list,))))
    return OperatorEntry(int(f.get("operator", (int,))), f.get("name", (str,), optional=True), f.get("metadata", (dict,), optional=True), stores)


def _log_entries(values: list[Any], what: str, where: str) -> tuple[dict[str, Any], ...]:
    out = []
    for i, v in enumerate(values):
        f = _Fields(v, f"{what}[{i}]", where)
        f.get("batch", (int,))
        f.get("metadata", (dict,))
        out.append(dict(v))
    return tuple(out)


def parse_manifest(text: str, where: str) -> Manifest:
    """Parse and check a ``manifest.json``; any edit, truncation or unknown format is refused."""
    try:
        body = json.loads(text)
    except json.JSONDecodeError as exc:
        raise CorruptInput(f"manifest is not valid JSON ({exc.msg} at line {exc.lineno} column {exc.colno}); "
                           "the archive is damaged or was edited", where) from exc
    f = _Fields(body, "manifest", where)
    if body.get("format") != FORMAT_NAME:
        raise CorruptInput(f"not a stateshift archive manifest (format is {str(body.get('format'))[:40]!r})", where)
    stored_seal = f.get(SEAL_KEY, (str,))
    if stored_seal != seal(body):
        raise CorruptInput("manifest was edited or damaged: its content no longer matches its own manifest_sha256", where)
    version = f.get("format_version", (int,))
    if version > FORMAT_VERSION:
        raise Unsupported(f"archive format version {version} is newer than this stateshift understands "
                          f"({FORMAT_VERSION}); upgrade stateshift", where)
    return Manifest(
        format_version=version,
        tool_version=f.get("tool_version", (str,)),
        created_utc=f.get("created_utc", (str,)),
        source=f.get("source", (str,)),
        query_id=f.get("query_id", (str,)),
        batch_id=f.get("batch_id", (int,)),
        state_version=f.get("state_version", (int,)),
        provider_class=f.get("provider_class", (str,)),
        codec=f.get("codec", (str,)),
        partitions=f.get("partitions", (int,), optional=True),
        offsets=_log_entries(f.get("offsets", (list,)), "offsets", where),
        commits=_log_entries(f.get("commits", (list,)), "commits", where),
        uncommitted=tuple(int(b) for b in f.get("uncommitted_batches", (list,))),
        operators=tuple(_operator(o, i, where) for i, o in enumerate(f.get("operators", (list,)))),
        checkpoint_files=tuple(_archived_file(o, i, where) for i, o in enumerate(f.get("checkpoint_files", (list,)))),
        data_files=tuple(_data_file(o, i, where) for i, o in enumerate(f.get("data_files", (list,)))),
        notes=tuple(str(n) for n in f.get("notes", (list,))),
        engine=f.get("engine", (dict,), optional=True),
        checkpoint_format=int(f.get("checkpoint_format", (int,), optional=True) or 1),  # absent in older archives
    )
