"""The RocksDB work itself, through the ``rocksdict`` binding (its bundled RocksDB 9.8.4 is the
engine's): options matching the engine's table files, iterating a restored checkpoint, applying
changelogs, and building a new checkpoint from sorted runs.

Everything here works in a local temporary folder the caller owns; nothing touches the source.
Rows here are RocksDB bytes (see ``rocksdb_keys.RowCodec`` for the canonical form).

Merge operands (list state of transformWithState) are resolved by RocksDB's own string-append
merge operator, which rocksdict takes from the checkpoint's ``OPTIONS`` file (observed: without
that line a key with operands reads as an error). The engine's operator joins operands with no
delimiter when ``mergeOperatorVersion=2``, but its ``OPTIONS`` file names only
``StringAppendOperator``, whose default delimiter is ``,``; :func:`set_merge_delimiter` writes
the engine's delimiter into that line of the restored copy (the operator's ``delimiter`` option).
"""

from __future__ import annotations

import functools
import os
import shutil
from collections.abc import Callable, Iterable, Iterator

import pyarrow as pa
import pyarrow.compute as pc

from .. import scratch
from ..buffers import binary_args, plain_binary
from ..errors import CorruptInput, Unsupported, library_failure, os_failure
from .base import BATCH_ROWS
from .rocksdb_keys import prefix_each

try:  # the compiled byte-wise key order (setup.py builds it when a C compiler is there)
    from . import _keysort
except ImportError:  # not built: Arrow's sort
    _keysort = None
try:  # the compiled collection of a scan's rows into Arrow buffers
    from . import _rowpairs
except ImportError:  # not built: Python lists and pa.array (_collect_py)
    _rowpairs = None

# A scan batch also stops once its keys or its values reach this many bytes (rows of large values).
BATCH_BYTES = 64 << 20
# A scan reads its table files this many bytes at a time (RocksDB's ReadOptions.readahead_size;
# without it the iterator's own readahead grows from 8 KiB to 256 KiB, one pread each). Measured
# on 24 partitions of the 10M-key RocksDB benchmark checkpoint (tables of about 6 MB), four
# alternating rounds in one process: 0.317-0.336 CPU us per row without, 0.310-0.321 at 2 MiB,
# 0.289-0.311 at 4 MiB, 0.278-0.287 at 8 MiB, the system time about halved; on whole 10M-key
# commands the gain is within their noise (benchmarks/results/2026-12-04-ab-scan-readahead.md).
# One buffer of this size per scan, and a worker scans one store at a time.
SCAN_READAHEAD = 8 << 20

FORMAT_VERSION_CONF = "spark.sql.streaming.stateStore.rocksdb.formatVersion"
COMPRESSION_CONF = "spark.sql.streaming.stateStore.rocksdb.compression"
BLOCK_SIZE_CONF = "spark.sql.streaming.stateStore.rocksdb.blockSizeKB"
_COMPRESSIONS = {"none": "none", "no": "none", "snappy": "snappy", "zlib": "zlib", "bzip2": "bz2",
                 "lz4": "lz4", "lz4hc": "lz4hc", "zstd": "zstd"}  # fmt: skip
_MERGE_LINE = b"merge_operator=StringAppendOperator"


def _format_version(conf: dict[str, str], where: str) -> int:
    raw = conf.get(FORMAT_VERSION_CONF, "5")
    try:
        value = int(raw)
    except ValueError:
        raise Unsupported(f"{FORMAT_VERSION_CONF}={raw!r} is not an integer", where) from None
    if not 2 <= value <= 6:  # table format versions RocksDB 9.8 writes (common practice: 5 is the default)
        raise Unsupported(f"{FORMAT_VERSION_CONF}={value} is not a table format version RocksDB 9.8 writes (2..6)", where)
    return value


def db_options(conf: dict[str, str], where: str):  # -> rocksdict.Options
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


def set_merge_delimiter(db_dir: str, delimiter: bytes) -> None:
    """Give the string-append merge operator of a restored checkpoint the engine's delimiter."""
    if delimiter == b",":
        return  # the operator's default
    if b";" in delimiter or b"}" in delimiter or b"\n" in delimiter:
        raise Unsupported(f"merge delimiter {delimiter!r} cannot be written into an OPTIONS file")
    for name in os.listdir(db_dir):
        if not name.startswith("OPTIONS-"):
            continue
        path = os.path.join(db_dir, name)
        with open(path, "rb") as f:
            text = f.read()
        lines = [
            b"".join((line[: line.index(_MERGE_LINE)], b"merge_operator={id=StringAppendOperator;delimiter=", delimiter, b"}"))
            if line.strip() == _MERGE_LINE
            else line
            for line in text.split(b"\n")
        ]
        try:
            with open(path, "wb") as f:
                f.write(b"\n".join(lines))
        except OSError as exc:
            raise os_failure(exc, "write this file", path) from exc


# ------------------------------------------------------------------------ reading
def open_for_replay(db_dir: str, where: str):  # -> rocksdict.Rdict
    """The restored checkpoint in ``db_dir`` opened for writing (a fresh, empty one if none)."""
    from rocksdict import Options, Rdict

    options = Options(raw_mode=True)
    options.create_if_missing(True)
    options.set_max_file_opening_threads(1)  # a scratch copy: one table-opening thread (see build_db)
    try:
        return Rdict(db_dir, options=options)
    except Exception as exc:  # rocksdict raises plain Exception with the RocksDB status text
        raise library_failure(exc, "open this version", where) or CorruptInput(f"RocksDB refuses to open this version: {exc}", where) from exc


def iterate(
    db_dir: str, where: str, prefixes: tuple[bytes, bytes] = (b"", b""),
    stray: Callable[[bytes, bytes], None] | None = None,
) -> Iterator[tuple[pa.Array, pa.Array]]:
    """Every (key, value) of the RocksDB in ``db_dir`` in key order, as raw binary arrays, each
    key without ``prefixes[0]`` and each value without ``prefixes[1]`` (the bytes every row of the
    store starts with: ``RowCodec.write_prefixes``). A row that does not start with them goes to
    ``stray``, which raises the error it is; should it return, or without one, the row is
    :class:`CorruptInput`.

    The rows come from rocksdict's ``items()`` view, one Python call per row (the raw iterator
    needs four: valid, key, value, next). Measured on the provider's whole read of eight 10M-key
    benchmark partitions, the two loops alternating per partition three times in one process,
    twice: 1.27-1.35 -> 1.10-1.17 CPU us per row; its batches are built by :func:`collect`. That
    view ends silently on an unreadable block (seen: a flipped block yields half the keys, no error), so
    :func:`_check_scan_complete` then asks a raw iterator for the key after the last one the view
    gave and for its status. Every block is read once, so the scan does not fill the block cache
    (measured: 1.05 -> 0.84 CPU us per key on one 156k-key partition) and verifies block checksums
    (RocksDB's default, set explicitly).
    """
    from rocksdict import AccessType, Options, Rdict, ReadOptions

    options = Options(raw_mode=True)
    # RocksDB opens the table files of a DB with this many threads, started at every open even for
    # one file (default 16; measured: 2.7 -> 1.4 CPU ms per open and scan of a one-file DB). A
    # read-only open writes no OPTIONS file, so nothing we write records this setting.
    options.set_max_file_opening_threads(1)
    try:
        db = Rdict(db_dir, options=options, access_type=AccessType.read_only())
    except Exception as exc:
        raise library_failure(exc, "open this version", where) or CorruptInput(f"RocksDB refuses to open this version: {exc}", where) from exc
    try:
        scan = ReadOptions()
        scan.fill_cache(False)
        scan.set_verify_checksums(True)
        scan.set_readahead_size(SCAN_READAHEAD)
        rows = iter(db.items(read_opt=scan))
        last: bytes | None = None
        while True:
            try:
                keys, values, odd = collect(rows, BATCH_ROWS, BATCH_BYTES, prefixes)
            except Exception as exc:  # rocksdict raises plain Exception with the RocksDB status text
                raise library_failure(exc, "read this version", where) or CorruptInput(f"RocksDB read failed: {exc}", where) from exc
            if len(keys):
                last = prefixes[0] + keys[len(keys) - 1].as_py()
                yield keys, values
            if odd is not None:
                if stray is not None:
                    stray(*odd)
                raise CorruptInput(f"a RocksDB row does not start with the bytes {prefixes!r} every row of this store starts with", where)
            if not len(keys):
                break
        del rows
        _check_scan_complete(db, scan, last, where)
    finally:
        db.close()


def collect(
    rows: Iterator[tuple[bytes, bytes]], limit: int, max_bytes: int, prefixes: tuple[bytes, bytes] = (b"", b"")
) -> tuple[pa.Array, pa.Array, tuple[bytes, bytes] | None]:
    """Up to ``limit`` (key, value) pairs from ``rows`` as two binary arrays, stopping early once the
    keys or the values taken reach ``max_bytes``; empty arrays when ``rows`` is exhausted. Each key
    loses ``prefixes[0]`` and each value ``prefixes[1]``; a row that does not start with them ends
    the batch untaken and is the third item (None otherwise). By the compiled :mod:`._rowpairs`
    when it is built, else :func:`_collect_py` (the reference). Measured on 156k synthetic rows
    (24-byte keys, 40-byte values), best of five, twice: the scan with its batches built 0.47-0.54
    -> 0.37-0.38 CPU us per row (the ``items()`` view alone: 0.33-0.35); the provider's whole read
    of eight 10M-key benchmark partitions, alternating three rounds in one process: 1.14-1.32 ->
    0.68-0.81. Taking the prefixes off here, instead of Arrow's slice of every batch afterwards,
    and growing the buffers in place (sized from the first row, handed over without a copy):
    the RocksDB provider's read of eight 10M-key partitions written by the tool, alternating
    three rounds, 0.87-1.01 -> 0.69-0.76 CPU us per row; the 10M-key convert to RocksDB, four
    alternating pairs of whole commands, 31.3 -> 28.7 CPU s (medians)."""
    if _rowpairs is None:
        return _collect_py(rows, limit, max_bytes, prefixes)
    count, key_offsets, keys, value_offsets, values, odd = _rowpairs.collect(rows, limit, max_bytes, *prefixes)
    return (
        pa.Array.from_buffers(pa.binary(), count, [None, pa.py_buffer(key_offsets), pa.py_buffer(keys)]),
        pa.Array.from_buffers(pa.binary(), count, [None, pa.py_buffer(value_offsets), pa.py_buffer(values)]),
        odd,
    )


def _collect_py(
    rows: Iterator[tuple[bytes, bytes]], limit: int, max_bytes: int, prefixes: tuple[bytes, bytes] = (b"", b"")
) -> tuple[pa.Array, pa.Array, tuple[bytes, bytes] | None]:
    """The reference of :func:`collect`: Python lists converted by ``pa.array``."""
    keys: list[bytes] = []
    values: list[bytes] = []
    key_bytes = value_bytes = 0
    kp, vp = prefixes
    odd = None
    while len(keys) < limit and key_bytes < max_bytes and value_bytes < max_bytes:
        row = next(rows, None)
        if row is None:
            break
        key, value = row
        if not (key.startswith(kp) and value.startswith(vp)):
            odd = row
            break
        keys.append(key[len(kp) :])
        values.append(value[len(vp) :])
        key_bytes += len(keys[-1])
        value_bytes += len(values[-1])
    return pa.array(keys, pa.binary()), pa.array(values, pa.binary()), odd


def _check_scan_complete(db, scan, last: bytes | None, where: str) -> None:
    """Raise :class:`CorruptInput` unless a scan that ended after ``last`` (None: gave nothing) has
    really seen every key: a raw iterator placed just past ``last`` must be at the end, with an
    OK status (reading the block the scan stopped in reports its corruption here)."""
    it = db.iter(scan)
    try:
        if last is None:
            it.seek_to_first()
        else:
            it.seek(last)
            if it.valid() and it.key() == last:
                it.next()
        more = it.valid()
        try:
            it.status()
        except Exception as exc:
            raise library_failure(exc, "read this version", where) or CorruptInput(f"RocksDB read failed: {exc}", where) from exc
        if more:
            raise CorruptInput("RocksDB scan ended early: keys remain after the last one it gave", where)
    finally:
        del it


# ------------------------------------------------------------------------ writing
Encoder = Callable[[pa.RecordBatch], tuple[pa.Array, pa.Array]]


class ScratchFolder:
    """The scratch folder of one partition build, created on first use where
    :mod:`migrate.scratch` says for the bytes known by then, and removed by :meth:`remove`."""

    def __init__(self, prefix: str) -> None:
        self.prefix = prefix
        self.path: str | None = None

    def path_for(self, need: int, whole: bool) -> str:
        """The folder (created now if needed) for ``need`` bytes; ``whole``: they are all the
        partition will put there. A partition that needs several sorted runs has no known size
        yet, so it is built in the system temporary directory, never on tmpfs."""
        if self.path is None:
            self.path = scratch.make(self.prefix, need if whole else None)
        return self.path

    def remove(self) -> None:
        if self.path is not None:
            shutil.rmtree(self.path, ignore_errors=True)


def sorted_runs(
    batches: Iterable[pa.RecordBatch], encode: Encoder, options, folder: Callable[[int, bool], str], run_bytes: int,
    where: str, on_keys: Callable[[pa.Array], None] = lambda keys: None, prefixes: tuple[bytes, bytes] = (b"", b""),
    whole_run_path: Callable[[int], str | None] | None = None,
) -> tuple[list[str], int]:
    """Write the rows as sorted SST runs of about ``run_bytes`` each into ``folder(bytes, whole)``
    (see :meth:`ScratchFolder.path_for`); return (paths, row count). ``encode`` gives the keys and
    values without ``prefixes`` (key prefix, value prefix; ``RowCodec.write_prefixes``), which
    :func:`put_rows` puts in front as it writes: a prefix shared by every key changes neither their
    order nor which are equal, so the order checks, the sort and ``on_keys`` see the bare keys.
    A partition that fits one run is written to ``whole_run_path(bytes)`` instead, when that
    gives a path (the table file's place in a local target: see ``RocksDBProvider.write``)."""
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
        k, v = encode(batch)
        on_keys(k)
        keys.append(k)
        values.append(v)
        rows += batch.num_rows
        buffered += keys[-1].nbytes + values[-1].nbytes
        if buffered >= run_bytes:
            place = functools.partial(_scratch_run, folder, buffered, False, len(runs))
            runs.append(_write_run(keys, values, options, place, where, prefixes))
            keys, values, buffered = [], [], 0
    if keys:

        def place() -> str:
            in_target = whole_run_path(buffered) if whole_run_path is not None and not runs else None
            return in_target or _scratch_run(folder, buffered, not runs, len(runs))

        runs.append(_write_run(keys, values, options, place, where, prefixes))
    return runs, rows


def _scratch_run(folder: Callable[[int, bool], str], need: int, whole: bool, index: int) -> str:
    """The path of sorted run ``index`` in the scratch folder (``sorted_runs``' ``folder``)."""
    return os.path.join(folder(need, whole), f"run-{index}.sst")


def byte_order(keys: pa.Array) -> pa.Array:
    """The positions of ``keys`` (binary, no nulls) in byte-wise order, RocksDB's default
    comparator: by the compiled radix sort of :mod:`._keysort` when it is built, else by Arrow's
    ``sort_indices`` (the reference; equal keys may come in another order, which no caller relies
    on: a run with a repeated key is refused). Measured on the 156k keys of each of three 10M-key
    benchmark partitions: 0.67-0.72 CPU us per key for Arrow, 0.11-0.13 for the radix sort.
    """
    if _keysort is None or not plain_binary(keys):
        return pc.sort_indices(keys)
    offsets, data, offset, large = binary_args(keys)
    raw = _keysort.byte_order(offsets, data, offset, len(keys), large)
    return pa.Array.from_buffers(pa.int64(), len(keys), [None, pa.py_buffer(raw)])


def strictly_increasing(keys: pa.Array) -> bool:
    """Whether every key (binary, no nulls) is byte-wise greater than the one before it: sorted as
    an SST file needs, with no key twice. Arrow compares binary values byte by byte as unsigned,
    the shorter first when one is a prefix of the other (RocksDB's default comparator). Measured on
    six 156k-key partitions of the 10M-key benchmark checkpoint: the check costs 0.007-0.010 CPU us
    per key; the sort, the two takes and the duplicate check it spares cost 0.09-0.12 on those
    (sorted) keys. A heap-map read in key order followed by this write, against a read in file
    order and the sort, alternating per partition over 11 partitions twice, in one process:
    1.69-1.74 -> 1.49-1.61 CPU us per row for read and write together.
    """
    if len(keys) < 2:
        return True
    return bool(pc.all(pc.less(keys.slice(0, len(keys) - 1), keys.slice(1))).as_py())


def _write_run(
    keys: list[pa.Array], values: list[pa.Array], options, place: Callable[[], str], where: str, prefixes: tuple[bytes, bytes]
) -> str:
    """One sorted run of the rows into a new table file at ``place()``, asked for once the rows
    are known to be fit to write (no key twice); returns its path."""
    from rocksdict import SstFileWriter

    if _batches_increasing(keys):  # rows replayed from a heap map or read from RocksDB come sorted
        parts = list(zip(keys, values))  # written as they are: no concatenated copy of the run
    else:
        k = pa.concat_arrays(keys)
        v = pa.concat_arrays(values)
        order = byte_order(k)
        k, v = k.take(order), v.take(order)
        if len(k) > 1 and pc.any(pc.equal(k.slice(1), k.slice(0, len(k) - 1))).as_py():
            raise CorruptInput("the rows to write carry the same key twice", where)
        parts = [(k, v)]
    path = place()
    try:
        writer = SstFileWriter(options=options)
        writer.open(path)
        for k, v in parts:
            put_rows(writer, k, v, prefixes)
        writer.finish()
    except Exception as exc:  # rocksdict raises plain Exception with the RocksDB status text
        failure = library_failure(exc, "write this version's table file", where)
        if failure is None:
            raise
        raise failure from exc
    return path


def put_rows(target, keys: pa.Array, values: pa.Array, prefixes: tuple[bytes, bytes]) -> None:
    """``target[key_prefix + key] = value_prefix + value`` for every row, in order (``target``: an
    ``SstFileWriter``): by the compiled :mod:`._rowpairs` when it is built, else :func:`_put_py`
    (the reference). Measured on 156k sorted rows (24-byte keys, 40-byte values), with the
    version-byte prefix, alternating 20 times in one process: 0.83 / 0.85 -> 0.62 / 0.65 CPU us per
    row (min / median) for the puts, the prefixes and the lists they no longer need; the
    provider's whole write of eight 10M-key partitions, alternating three rounds in one process:
    1.06-1.09 -> 0.82-0.84."""
    if _rowpairs is None or not (plain_binary(keys) and plain_binary(values)):
        return _put_py(target, keys, values, prefixes)
    _rowpairs.put(target, prefixes[0], prefixes[1], *binary_args(keys), *binary_args(values), len(keys))


def _put_py(target, keys: pa.Array, values: pa.Array, prefixes: tuple[bytes, bytes]) -> None:
    """The reference of :func:`put_rows`: the prefixes put in front by Arrow, a batch at a time
    converted to Python lists."""
    keys, values = prefix_each(keys, prefixes[0]), prefix_each(values, prefixes[1])
    for start in range(0, len(keys), BATCH_ROWS):
        for key, value in zip(keys.slice(start, BATCH_ROWS).to_pylist(), values.slice(start, BATCH_ROWS).to_pylist()):
            target[key] = value


def _batches_increasing(keys: list[pa.Array]) -> bool:
    """Whether the keys of the batches, one after the other, are strictly increasing: each batch
    (:func:`strictly_increasing`) and each boundary (Python compares bytes as RocksDB's default
    comparator does). Empty batches never reach here (``sorted_runs`` skips them)."""
    if not all(strictly_increasing(k) for k in keys):
        return False
    return all(a[len(a) - 1].as_py() < b[0].as_py() for a, b in zip(keys, keys[1:]))


def build_db(runs: list[str], rows: int, options, tmp: str, where: str) -> str:
    """Ingest the runs into a fresh RocksDB and take a checkpoint of it; return the checkpoint dir."""
    try:
        return _build_db(runs, rows, options, tmp, where)
    except Exception as exc:  # rocksdict raises plain Exception with the RocksDB status text
        failure = library_failure(exc, "build this version", where)
        if failure is None:
            raise
        raise failure from exc


def _build_db(runs: list[str], rows: int, options, tmp: str, where: str) -> str:
    from rocksdict import Checkpoint, IngestExternalFileOptions, Rdict

    # One table-opening thread instead of RocksDB's 16, started for every open (as in
    # :func:`iterate`). Measured on builds of a 100-row partition, alternating twice: 16 -> 0
    # threads started per build, 7.4-8.2 -> 5.9-6.1 CPU ms per SST write and build. The setting
    # is a DB option, so the checkpoint's OPTIONS file records it (the engine's own says 16): a
    # reader that loads that file opens table files one at a time; nothing else changes.
    options.set_max_file_opening_threads(1)
    db = Rdict(os.path.join(tmp, "db"), options=options)
    try:
        ingest = IngestExternalFileOptions()
        ingest.set_move_files(True)
        for i, run in enumerate(runs):
            if os.path.dirname(run) != tmp:
                # a run written in place in the target, on another file system: RocksDB's move is a
                # hard link, so it links a symbolic link made here, and the DB and its checkpoint
                # hold links to the target's file (observed; RocksDB would copy the file otherwise)
                link = os.path.join(tmp, f"in-place-{i}.sst")
                try:
                    os.symlink(run, link)
                    run = link
                except OSError:  # no links where scratch is: RocksDB copies the file instead
                    pass
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
