"""Reading an archive: the sealed manifest, the integrity check of every file, and the raw rows.

``check_archive`` is what makes an archive trustworthy before anything is restored from it:

1. every file the manifest lists exists and has the listed size (one listing per directory);
2. no other file exists in the archive (an unlisted data file would be state nobody vouched for);
3. every listed file's SHA-256 matches (streamed, 1 MiB at a time; several files at once, in
   threads, for ``hashlib`` and file reads let go of the GIL).

The first problem found is raised as one :class:`~migrate.errors.CorruptInput` naming the file.

``read_rows`` yields batches of the provider row schema (raw ``key``/``value`` only) from one
data file; the typed columns are for people and are never used to restore.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor

import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import CorruptInput
from ..providers.base import BATCH_ROWS, ROW_SCHEMA
from ..storage import Location
from .manifest import MANIFEST_NAME, DataFile, Manifest, parse_manifest

_CHUNK = 1 << 20
#: files hashed at once by :func:`check_archive`. It runs in the command before any partition
#: starts (nothing is written until every file is checked), and one thread hashed about 1.1 GB/s
#: here: 0.43-0.44 s of wall clock for the 10M-key benchmark archive (503 MB), with the second
#: core idle once the workers' fork server had imported; two threads: 0.20-0.22 s. The 10M import,
#: five alternating pairs: 6.35 -> 6.12 s wall, CPU unchanged (11.41 -> 11.37 s)
#: (benchmarks/results/2026-12-04-ab-archive-hash-threads.md).
HASH_THREADS = min(4, os.cpu_count() or 1)
#: Parquet key-value metadata keys that hold the store properties of a data file (see
#: ``migrate.providers.base``: facts a writer needs besides the rows, e.g. column families)
PROPERTY_PREFIX = "stateshift.property."


def load_manifest(archive: Location) -> Manifest:
    """The archive's parsed, seal-checked manifest."""
    root = archive.list_dir("")
    if MANIFEST_NAME not in root:
        if not root and not archive.exists(""):
            raise CorruptInput("archive directory does not exist", archive.describe())
        hint = ""
        if "offsets" in root and "metadata" in root:
            hint = " (it looks like a streaming checkpoint: `stateshift convert` moves one, `stateshift export` archives it)"
        raise CorruptInput(f"no {MANIFEST_NAME} here: not a stateshift archive, or its export did not finish{hint}", archive.describe())
    where = archive.describe(MANIFEST_NAME)
    manifest = parse_manifest(archive.read_text(MANIFEST_NAME), where)
    seen: set[str] = set()
    for path in manifest.all_paths():
        if path in seen or path == MANIFEST_NAME:
            raise CorruptInput(f"lists the file {path} twice", where)
        seen.add(path)
    keys = [(d.operator, d.store, d.partition) for d in manifest.data_files]
    if len(set(keys)) != len(keys):
        raise CorruptInput("lists the same operator/store/partition in two data files", where)
    return manifest


def list_files(archive: Location, rel: str = "") -> dict[str, int]:
    """Every file under the archive (hidden ones included), relative path -> size."""
    out: dict[str, int] = {}
    for name, entry in sorted(archive.list_dir(rel).items()):
        child = f"{rel}/{name}" if rel else name
        if entry.is_dir:
            out.update(list_files(archive, child))
        else:
            out[child] = entry.size
    return out


def sha256_of(archive: Location, rel: str) -> str:
    h = hashlib.sha256()
    with archive.open_read(rel) as f:
        while chunk := f.read(_CHUNK):
            h.update(chunk)
    return h.hexdigest()


def check_archive(archive: Location, manifest: Manifest, progress: Callable[[str], None] = lambda rel: None) -> int:
    """Refuse a tampered, truncated or incomplete archive; returns the number of bytes checked."""
    present = list_files(archive)
    listed = {f.path: (f.bytes, f.sha256) for f in manifest.checkpoint_files}
    listed.update({d.path: (d.bytes, d.sha256) for d in manifest.data_files})
    for path, (size, _) in listed.items():
        if path not in present:
            raise CorruptInput(f"file is missing from the archive (it is listed in {MANIFEST_NAME})", archive.describe(path))
        if present[path] != size:
            raise CorruptInput(
                f"file is {present[path]} bytes but {MANIFEST_NAME} lists {size} bytes (truncated or replaced)",
                archive.describe(path),
            )
    for path in present:
        if path != MANIFEST_NAME and path not in listed:
            raise CorruptInput(f"file is not listed in {MANIFEST_NAME}; an archive with unlisted files is refused", archive.describe(path))
    total = 0
    paths = list(listed)
    # the files hashed HASH_THREADS at a time, the results taken in the manifest's order: the
    # first file that fails is the one named, as when they were hashed one by one
    with ThreadPoolExecutor(max_workers=HASH_THREADS, thread_name_prefix="stateshift-sha256") as pool:
        for path, actual in zip(paths, pool.map(lambda rel: sha256_of(archive, rel), paths)):
            size, sha = listed[path]
            if actual != sha:
                raise CorruptInput(f"SHA-256 does not match {MANIFEST_NAME}: the file was changed", archive.describe(path))
            total += size
            progress(path)
    return total


def read_rows(archive: Location, data_file: DataFile, batch_rows: int = BATCH_ROWS) -> Iterator[pa.RecordBatch]:
    """Raw rows of one data file as batches of :data:`~migrate.providers.base.ROW_SCHEMA`.

    Read without Arrow's CPU threads (``use_threads=False``): partitions already run in worker
    processes, and each Arrow thread, allocating through the C library (the tool's Arrow pool,
    ``cli.prefer_arrow_pool``), gets an allocator arena of its own that keeps what it freed.
    Measured on an import of 10M keys over 64 partitions: one process (``--jobs 1``) peaked at
    183 -> 138 MB; with ``--jobs 2`` each worker at 140-144 -> 103-105 MB.
    ``test_archive_read_starts_no_arrow_threads.py`` holds it."""
    where = archive.describe(data_file.path)
    with archive.open_read(data_file.path) as f:
        try:
            pf = pq.ParquetFile(f)
        except (pa.ArrowException, OSError) as exc:
            raise CorruptInput(f"is not a readable Parquet file ({' '.join(str(exc).split())})", where) from exc
        names = pf.schema_arrow.names
        for col in ("key", "value"):
            if col not in names:
                raise CorruptInput(f"Parquet file has no raw '{col}' column", where)
            t = pf.schema_arrow.field(col).type
            if not (pa.types.is_binary(t) or pa.types.is_large_binary(t)):
                raise CorruptInput(f"raw column '{col}' is {t}, not binary", where)
        rows = 0
        try:
            for batch in pf.iter_batches(batch_size=batch_rows, columns=["key", "value"], use_threads=False):
                if batch.column("key").null_count or batch.column("value").null_count:
                    raise CorruptInput("raw key/value column holds nulls", where)
                rows += batch.num_rows
                yield pa.RecordBatch.from_arrays(
                    [batch.column("key").cast(pa.binary()), batch.column("value").cast(pa.binary())], schema=ROW_SCHEMA
                )
        except pa.ArrowException as exc:
            raise CorruptInput(f"Parquet data does not read back ({' '.join(str(exc).split())})", where) from exc
        if rows != data_file.rows:
            raise CorruptInput(f"holds {rows} rows but {MANIFEST_NAME} lists {data_file.rows}", where)


def store_properties(archive: Location, data_file: DataFile) -> dict[str, str]:
    """The store properties recorded in one data file's Parquet metadata (``{}`` for most stores)."""
    where = archive.describe(data_file.path)
    with archive.open_read(data_file.path) as f:
        try:
            metadata = pq.ParquetFile(f).schema_arrow.metadata or {}
        except (pa.ArrowException, OSError) as exc:
            raise CorruptInput(f"is not a readable Parquet file ({' '.join(str(exc).split())})", where) from exc
    out = {}
    for k, v in metadata.items():
        key = k.decode("utf-8", "replace")
        if key.startswith(PROPERTY_PREFIX):
            out[key[len(PROPERTY_PREFIX):]] = v.decode("utf-8", "replace")
    return out
