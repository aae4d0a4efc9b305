"""The RocksDB provider layout: ``<v>.zip`` plus shared ``SSTs/`` per store partition.

Observed on Spark 4.3.0 (bundled RocksDB 9.8.4), per store partition directory::

    <v>.zip                  CURRENT, MANIFEST-*, OPTIONS-*, the (empty) WAL *.log and
                             ``metadata`` (see rocksdb_meta.py) - everything but the table files
    SSTs/<n>-<uuid>.sst      table files, shared between versions; ``metadata`` maps each local
                             name ``<n>.sst`` (the name the MANIFEST uses) to one of these
    .<name>.crc              Hadoop checksum sidecars (local file system only)
    <v>.changelog            only with changelog checkpointing: per-version change records, with
                             a zip only every few versions (not supported yet: refused by name)

An empty partition version is a zip whose ``metadata`` lists no SST files and ``numKeys`` 0.

Rows: the RocksDB keys and values are the engine's row bytes with ONE leading encoding-version
byte, 0x00, on both key and value (observed; stripping it gives byte-for-byte the rows the
heap-map provider stores for the same query - checked on a 700-key aggregation). The canonical
batches carry the rows without that byte. Stores with a prefix key (``numColsPrefixKey > 0``),
column families, Avro encoding or row checksums use other encodings and are refused.

The RocksDB work itself (reading tables, sorting, writing SST files, the MANIFEST) is done by
the ``rocksdict`` binding, whose bundled RocksDB (9.8.4 in rocksdict 0.3.29) is the engine's.
"""

from __future__ import annotations

import os
import re
import shutil
import tempfile
import uuid
from collections.abc import Iterable, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..codecs.hadoop_crc import (
    DEFAULT_BYTES_PER_CHECKSUM,
    HEADER,
    MAGIC,
    chunk_crcs,
    crc_name,
    make_crc,
    verify_crc,
)
from ..errors import CorruptInput, Unsupported
from ..storage import Entry
from .base import (
    BATCH_ROWS,
    ROW_SCHEMA,
    Provider,
    ReadContext,
    StoreDir,
    WriteContext,
    WrittenFile,
)
from .rocksdb_meta import (
    METADATA_MEMBER,
    SharedFile,
    VersionMetadata,
    parse_metadata,
    render_metadata,
    unzip_members,
    zip_checkpoint,
)

FORMAT_VERSION_CONF = "spark.sql.streaming.stateStore.rocksdb.formatVersion"
COMPRESSION_CONF = "spark.sql.streaming.stateStore.rocksdb.compression"
BLOCK_SIZE_CONF = "spark.sql.streaming.stateStore.rocksdb.blockSizeKB"
ENCODING_CONF = "spark.sql.streaming.stateStore.encodingFormat"
ROW_CHECKSUM_CONF = "spark.sql.streaming.stateStore.rowChecksum.enabled"
TRACK_ROWS_CONF = "spark.sql.streaming.stateStore.rocksdb.trackTotalNumberOfRows"

ENCODING_VERSION = 0  # the one leading byte of every key and value
SST_DIR = "SSTs"
LOG_DIR = "logs"
RUN_BYTES = 256 << 20  # rows buffered (key + value bytes) before a sorted run is written out

_ZIP = re.compile(r"^(\d+)\.zip$")
_ZIP_WITH_ID = re.compile(r"^(\d+)_([0-9A-Za-z-]+)\.zip$")
_CHANGELOG = re.compile(r"^(\d+)(?:_([0-9A-Za-z-]+))?\.changelog$")
_COMPRESSIONS = {"none": "none", "no": "none", "snappy": "snappy", "zlib": "zlib", "bzip2": "bz2",
                 "lz4": "lz4", "lz4hc": "lz4hc", "zstd": "zstd"}  # fmt: skip


# ------------------------------------------------------------------------ row bytes (vectorised)
_PREFIX = pa.scalar(bytes([ENCODING_VERSION]), pa.binary())
_NO_SEPARATOR = pa.scalar(b"", pa.binary())


def _as_binary(arr: pa.Array) -> pa.Array:
    if pa.types.is_binary(arr.type):
        return arr
    if pa.types.is_large_binary(arr.type):
        return arr.cast(pa.binary())
    raise TypeError(f"expected a binary array, got {arr.type}")


def strip_version_byte(arr: pa.Array, where: str) -> pa.Array:
    """Drop the leading encoding-version byte of every element (it must be 0x00)."""
    arr = _as_binary(arr)
    if len(arr) == 0:
        return arr
    lengths = pc.binary_length(arr)
    if pc.min(lengths).as_py() < 1:
        raise CorruptInput("a RocksDB key or value is empty (no encoding-version byte)", where)
    _, off_buf, data_buf = arr.buffers()
    offs = np.frombuffer(off_buf, dtype=np.int32, count=len(arr), offset=arr.offset * 4)
    firsts = np.frombuffer(data_buf, dtype=np.uint8)[offs]
    bad = np.flatnonzero(firsts != ENCODING_VERSION)
    if bad.size:
        raise Unsupported(
            f"a RocksDB key or value starts with encoding-version byte {int(firsts[bad[0]])}; only "
            f"{ENCODING_VERSION} (the plain row encoding) is supported",
            where,
        )
    # an explicit stop: the kernel's open-ended default fails on some pyarrow versions (seen on 26)
    return pc.binary_slice(arr, 1, pc.max(lengths).as_py() + 1)


def add_version_byte(arr: pa.Array) -> pa.Array:
    """Prefix every element with the encoding-version byte 0x00."""
    return pc.binary_join_element_wise(_PREFIX, _as_binary(arr), _NO_SEPARATOR)


# ------------------------------------------------------------------------ conf checks
def check_supported(conf: dict[str, str], num_cols_prefix_key: int, where: str) -> None:
    """Refuse the RocksDB encodings this version does not handle."""
    if num_cols_prefix_key > 0:
        raise Unsupported(
            f"RocksDB stores with a prefix key (numColsPrefixKey={num_cols_prefix_key}, e.g. session windows) "
            "are not supported yet",
            where,
        )
    encoding = conf.get(ENCODING_CONF, "unsaferow").strip().lower()
    if encoding != "unsaferow":
        raise Unsupported(f"state encoding {ENCODING_CONF}={encoding} is not supported (only unsaferow)", where)
    if conf.get(ROW_CHECKSUM_CONF, "false").strip().lower() == "true":
        raise Unsupported(f"state rows with checksums ({ROW_CHECKSUM_CONF}=true) are not supported yet", where)


def _format_version(conf: dict[str, str], where: str) -> int:
    raw = conf.get(FORMAT_VERSION_CONF, "5")
    try:
        value = int(raw)
    except ValueError:
        raise Unsupported(f"{FORMAT_VERSION_CONF}={raw!r} is not an integer", where) from None
    if not 2 <= value <= 6:  # table format versions RocksDB 9.8 writes (common practice: 5 is the default)
        raise Unsupported(f"{FORMAT_VERSION_CONF}={value} is not a table format version RocksDB 9.8 writes (2..6)", where)
    return value


def _db_options(conf: dict[str, str], where: str):  # -> rocksdict.Options
    """Options for the table files we write, matching the engine's OPTIONS file (observed)."""
    from rocksdict import BlockBasedOptions, ChecksumType, DBCompressionType, Options

    table = BlockBasedOptions()
    table.set_format_version(_format_version(conf, where))
    table.set_bloom_filter(10, False)  # engine: filter_policy=bloomfilter:10:false
    table.set_checksum_type(ChecksumType.xxh3())  # engine: checksum=kXXH3
    try:
        block_kb = int(conf.get(BLOCK_SIZE_CONF, "4"))
    except ValueError:
        raise Unsupported(f"{BLOCK_SIZE_CONF}={conf.get(BLOCK_SIZE_CONF)!r} is not an integer", where) from None
    table.set_block_size(block_kb * 1024)
    codec = conf.get(COMPRESSION_CONF, "lz4").strip().lower()
    if codec not in _COMPRESSIONS:
        raise Unsupported(f"{COMPRESSION_CONF}={codec!r} is not a known RocksDB compression", where)
    options = Options(raw_mode=True)
    options.create_if_missing(True)
    options.set_block_based_table_factory(table)
    options.set_compression_type(getattr(DBCompressionType, _COMPRESSIONS[codec])())
    return options


def _file_crc(path: str) -> bytes:
    """Hadoop sidecar of a local file, read in chunks (a whole number of checksum slices each)."""
    parts = [HEADER.pack(MAGIC, DEFAULT_BYTES_PER_CHECKSUM)]
    with open(path, "rb") as f:
        while chunk := f.read(DEFAULT_BYTES_PER_CHECKSUM * 16384):
            parts.append(chunk_crcs(chunk))
    return b"".join(parts)


# ------------------------------------------------------------------------ the provider
def _prefix(store: StoreDir) -> str:
    return f"{store.rel.strip('/')}/" if store.rel.strip("/") else ""


class RocksDBProvider(Provider):
    name = "rocksdb"
    class_names = ("org.apache.spark.sql.execution.streaming.state.RocksDBStateStoreProvider",)

    def __init__(self, run_bytes: int = RUN_BYTES) -> None:
        self.run_bytes = run_bytes

    # ---------------------------------------------------------------- layout
    def versions(self, listing: dict[str, Entry]) -> list[int]:
        """Versions with a ``<v>.zip`` snapshot (changelog-only versions: see changelog_versions)."""
        return sorted(int(m.group(1)) for name in listing if (m := _ZIP.match(name)))

    def changelog_versions(self, listing: dict[str, Entry]) -> list[int]:
        """Versions that have a ``<v>.changelog`` file (changelog checkpointing)."""
        return sorted({int(m.group(1)) for name in listing if (m := _CHANGELOG.match(name))})

    def _listing(self, store: StoreDir, ctx: ReadContext) -> dict[str, Entry]:
        return ctx.listing if ctx.listing is not None else store.location.list_dir(store.rel)

    def snapshot_name(self, store: StoreDir, version: int, listing: dict[str, Entry]) -> str | None:
        """The zip holding ``version``; None for version 0 with no files (the empty store)."""
        name = f"{version}.zip"
        if name in listing:
            return name
        for other in sorted(listing):
            m = _CHANGELOG.match(other)
            if m and int(m.group(1)) == version:
                raise Unsupported(
                    f"changelog checkpoints are not supported yet: version {version} is only in {other} "
                    "(no snapshot zip for it); an older zip would be stale state",
                    store.describe(other),
                )
            m = _ZIP_WITH_ID.match(other)
            if m and int(m.group(1)) == version:
                raise Unsupported(
                    f"state file {other} carries a unique id (newer checkpoint format); not supported yet",
                    store.describe(other),
                )
        if version == 0:
            return None
        raise CorruptInput(f"version {version} has no snapshot file {name}", store.describe(name))

    def _metadata(self, store: StoreDir, zip_name: str, listing: dict[str, Entry]) -> tuple[dict[str, bytes], VersionMetadata]:
        where = store.describe(zip_name)
        raw = store.location.read_bytes(f"{_prefix(store)}{zip_name}")
        if crc_name(zip_name) in listing:
            verify_crc(raw, store.location.read_bytes(f"{_prefix(store)}{crc_name(zip_name)}"), where)
        members = unzip_members(raw, where)
        if METADATA_MEMBER not in members:
            raise CorruptInput("zip has no 'metadata' member", where)
        meta = parse_metadata(members.pop(METADATA_MEMBER), where)
        if meta.column_family_mapping or meta.column_family_type_map or meta.max_column_family_id:
            raise Unsupported("RocksDB stores with column families are not supported yet", where)
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
        zip_name = self.snapshot_name(store, version, listing)
        if zip_name is None:
            return []
        where = store.describe(zip_name)
        _, meta = self._metadata(store, zip_name, listing)
        return (
            [WrittenFile(f"{_prefix(store)}{zip_name}", listing[zip_name].size)]
            + self._shared(store, SST_DIR, meta.sst_files, where)
            + self._shared(store, LOG_DIR, meta.log_files, where)
        )

    # ---------------------------------------------------------------- reading
    def read(self, store: StoreDir, version: int, ctx: ReadContext) -> Iterator[pa.RecordBatch]:
        check_supported(ctx.conf, ctx.num_cols_prefix_key, store.describe())
        listing = self._listing(store, ctx)
        zip_name = self.snapshot_name(store, version, listing)
        if zip_name is None:
            return
        where = store.describe(zip_name)
        members, meta = self._metadata(store, zip_name, listing)
        ssts = self._shared(store, SST_DIR, meta.sst_files, where)
        logs = self._shared(store, LOG_DIR, meta.log_files, where)
        tmp = tempfile.mkdtemp(prefix="stateshift-rocksdb-r-")
        try:
            for name, data in members.items():
                with open(os.path.join(tmp, name), "wb") as f:
                    f.write(data)
            for shared, wf in zip(meta.sst_files + meta.log_files, ssts + logs):
                local = os.path.join(tmp, shared.local_name)
                store.location.get_file(wf.rel, local)
                if os.path.getsize(local) != shared.size:
                    raise CorruptInput(f"downloaded {os.path.getsize(local)} bytes, expected {shared.size}", store.location.describe(wf.rel))
            rows = 0
            for batch in _iterate(tmp, where):
                rows += batch.num_rows
                yield batch
            if rows != meta.num_keys and ctx.conf.get(TRACK_ROWS_CONF, "true").strip().lower() != "false":
                raise CorruptInput(f"RocksDB holds {rows} keys, the metadata records numKeys={meta.num_keys}", where)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)

    # ---------------------------------------------------------------- writing
    def write(
        self, store: StoreDir, version: int, batches: Iterable[pa.RecordBatch], ctx: WriteContext
    ) -> list[WrittenFile]:
        zip_name = f"{version}.zip"
        where = store.describe(zip_name)
        check_supported(ctx.conf, ctx.num_cols_prefix_key, where)
        options = _db_options(ctx.conf, where)
        tmp = tempfile.mkdtemp(prefix="stateshift-rocksdb-w-")
        try:
            runs, rows = _sorted_runs(batches, options, tmp, self.run_bytes, where)
            checkpoint = _build_db(runs, rows, options, tmp, where)
            written: list[WrittenFile] = []
            sst_files = []
            for local in sorted(n for n in os.listdir(checkpoint) if n.endswith(".sst")):
                path = os.path.join(checkpoint, local)
                dfs = f"{local[: -len('.sst')]}-{uuid.uuid4()}.sst"
                rel = f"{_prefix(store)}{SST_DIR}/{dfs}"
                store.location.put_file(path, rel)
                size = os.path.getsize(path)
                written.append(WrittenFile(rel, size))
                if ctx.write_crc:
                    sidecar = _file_crc(path)
                    store.location.write_bytes(f"{_prefix(store)}{SST_DIR}/{crc_name(dfs)}", sidecar)
                    written.append(WrittenFile(f"{_prefix(store)}{SST_DIR}/{crc_name(dfs)}", len(sidecar)))
                sst_files.append(SharedFile(local, dfs, size))
            meta = VersionMetadata(sst_files=tuple(sst_files), num_keys=rows)
            data = zip_checkpoint(checkpoint, render_metadata(meta), where)
            crc_rel = f"{_prefix(store)}{crc_name(zip_name)}"
            store.location.remove(crc_rel)  # never leave a stale sidecar beside a rewritten zip
            store.location.write_bytes(f"{_prefix(store)}{zip_name}", data)  # the zip last: it commits the version
            written.append(WrittenFile(f"{_prefix(store)}{zip_name}", len(data)))
            if ctx.write_crc:
                sidecar = make_crc(data)
                store.location.write_bytes(crc_rel, sidecar)
                written.append(WrittenFile(crc_rel, len(sidecar)))
            return written
        finally:
            shutil.rmtree(tmp, ignore_errors=True)


# ------------------------------------------------------------------------ RocksDB (rocksdict)
def _iterate(db_dir: str, where: str) -> Iterator[pa.RecordBatch]:
    """Every row of the RocksDB in ``db_dir`` in key order, without the version byte.

    Uses the raw iterator and checks its status at the end: the ``items()`` view of rocksdict
    stops silently on a corrupt block (seen: a flipped block yields half the keys, no error).
    """
    from rocksdict import AccessType, Options, Rdict

    try:
        db = Rdict(db_dir, options=Options(raw_mode=True), access_type=AccessType.read_only())
    except Exception as exc:  # rocksdict raises plain Exception with the RocksDB status text
        raise CorruptInput(f"RocksDB refuses to open this version: {exc}", where) from exc
    try:
        it = db.iter()
        it.seek_to_first()
        while True:
            keys: list[bytes] = []
            values: list[bytes] = []
            while len(keys) < BATCH_ROWS and it.valid():
                keys.append(it.key())
                values.append(it.value())
                it.next()
            if not keys:
                break
            yield pa.RecordBatch.from_arrays(
                [strip_version_byte(pa.array(keys, pa.binary()), where), strip_version_byte(pa.array(values, pa.binary()), where)],
                schema=ROW_SCHEMA,
            )
        try:
            it.status()
        except Exception as exc:
            raise CorruptInput(f"RocksDB read failed: {exc}", where) from exc
        del it
    finally:
        db.close()


def _sorted_runs(
    batches: Iterable[pa.RecordBatch], options, tmp: str, run_bytes: int, where: str
) -> tuple[list[str], int]:
    """Write the rows as sorted SST runs of about ``run_bytes`` each; return (paths, row count)."""
    runs: list[str] = []
    keys: list[pa.Array] = []
    values: list[pa.Array] = []
    buffered = 0
    rows = 0
    for batch in batches:
        if batch.num_rows == 0:
            continue
        k, v = batch.column("key"), batch.column("value")
        if k.null_count or v.null_count:
            raise CorruptInput("a row to write has a null key or value", where)
        keys.append(add_version_byte(k))
        values.append(add_version_byte(v))
        rows += batch.num_rows
        buffered += keys[-1].nbytes + values[-1].nbytes
        if buffered >= run_bytes:
            runs.append(_write_run(keys, values, options, os.path.join(tmp, f"run-{len(runs)}.sst"), where))
            keys, values, buffered = [], [], 0
    if keys:
        runs.append(_write_run(keys, values, options, os.path.join(tmp, f"run-{len(runs)}.sst"), where))
    return runs, rows


def _write_run(keys: list[pa.Array], values: list[pa.Array], options, path: str, where: str) -> str:
    from rocksdict import SstFileWriter

    k = pa.concat_arrays(keys)
    v = pa.concat_arrays(values)
    order = pc.sort_indices(k)  # byte-wise order, as RocksDB's default comparator
    k, v = k.take(order), v.take(order)
    if len(k) > 1 and pc.any(pc.equal(k.slice(1), k.slice(0, len(k) - 1))).as_py():
        raise CorruptInput("the rows to write carry the same key twice", where)
    writer = SstFileWriter(options=options)
    writer.open(path)
    for start in range(0, len(k), BATCH_ROWS):
        for key, value in zip(k.slice(start, BATCH_ROWS).to_pylist(), v.slice(start, BATCH_ROWS).to_pylist()):
            writer[key] = value
    writer.finish()
    return path


def _build_db(runs: list[str], rows: int, options, tmp: str, where: str) -> str:
    """Ingest the runs into a fresh RocksDB and take a checkpoint of it; return the checkpoint dir."""
    from rocksdict import Checkpoint, IngestExternalFileOptions, Rdict

    db = Rdict(os.path.join(tmp, "db"), options=options)
    try:
        ingest = IngestExternalFileOptions()
        ingest.set_move_files(True)
        for run in runs:
            db.ingest_external_file([run], ingest)
        if len(runs) > 1:
            db.compact_range(None, None)  # one sorted, non-overlapping set of table files
            stored = sum(int(f["num_entries"]) for f in db.live_files())
            if stored != rows:
                raise CorruptInput(f"the rows to write carry duplicate keys ({rows} rows, {stored} distinct)", where)
        checkpoint = os.path.join(tmp, "checkpoint")
        Checkpoint(db).create_checkpoint(checkpoint)
        return checkpoint
    finally:
        db.close()
