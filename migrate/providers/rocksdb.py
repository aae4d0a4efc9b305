"""The RocksDB provider layout: ``<v>.zip`` (+ ``<v>.changelog``) plus shared ``SSTs/`` per store partition.

Observed on Spark 4.3.0 (bundled RocksDB 9.8.4), per store partition directory::

    <v>.zip                  CURRENT, MANIFEST-*, OPTIONS-*, the (empty) WAL *.log and
                             ``metadata`` (see rocksdb_meta.py) - everything but the table files
    SSTs/<n>-<uuid>.sst      table files, shared between versions; ``metadata`` maps each local
                             name ``<n>.sst`` (the name the MANIFEST uses) to one of these
    .<name>.crc              Hadoop checksum sidecars (local file system only)
    <v>.changelog            only with changelog checkpointing: the changes of version v; a zip
                             exists only for some versions (see rocksdb_changelog.py)

Version V is ``V.zip`` when it exists, else the newest zip below it plus the changelogs up to V
(or the changelogs 1..V alone).

State checkpoint format 2 (see ``checkpoint/uids.py``): the files are ``<v>_<uid>.zip`` and
``<v>_<uid>.changelog``, and ``ReadContext.checkpoint_id`` (from the commit log) says which id
version V has. Version V is ``V_<uid>.zip`` when it exists, else the lineage in the header of
``V_<uid>.changelog`` says which files it builds on: the newest zip of the lineage plus the
lineage's changelogs after it. Files of other ids (retried or abandoned attempts) are ignored.
Visible ``<name>.crc`` JSON checksum files (CRC32C) are verified when present. Written with
``WriteContext.checkpoint_id``: ``V_<uid>.zip`` and its ``.crc`` JSON file.

An empty partition version is a zip whose ``metadata`` lists no SST files and ``numKeys`` 0.
What we write is always a full ``V.zip`` (the engine loads a zip for a version whatever its
changelog setting, and writes changelogs after it).

Rows (see rocksdb_keys.RowCodec): the RocksDB keys and values are the engine's row bytes with
ONE leading encoding-version byte, 0x00, on both key and value (observed; stripping it gives
byte-for-byte the rows the heap-map provider stores for the same query); stores with a prefix
key use a two-row key that is joined into the heap map's full key row; stores with column
families (transformWithState) travel as their RocksDB bytes, with the column-family table as a
store property. Avro encoding and row checksums are refused.
"""

from __future__ import annotations

import os
import re
import shutil
import time
import uuid
from collections.abc import Iterable, Iterator

import numpy as np
import pyarrow as pa

from .. import scratch
from ..checkpoint.uids import checksum_name, render_checksum_file, verify_checksum_file
from ..codecs import codec_of_stream
from ..codecs.hadoop_crc import (
    DEFAULT_BYTES_PER_CHECKSUM,
    HEADER,
    MAGIC,
    chunk_crcs,
    crc_name,
    make_crc,
    verify_crc,
)
from ..errors import CorruptInput, StateshiftError, Unsupported, library_failure, os_failure
from ..storage import Entry
from .base import (
    COLUMN_FAMILIES,
    KEY_SCHEMA,
    ROW_SCHEMA,
    Provider,
    ReadContext,
    StoreDir,
    WriteContext,
    WrittenFile,
)
from .facts import key_schema_property, parse_key_schema, read_key_schema
from .rocksdb_changelog import (
    ChangelogReplay,
    changelog_lineage,
    merge_delimiter,
    parse_changelog,
    replay_plan,
)
from .rocksdb_db import (  # noqa: F401  (FORMAT_VERSION_CONF and friends are part of this module's API)
    BLOCK_SIZE_CONF,
    COMPRESSION_CONF,
    FORMAT_VERSION_CONF,
    ScratchFolder,
    build_db,
    db_options,
    iterate,
    open_for_replay,
    set_merge_delimiter,
    sorted_runs,
)
from .rocksdb_keys import (  # noqa: F401  (the version-byte helpers are re-exported)
    ENCODING_VERSION,
    RowCodec,
    add_version_byte,
    family_ids,
    field_layouts,
    strip_version_byte,
)
from .rocksdb_meta import (
    METADATA_MEMBER,
    ColumnFamilies,
    SharedFile,
    VersionMetadata,
    column_families,
    parse_column_families,
    parse_metadata,
    render_metadata,
    unzip_members,
    zip_checkpoint,
)

ENCODING_CONF = "spark.sql.streaming.stateStore.encodingFormat"
ROW_CHECKSUM_CONF = "spark.sql.streaming.stateStore.rowChecksum.enabled"
TRACK_ROWS_CONF = "spark.sql.streaming.stateStore.rocksdb.trackTotalNumberOfRows"

SST_DIR = "SSTs"
LOG_DIR = "logs"
RUN_BYTES = 256 << 20  # rows buffered (key + value bytes) before a sorted run is written out
#: a partition of one sorted run whose rows take at least this many bytes (keys and values) has
#: its table file written in place in a local target (RocksDBProvider.write); smaller ones are
#: built in scratch and copied, as before: there RocksDB's device reads of a file it has just
#: dropped from the page cache cost more than the copy saves (measured, see write)
IN_PLACE_BYTES = 4 << 20

_ZIP = re.compile(r"^(\d+)\.zip$")
_ZIP_WITH_ID = re.compile(r"^(\d+)_([0-9A-Za-z-]+)\.zip$")
_CHANGELOG = re.compile(r"^(\d+)\.changelog$")
_CHANGELOG_WITH_ID = re.compile(r"^(\d+)_([0-9A-Za-z-]+)\.changelog$")


# ------------------------------------------------------------------------ conf checks
def check_supported(conf: dict[str, str], where: str) -> None:
    """Refuse the RocksDB encodings this version does not handle."""
    encoding = conf.get(ENCODING_CONF, "unsaferow").strip().lower()
    if encoding != "unsaferow":
        raise Unsupported(f"state encoding {ENCODING_CONF}={encoding} is not supported (only unsaferow)", where)
    if conf.get(ROW_CHECKSUM_CONF, "false").strip().lower() == "true":
        raise Unsupported(f"state rows with checksums ({ROW_CHECKSUM_CONF}=true) are not supported yet", where)


def _file_crc(path: str) -> bytes:
    """Hadoop sidecar of a local file, read in chunks (a whole number of checksum slices each)."""
    parts = [HEADER.pack(MAGIC, DEFAULT_BYTES_PER_CHECKSUM)]
    with open(path, "rb") as f:
        while chunk := f.read(DEFAULT_BYTES_PER_CHECKSUM * 16384):
            parts.append(chunk_crcs(chunk))
    return b"".join(parts)


def _engine_conf(ctx: WriteContext, families: ColumnFamilies | None, where: str) -> dict[str, str]:
    """The conf the table files are written with, for the target engine family.

    Engine 3.5 (RocksDB 8.3.2) refuses table format_version 6 (observed), which is rocksdict's own
    default, so the pinned value (default 5) must be at most 5; it wrote Snappy-compressed tables
    (observed), so that is the default compression for it. It has no column families."""
    if ctx.engine != "3.5":
        return ctx.conf
    if families is not None:
        raise Unsupported("a store with column families (transformWithState) cannot be written for engine 3.5", where)
    raw = ctx.conf.get(FORMAT_VERSION_CONF, "5").strip()
    if not raw.isdigit() or int(raw) > 5:
        raise Unsupported(f"{FORMAT_VERSION_CONF}={raw}: the RocksDB of engine 3.5 opens table format versions up to 5", where)
    return {COMPRESSION_CONF: "snappy", **ctx.conf}


def _prefix(store: StoreDir) -> str:
    return f"{store.rel.strip('/')}/" if store.rel.strip("/") else ""


def _codec_for_read(ctx: ReadContext, families: ColumnFamilies | None, store: StoreDir, version: int) -> RowCodec:
    if families is not None:
        return RowCodec(known_families=frozenset(families.mapping.values()))
    if ctx.num_cols_prefix_key > 0:
        layouts = field_layouts(read_key_schema(store, ctx, version), store.describe())
        return RowCodec(prefix_layouts=layouts, k=ctx.num_cols_prefix_key)
    return RowCodec()


# ------------------------------------------------------------------------ the provider
class RocksDBProvider(Provider):
    name = "rocksdb"
    class_names = ("org.apache.spark.sql.execution.streaming.state.RocksDBStateStoreProvider",)
    supports_column_families = True
    wants_key_order = True  # table files are written sorted (rocksdb_db.sorted_runs)

    def __init__(self, run_bytes: int = RUN_BYTES, in_place_bytes: int = IN_PLACE_BYTES) -> None:
        self.run_bytes = run_bytes
        self.in_place_bytes = in_place_bytes

    # ---------------------------------------------------------------- layout
    def versions(self, listing: dict[str, Entry]) -> list[int]:
        """Versions with a snapshot zip or a changelog (``<v>.zip``, ``<v>_<uid>.zip``, ...)."""
        with_ids = {v for v, _, _ in self.files_with_ids(listing)}
        return sorted(set(self.snapshot_versions(listing)) | set(self.changelog_versions(listing)) | with_ids)

    @staticmethod
    def files_with_ids(listing: dict[str, Entry]) -> list[tuple[int, str, str]]:
        """``(version, uid, name)`` of the zips and changelogs named with a unique id (format 2)."""
        out = []
        for name in listing:
            m = _ZIP_WITH_ID.match(name) or _CHANGELOG_WITH_ID.match(name)
            if m:
                out.append((int(m.group(1)), m.group(2), name))
        return sorted(out)

    def snapshot_versions(self, listing: dict[str, Entry]) -> list[int]:
        return sorted(int(m.group(1)) for name in listing if (m := _ZIP.match(name)))

    def changelog_versions(self, listing: dict[str, Entry]) -> list[int]:
        """Versions that have a ``<v>.changelog`` file (changelog checkpointing)."""
        return sorted(int(m.group(1)) for name in listing if (m := _CHANGELOG.match(name)))

    def _listing(self, store: StoreDir, ctx: ReadContext) -> dict[str, Entry]:
        return ctx.listing if ctx.listing is not None else store.location.list_dir(store.rel)

    def plan(
        self, store: StoreDir, version: int, listing: dict[str, Entry], ctx: ReadContext | None = None
    ) -> tuple[str | None, list[str]]:
        """(zip to restore or None for the empty store, changelog files to apply in order)."""
        if ctx is not None and ctx.checkpoint_id is not None:
            return self._plan_with_id(store, version, ctx.checkpoint_id, listing, ctx)
        try:
            return self._plan_plain(store, version, listing)
        except CorruptInput:
            named = [n for v, _, n in self.files_with_ids(listing) if v == version]
            if named:
                raise CorruptInput(
                    f"version {version} exists only as files with a unique id ({named[0]}: state checkpoint format 2), "
                    "and the commit log names no id for it",
                    store.describe(named[0]),
                ) from None
            raise

    def _plan_with_id(
        self, store: StoreDir, version: int, uid: str, listing: dict[str, Entry], ctx: ReadContext
    ) -> tuple[str | None, list[str]]:
        """Format 2: the files of version ``version`` with id ``uid`` and the lineage they build on."""
        ids = self.files_with_ids(listing)
        zips = {(v, u) for v, u, n in ids if n.endswith(".zip")}
        logs = {(v, u) for v, u, n in ids if n.endswith(".changelog")}
        if (version, uid) in zips:
            return f"{version}_{uid}.zip", []
        name = f"{version}_{uid}.changelog"
        if (version, uid) not in logs:
            others = [n for v, u, n in ids if v == version]
            hint = f"; this version has files of other attempts only: {', '.join(others[:2])}" if others else ""
            raise CorruptInput(
                f"the commit log names unique id {uid} for version {version}, but neither {version}_{uid}.zip "
                f"nor {name} exists{hint}",
                store.describe(name),
            )
        lineage = changelog_lineage(self._changelog_bytes(store, name, ctx), store.describe(name))
        if lineage is None:
            raise CorruptInput("changelog named with a unique id has no lineage header (v3)", store.describe(name))
        if lineage and lineage[-1][0] >= version:
            raise CorruptInput(f"lineage lists version {lineage[-1][0]}, not older than the file's own version {version}", store.describe(name))
        chain = dict(lineage + [(version, uid)])
        base = max((v for v, u in chain.items() if (v, u) in zips and v < version), default=None)
        start = base if base is not None else 0
        after = [v for v in sorted(chain) if v > start]
        if after != list(range(start + 1, version + 1)):
            missing = min(set(range(start + 1, version + 1)) - set(after))
            if base is None and min(chain) > 1:
                why = f"its lineage starts at version {min(chain)} and no zip of the lineage exists"
            else:
                why = f"its lineage skips version {missing}"
            raise CorruptInput(f"cannot rebuild version {version}: {why}", store.describe(name))
        for v in after:
            if (v, chain[v]) not in logs:
                raise CorruptInput(
                    f"{v}_{chain[v]}.changelog, named by the lineage of {name}, is missing",
                    store.describe(f"{v}_{chain[v]}.changelog"),
                )
        base_zip = f"{base}_{chain[base]}.zip" if base is not None else None
        return base_zip, [f"{v}_{chain[v]}.changelog" for v in after]

    def _plan_plain(self, store: StoreDir, version: int, listing: dict[str, Entry]) -> tuple[str | None, list[str]]:
        zips = self.snapshot_versions(listing)
        if version in zips:
            return f"{version}.zip", []
        changelogs = self.changelog_versions(listing)
        if version == 0:
            return None, []
        if not changelogs:
            raise CorruptInput(f"version {version} has no snapshot file {version}.zip", store.describe(f"{version}.zip"))
        base, chain = replay_plan(version, zips, changelogs, store.describe())
        return (f"{base}.zip" if base is not None else None), [f"{v}.changelog" for v in chain]

    def _metadata(self, store: StoreDir, zip_name: str, listing: dict[str, Entry]) -> tuple[dict[str, bytes], VersionMetadata]:
        where = store.describe(zip_name)
        raw = store.location.read_bytes(f"{_prefix(store)}{zip_name}")
        if crc_name(zip_name) in listing:
            verify_crc(raw, store.location.read_bytes(f"{_prefix(store)}{crc_name(zip_name)}"), where)
        if checksum_name(zip_name) in listing:
            verify_checksum_file(raw, store.location.read_bytes(f"{_prefix(store)}{checksum_name(zip_name)}"), where)
        members = unzip_members(raw, where)
        if METADATA_MEMBER not in members:
            raise CorruptInput("zip has no 'metadata' member", where)
        meta = parse_metadata(members.pop(METADATA_MEMBER), where)
        if "CURRENT" not in members:
            raise CorruptInput("zip has no CURRENT member", where)
        clash = sorted(set(members) & {f.local_name for f in meta.sst_files + meta.log_files})
        if clash:
            raise CorruptInput(f"zip member {clash[0]} is also listed as a shared file", where)
        return members, meta

    def _shared(self, store: StoreDir, folder: str, files: tuple[SharedFile, ...], where: str) -> list[WrittenFile]:
        """Check every shared file against one listing of ``folder``; return their paths and sizes."""
        if not files:
            return []
        listing = store.location.list_dir(f"{_prefix(store)}{folder}")
        out = []
        for f in files:
            entry = listing.get(f.dfs_name)
            if entry is None or entry.is_dir:
                raise CorruptInput(f"{folder}/{f.dfs_name} (for {f.local_name}) is missing", where)
            if entry.size != f.size:
                raise CorruptInput(
                    f"{folder}/{f.dfs_name} is {entry.size} bytes, the metadata records {f.size}",
                    store.describe(f"{folder}/{f.dfs_name}"),
                )
            out.append(WrittenFile(f"{_prefix(store)}{folder}/{f.dfs_name}", f.size))
        return out

    def source_files(self, store: StoreDir, version: int, ctx: ReadContext) -> list[WrittenFile]:
        listing = self._listing(store, ctx)
        zip_name, changelogs = self.plan(store, version, listing, ctx)
        out = [WrittenFile(f"{_prefix(store)}{name}", listing[name].size) for name in changelogs]
        if zip_name is None:
            return out
        where = store.describe(zip_name)
        _, meta = self._metadata(store, zip_name, listing)
        return (
            [WrittenFile(f"{_prefix(store)}{zip_name}", listing[zip_name].size)]
            + self._shared(store, SST_DIR, meta.sst_files, where)
            + self._shared(store, LOG_DIR, meta.log_files, where)
            + out
        )

    def store_properties(self, store: StoreDir, version: int, ctx: ReadContext) -> dict[str, str]:
        """The column-family table (stores with column families), or the key schema (prefix keys)."""
        listing = self._listing(store, ctx)
        zip_name, changelogs = self.plan(store, version, listing, ctx)
        table = None
        if zip_name is not None:
            table = column_families(self._metadata(store, zip_name, listing)[1], store.describe(zip_name))
        if table is not None:
            return {COLUMN_FAMILIES: table.to_json()}
        if changelogs:
            self._refuse_families_without_snapshot(store, changelogs[0], ctx)
        return key_schema_property(store, ctx, version)

    def _refuse_families_without_snapshot(self, store: StoreDir, name: str, ctx: ReadContext) -> None:
        data = self._changelog_bytes(store, name, ctx)
        if parse_changelog(data, store.describe(name))[0] >= 2:
            raise Unsupported(
                f"{name} holds column-family records (format v2) but no snapshot zip at or before this version records the "
                "column-family table, so the rows cannot be placed in their families",
                store.describe(name),
            )

    def _changelog_bytes(self, store: StoreDir, name: str, ctx: ReadContext) -> bytes:
        where = store.describe(name)
        listing = self._listing(store, ctx)
        raw = store.location.read_bytes(f"{_prefix(store)}{name}")
        if crc_name(name) in listing:
            verify_crc(raw, store.location.read_bytes(f"{_prefix(store)}{crc_name(name)}"), where)
        if checksum_name(name) in listing:
            verify_checksum_file(raw, store.location.read_bytes(f"{_prefix(store)}{checksum_name(name)}"), where)
        # older versions may use another codec; bytes, for the records' keys are hashed
        return bytes(codec_of_stream(raw, ctx.codec, where).decompress(raw, where))

    # ---------------------------------------------------------------- reading
    def read(self, store: StoreDir, version: int, ctx: ReadContext) -> Iterator[pa.RecordBatch]:
        check_supported(ctx.conf, store.describe())
        listing = self._listing(store, ctx)
        zip_name, changelogs = self.plan(store, version, listing, ctx)
        if zip_name is None and not changelogs:
            return
        where = store.describe(zip_name or changelogs[-1])
        zipped = self._metadata(store, zip_name, listing) if zip_name else None
        # scratch holds the version's table files, plus what the changelogs replay into
        # (a decompressed changelog is written twice: write-ahead log and flushed table)
        # a version read as it is (no changelog to replay) links its table files where it can
        link = not changelogs and store.location.is_local
        need = sum(f.size for f in (() if link else zipped[1].sst_files) + zipped[1].log_files) if zipped else 0
        need += sum(8 * listing[n].size for n in changelogs if n in listing)
        tmp = scratch.make("stateshift-rocksdb-r-", need)
        try:
            db_dir = os.path.join(tmp, "db")
            os.mkdir(db_dir)
            meta = self._restore(store, zip_name, zipped, db_dir, link) if zip_name and zipped else None
            families = column_families(meta, store.describe(zip_name or "")) if meta else None
            codec = _codec_for_read(ctx, families, store, version)
            delimiter = merge_delimiter(ctx.conf, where)
            set_merge_delimiter(db_dir, delimiter)
            if changelogs:
                self._replay(store, changelogs, families, codec, delimiter, db_dir, ctx)
                # opening for the replay wrote a new OPTIONS file that names the operator without
                # its delimiter (observed), and operands the changelogs did not touch remain
                set_merge_delimiter(db_dir, delimiter)
            rows = 0

            def stray(key: bytes, value: bytes) -> None:  # raises the error the row is
                codec.from_rocksdb(pa.array([key], pa.binary()), pa.array([value], pa.binary()), where)

            for keys, values in iterate(db_dir, where, codec.write_prefixes(), stray):
                k, v = codec.from_rocksdb_bare(keys, values, where)
                rows += len(k)
                yield pa.RecordBatch.from_arrays([k, v], schema=ROW_SCHEMA)
            expected = meta.num_keys + meta.num_internal_keys if meta else None
            tracked = ctx.conf.get(TRACK_ROWS_CONF, "true").strip().lower() != "false"
            if expected is not None and not changelogs and tracked and rows != expected:
                internal = f" + numInternalKeys={meta.num_internal_keys}" if meta and meta.num_internal_keys else ""
                raise CorruptInput(f"RocksDB holds {rows} keys, the metadata records numKeys={meta.num_keys}{internal}", where)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)

    def _restore(
        self, store: StoreDir, zip_name: str, zipped: tuple[dict[str, bytes], VersionMetadata], db_dir: str,
        link: bool = False,
    ) -> VersionMetadata:
        """Extract a version zip (its members and metadata, from :meth:`_metadata`) and its shared
        files into ``db_dir``; return its metadata. With ``link``, each table file on local disk
        becomes a symbolic link to the checkpoint's file instead of a copy: only for a DB opened
        read-only (RocksDB never rewrites a table file; a read-only open deletes none either).
        Removing the scratch folder removes the links, never the files they point to."""
        where = store.describe(zip_name)
        members, meta = zipped
        ssts = self._shared(store, SST_DIR, meta.sst_files, where)
        logs = self._shared(store, LOG_DIR, meta.log_files, where)
        for name, data in members.items():
            path = os.path.join(db_dir, name)
            try:
                with open(path, "wb") as f:
                    f.write(data)
            except OSError as exc:
                raise os_failure(exc, "write this file", path) from exc
        linkable = [link] * len(ssts) + [False] * len(logs)  # write-ahead logs are always copied
        for shared, wf, linked in zip(meta.sst_files + meta.log_files, ssts + logs, linkable):
            local = os.path.join(db_dir, shared.local_name)
            if not (linked and store.location.link_file(wf.rel, local)):
                store.location.get_file(wf.rel, local)
            if os.path.getsize(local) != shared.size:
                raise CorruptInput(f"downloaded {os.path.getsize(local)} bytes, expected {shared.size}", store.location.describe(wf.rel))
        return meta

    def _replay(
        self, store: StoreDir, changelogs: list[str], families: ColumnFamilies | None, codec: RowCodec,
        delimiter: bytes, db_dir: str, ctx: ReadContext,
    ) -> None:
        """Apply the changelog files, in order, to the restored (or empty) RocksDB in ``db_dir``."""
        db = open_for_replay(db_dir, store.describe(changelogs[0]))
        chain = {int(m.group(1)): m.group(2) for n in changelogs if (m := _CHANGELOG_WITH_ID.match(n))}
        try:
            replay = ChangelogReplay(db, delimiter)
            for name in changelogs:
                where = store.describe(name)
                data = self._changelog_bytes(store, name, ctx)
                for v, u in changelog_lineage(data, where) or []:
                    if v in chain and chain[v] != u:
                        raise CorruptInput(f"lineage names {v}_{u} for version {v}, the chain being rebuilt has {v}_{chain[v]}", where)
                fmt, records = parse_changelog(data, where)
                if fmt >= 2 and families is None:
                    self._refuse_families_without_snapshot(store, name, ctx)
                if fmt == 1 and families is not None:
                    raise CorruptInput("a store with column families has a changelog without them (format v1)", where)
                if families is not None and records:
                    codec.check_families(pa.array([r.key for r in records], pa.binary()), where)
                replay.apply(records)
            db.flush()
        except Exception as exc:
            if isinstance(exc, StateshiftError):
                raise
            where = store.describe(changelogs[-1])
            raise library_failure(exc, "apply the changelogs", where) or CorruptInput(f"applying the changelogs failed: {exc}", where) from exc
        finally:
            db.close()

    # ---------------------------------------------------------------- writing
    @staticmethod
    def _write_checksum_file(store: StoreDir, name: str, data: bytes, write_crc: bool) -> list[WrittenFile]:
        rel = f"{_prefix(store)}{checksum_name(name)}"
        body = render_checksum_file(data, int(time.time() * 1000))
        store.location.remove(f"{_prefix(store)}{crc_name(checksum_name(name))}")
        store.location.write_bytes(rel, body)
        out = [WrittenFile(rel, len(body))]
        if write_crc:
            sidecar_rel = f"{_prefix(store)}{crc_name(checksum_name(name))}"
            sidecar = make_crc(body)
            store.location.write_bytes(sidecar_rel, sidecar)
            out.append(WrittenFile(sidecar_rel, len(sidecar)))
        return out

    def write(
        self, store: StoreDir, version: int, batches: Iterable[pa.RecordBatch], ctx: WriteContext
    ) -> list[WrittenFile]:
        zip_name = f"{version}_{ctx.checkpoint_id}.zip" if ctx.checkpoint_id else f"{version}.zip"
        where = store.describe(zip_name)
        check_supported(ctx.conf, where)
        families = parse_column_families(ctx.extra[COLUMN_FAMILIES], where) if ctx.extra.get(COLUMN_FAMILIES) else None
        if families is not None:
            codec = RowCodec(known_families=frozenset(families.mapping.values()))
        elif ctx.num_cols_prefix_key > 0:
            if not ctx.extra.get(KEY_SCHEMA):
                raise Unsupported(
                    f"writing a RocksDB store with a prefix key (numColsPrefixKey={ctx.num_cols_prefix_key}) needs its key "
                    "schema, and none was given",
                    where,
                )
            layouts = field_layouts(parse_key_schema(ctx.extra[KEY_SCHEMA], where), where)
            codec = RowCodec(prefix_layouts=layouts, k=ctx.num_cols_prefix_key)
        else:
            codec = RowCodec()
        internal_ids = np.array(sorted(families.internal_ids()), dtype=np.uint16) if families else None
        internal = [0]

        def count_internal(keys: pa.Array) -> None:
            if internal_ids is not None and internal_ids.size:
                internal[0] += int(np.isin(family_ids(keys, where), internal_ids).sum())

        options = db_options(_engine_conf(ctx, families, where), where)
        folder = ScratchFolder("stateshift-rocksdb-w-")
        # A partition of one sorted run of at least in_place_bytes has its table file written in
        # place in a local target, under a temporary name in its SSTs folder, and renamed once
        # the version is built; the scratch DB ingests it through a link (build_db). Otherwise
        # RocksDB writes it in scratch and it is copied: every byte written twice, once into
        # fresh tmpfs pages. RocksDB syncs the file it writes and then drops it from the page
        # cache (observed: fincore shows none of it resident after finish() on ext4, all of it on
        # tmpfs), so its ingest and the sidecar CRC read it back from the device: for a small
        # file those reads cost more than the copy saves. Measured, alternating pairs of whole
        # commands (medians; benchmarks/results/2026-12-04-ab-sst-in-place.md), every partition
        # in place: 10M keys over 64 partitions (about 14 MB of rows each), convert heap map ->
        # RocksDB 11.37 -> 10.96 and 11.29 -> 11.03 CPU s in two series (system time lower in
        # every pair), import to RocksDB 9.85 -> 9.67 CPU s; 1M keys over 64 partitions (1.4 MB
        # each) 2.05 -> 2.04 CPU s; over 256 (0.35 MB each) 3.34 -> 3.61 CPU s, 2.11 -> 2.27 s.
        # Hence the 4 MiB floor (with it, 3.55 -> 3.57 CPU s over 256: the old path).
        in_place: list[str] = []  # the table file written in the target under a temporary name

        def whole_run_path(need: int) -> str | None:
            if need < self.in_place_bytes:
                return None
            tmp = store.location.temp_in(f"{_prefix(store)}{SST_DIR}")
            if tmp is not None:
                in_place.append(tmp)
            return tmp

        try:
            encode = lambda b: codec.to_rocksdb_bare(b.column("key"), b.column("value"), where)
            runs, rows = sorted_runs(
                batches, encode, options, folder.path_for, self.run_bytes, where, count_internal, codec.write_prefixes(),
                whole_run_path,
            )
            tmp = folder.path_for(0, True)
            checkpoint = build_db(runs, rows, options, tmp, where)
            written: list[WrittenFile] = []
            sst_files = []
            for local in sorted(n for n in os.listdir(checkpoint) if n.endswith(".sst")):
                path = os.path.join(checkpoint, local)
                dfs = f"{local[: -len('.sst')]}-{uuid.uuid4()}.sst"
                rel = f"{_prefix(store)}{SST_DIR}/{dfs}"
                if in_place and os.path.islink(path) and os.readlink(path) == in_place[0]:
                    # the run written in place: synced (RocksDB's finish synced it already: an
                    # fdatasync, observed with strace) and renamed, not copied
                    size = os.path.getsize(in_place[0])
                    store.location.commit_temp(in_place.pop(), rel)
                    path = store.location.path(rel)
                else:
                    store.location.put_file(path, rel)
                    size = os.path.getsize(path)
                written.append(WrittenFile(rel, size))
                if ctx.write_crc:
                    sidecar = _file_crc(path)
                    store.location.write_bytes(f"{_prefix(store)}{SST_DIR}/{crc_name(dfs)}", sidecar)
                    written.append(WrittenFile(f"{_prefix(store)}{SST_DIR}/{crc_name(dfs)}", len(sidecar)))
                sst_files.append(SharedFile(local, dfs, size))
            meta = VersionMetadata(
                sst_files=tuple(sst_files),
                num_keys=rows - internal[0],
                num_internal_keys=internal[0],
                column_family_mapping=dict(families.mapping) if families else {},
                column_family_type_map=dict(families.internal) if families else {},
                max_column_family_id=families.max_id if families else 0,
            )
            data = zip_checkpoint(checkpoint, render_metadata(meta, ctx.engine), where)
            crc_rel = f"{_prefix(store)}{crc_name(zip_name)}"
            store.location.remove(crc_rel)  # never leave a stale sidecar beside a rewritten zip
            store.location.write_bytes(f"{_prefix(store)}{zip_name}", data)  # the zip last: it commits the version
            written.append(WrittenFile(f"{_prefix(store)}{zip_name}", len(data)))
            if ctx.write_crc:
                sidecar = make_crc(data)
                store.location.write_bytes(crc_rel, sidecar)
                written.append(WrittenFile(crc_rel, len(sidecar)))
            if ctx.checkpoint_id:  # format 2: the visible JSON checksum file beside the zip (observed)
                written += self._write_checksum_file(store, zip_name, data, ctx.write_crc)
            return written
        finally:
            folder.remove()
            for leftover in in_place:  # a write that failed before its table file was renamed
                try:
                    os.remove(leftover)
                except FileNotFoundError:
                    pass
