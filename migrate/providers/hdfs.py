"""The heap-map provider layout: ``<v>.delta`` and ``<v>.snapshot`` files per store partition.

Each file is one compressed stream (codec from the pinned conf, lz4 by default) of records::

    int32 BE key length, key bytes, int32 BE value length, value bytes   -- an update
    int32 BE key length, key bytes, int32 BE -1                          -- a removal (deltas)
    int32 BE -1                                                          -- end of file

Version V is the newest snapshot S <= V (or the empty map when there is none) plus the deltas
S+1..V applied in order. A missing delta in that chain is an error, never a partial state.

Reading is vectorised: one tight loop finds the record offsets of each file
(:func:`record_starts`), keys and values are gathered out of the decompressed buffer into one
buffer each (:func:`record_arrays`), and the replay (last write wins, removals drop the key) is one
byte-wise sort over all records of the chain, keeping the last of each run of equal keys
(:func:`resolve_versions`; a dictionary encoding without the compiled sort). :func:`parse_records`
stays the plain reference walk; every irregular file goes through it for its exact error.

The record walk is the one step that cannot be vectorised (each offset depends on the lengths
before it), and in Python it was the largest CPU cost of reading, so it is compiled:
``_framing.c`` (module :mod:`._framing`, an optional extension built by ``setup.py``) walks the
buffer in C, and gathers the keys and values with one copy each; writing frames the records
there too (``frame_records``). :func:`_record_starts_py`, :func:`_record_arrays_py` and
:func:`_frame_batch_py` are the reference walk, gather and framing, and the fallback when the
extension is not built; tests hold each pair to the same offsets, arrays, bytes and errors.
"""

from __future__ import annotations

import re
import struct
from collections.abc import Callable, Iterable, Iterator
from typing import NoReturn

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ..buffers import binary_args, plain_binary
from ..codecs import codec_for, codec_of_stream, compress_parts
from ..codecs.hadoop_crc import crc_name, make_crc, verify_crc
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

#: the most bytes the keys (or the values) of one array may hold with int32 offsets; the records of
#: a chain beyond it are joined with int64 offsets (large_binary) and handed on in batches of at
#: most BATCH_BYTES (tests lower both)
OFFSET_LIMIT = 2**31 - 1
BATCH_BYTES = 64 << 20

try:  # the compiled record walk and gather (setup.py builds them when a C compiler is there)
    from . import _framing
except ImportError:  # not built: the Python walk and gather
    _framing = None
try:  # the compiled byte-wise sort, whose last_of_each is the replay (see resolve_versions)
    from . import _keysort
except ImportError:  # not built: the replay by dictionary encoding
    _keysort = None
#: the file-order replay by hash table (``_keysort.last_in_file_order``, present when the system's
#: libxxhash loaded) and the most records it takes (its table holds positions as 32-bit numbers)
_HASHED = hasattr(_keysort, "last_in_file_order")
_HASHED_MAX = 2**32 - 1

_FILE = re.compile(r"^(\d+)(?:_([0-9A-Za-z-]+))?\.(delta|snapshot)$")
_END = b"\xff\xff\xff\xff"


def parse_records(data: bytes, where: str, allow_removals: bool) -> Iterator[tuple[bytes, bytes | None]]:
    """Walk the decompressed records of one file: (key, value) or (key, None) for a removal."""
    view = memoryview(data)
    n = len(data)
    pos = 0
    unpack = struct.Struct(">i").unpack_from
    while True:
        if pos + 4 > n:
            raise CorruptInput(f"records end without the end marker (truncated at byte {pos})", where)
        (klen,) = unpack(view, pos)
        pos += 4
        if klen == -1:
            break
        if klen < 0 or pos + klen + 4 > n:
            raise CorruptInput(f"bad key length {klen} at byte {pos - 4}", where)
        key = bytes(view[pos : pos + klen])
        pos += klen
        (vlen,) = unpack(view, pos)
        pos += 4
        if vlen < 0:
            if vlen != -1 or not allow_removals:
                raise CorruptInput(f"bad value length {vlen} at byte {pos - 4}", where)
            yield key, None
            continue
        if pos + vlen > n:
            raise CorruptInput(f"value of {vlen} bytes runs past the end of the records at byte {pos}", where)
        yield key, bytes(view[pos : pos + vlen])
        pos += vlen
    if pos != n:
        raise CorruptInput(f"{n - pos} unexpected bytes after the end marker", where)


class _Irregular(Exception):
    """The fast walk met something parse_records must explain (internal)."""


_BE_INT = struct.Struct(">i")


def record_starts(data: bytes, where: str, allow_removals: bool) -> np.ndarray:
    """Byte offset of every record of one decompressed file (int64), checked like ``parse_records``.

    Walking the records is sequential by nature (each position depends on the lengths before it),
    so this walk only reads the two lengths of each record; the keys and values are then cut out
    by :func:`record_arrays` with whole-buffer operations. The walk is the compiled one from
    :mod:`._framing` when it is built, else :func:`_record_starts_py` (the reference). Anything
    irregular (a negative length that is neither the end marker nor an allowed removal, a length
    running past the end, a missing end marker, trailing bytes) sends the file through
    :func:`parse_records`, which raises the exact error it always has. The array may be read-only.
    """
    if _framing is None:
        return _record_starts_py(data, where, allow_removals)
    starts = _framing.record_starts(data, allow_removals)
    if starts is None:
        _explain_irregular(data, where, allow_removals, None)
    return np.frombuffer(starts, dtype=np.int64)


def _record_starts_py(data: bytes, where: str, allow_removals: bool) -> np.ndarray:
    """:func:`record_starts` as a tight Python loop: the reference walk, and the fallback when the
    compiled one is not built."""
    unpack = _BE_INT.unpack_from
    starts: list[int] = []
    add = starts.append
    pos = 0
    klen = 0
    try:
        while True:
            (klen,) = unpack(data, pos)
            if klen < 0:
                break
            vpos = pos + 4 + klen
            (vlen,) = unpack(data, vpos)
            add(pos)
            if vlen < 0:
                if vlen != -1 or not allow_removals:
                    raise _Irregular
                pos = vpos + 4
            else:
                pos = vpos + 4 + vlen
    except (struct.error, _Irregular):
        klen = 0
    if klen != -1 or pos + 4 != len(data):
        _explain_irregular(data, where, allow_removals, pos)
    return np.array(starts, dtype=np.int64)


def _explain_irregular(data: bytes, where: str, allow_removals: bool, pos: int | None) -> NoReturn:
    """Raise the exact error of an irregular file: :func:`parse_records` finds and names it."""
    for _ in parse_records(data, where, allow_removals):
        pass
    stopped = "" if pos is None else f" (stopped at byte {pos})"
    raise CorruptInput(f"records cannot be walked{stopped}", where)  # never: parse_records raised


def _be_int32(buf: np.ndarray, at: np.ndarray) -> np.ndarray:
    """Big-endian int32 at each byte offset ``at`` of a uint8 buffer."""
    b = buf[(at[:, None] + np.arange(4)).ravel()].reshape(-1, 4)
    return b.copy().view(">i4").ravel().astype(np.int64)


def record_arrays(data: bytes, where: str, allow_removals: bool) -> tuple[pa.Array, pa.Array, np.ndarray]:
    """(keys, values, removed) of one decompressed file, in file order; a removal has an empty value.

    The walk (:func:`record_starts`) finds the records; the compiled gather of :mod:`._framing`
    then copies the keys and the values into one buffer each, else :func:`_record_arrays_py`
    does it with whole-buffer numpy and Arrow operations (measured, the two alternating six times
    over 16 partitions of the 1M-key benchmark checkpoint: 1.30 -> 1.05 CPU us per row read).
    """
    starts = record_starts(data, where, allow_removals)
    large = len(data) >= 2**31
    if _framing is None:
        return _record_arrays_py(data, starts, large)
    koff, kdata, voff, vdata, removed = _framing.gather_records(data, starts, large)
    binary = pa.large_binary() if large else pa.binary()
    n = len(starts)
    keys = pa.Array.from_buffers(binary, n, [None, pa.py_buffer(koff), pa.py_buffer(kdata)])
    values = pa.Array.from_buffers(binary, n, [None, pa.py_buffer(voff), pa.py_buffer(vdata)])
    return keys, values, np.frombuffer(removed, dtype=np.bool_)


def _record_arrays_py(data: bytes, starts: np.ndarray, large: bool) -> tuple[pa.Array, pa.Array, np.ndarray]:
    """The gather of :func:`record_arrays` without the extension, and its reference: the buffer
    is viewed as one binary array whose elements alternate header / key / header / value (its
    offsets are the record boundaries), and the keys and values are gathered out of it by two
    ``take`` calls."""
    n = len(starts)
    buf = np.frombuffer(data, dtype=np.uint8)
    klen = _be_int32(buf, starts) if n else np.zeros(0, np.int64)
    vpos = starts + 4 + klen
    removed = (_be_int32(buf, vpos) < 0) if n else np.zeros(0, bool)
    bounds = np.empty(4 * n + 1, dtype=np.int64 if large else np.int32)
    bounds[0 : 4 * n : 4] = starts
    bounds[1 : 4 * n : 4] = starts + 4
    bounds[2 : 4 * n : 4] = vpos
    bounds[3 : 4 * n : 4] = vpos + 4
    bounds[4 * n] = len(data) - 4  # the end marker follows the last record
    elements = pa.Array.from_buffers(
        pa.large_binary() if large else pa.binary(), 4 * n, [None, pa.py_buffer(bounds), pa.py_buffer(data)]
    )
    keys = elements.take(pa.array(np.arange(1, 4 * n, 4, dtype=np.int64)))
    values = elements.take(pa.array(np.arange(3, 4 * n, 4, dtype=np.int64)))
    return keys, values, removed


def resolve_versions(
    files: list[tuple[pa.Array, pa.Array, np.ndarray]], key_order: bool = False
) -> tuple[pa.Array, pa.Array]:
    """The map after applying the files' records in order: the last write of each key wins and a
    removal drops the key (the engine's replay of a snapshot and its deltas). The survivors come
    out in the file order of their last write, or with ``key_order`` in byte-wise key order, which
    the sort below yields for free: a RocksDB target then needs no sort of its own
    (``rocksdb_db._write_run`` checks the order and skips it). File order is the default because
    gathering the rows in it reads the files' memory front to back (measured on 16 partitions of
    the 10M-key benchmark checkpoint, three alternating runs: a read in key order costs 0.70-0.76
    CPU us per row, in file order 0.59-0.73).

    With :mod:`._keysort` built, the records of all files are one array. In key order its
    ``last_of_each`` sorts them byte-wise and keeps the last position of each run of equal keys
    (measured on the 915k records of four 10M-key benchmark partitions, three alternating runs:
    0.32-0.37 CPU us per record by dictionary encoding, 0.23-0.26 by the sort). In file order its
    ``last_in_file_order`` looks each key up in a hash table instead (XXH3 of the system's
    libxxhash), reading the records from the last, and gives the positions already increasing:
    measured on the 1.37M records of six 10M-key benchmark partitions, three rounds in one
    process, 64-67 -> 27-31 ns per record for the last writes, 85-87 -> 46-49 for the whole replay
    with its two gathers (the sort's positions were sorted back into file order); a 10M convert
    heap map -> heap map, four alternating pairs of whole commands, 9.13 -> 7.92 CPU s (medians;
    ``benchmarks/results/2026-12-04-ab-hashed-replay.md``). Without
    libxxhash the sort serves both orders; without the extension,
    :func:`_resolve_versions_dictionary`, the reference.
    """
    return replay(combine_files(list(files)), key_order)


def _resolve_versions_dictionary(
    files: list[tuple[pa.Array, pa.Array, np.ndarray]], key_order: bool = False
) -> tuple[pa.Array, pa.Array]:
    """:func:`resolve_versions` without the compiled sort, and its reference."""
    return _replay(combine_files(list(files)), _last_writes_dictionary, key_order)


def _resolve_versions_sorted(
    files: list[tuple[pa.Array, pa.Array, np.ndarray]], key_order: bool = False
) -> tuple[pa.Array, pa.Array]:
    """:func:`resolve_versions` by the compiled sort in both orders (as without libxxhash)."""
    return _replay(combine_files(list(files)), _last_writes_sorted, key_order)


def combine_files(files: list[tuple[pa.Array, pa.Array, np.ndarray]]) -> list:
    """The [keys, values, removed] of every file's records, one after the other, as one array
    each. ``files`` is emptied, and each file's keys are let go once the keys are joined, before
    the values are: with no other holder, the per-file arrays and the joined copy are never all
    alive at once. Measured on one 10M-key benchmark partition read in key order (Arrow's
    ``system`` pool, its ``max_memory``): 38.7 -> 28.6 MB, the peak now about one copy of the
    records plus one side (keys or values) of them. Whole commands at 10M keys, two alternating
    pairs (``benchmarks/results/2026-12-03-ab-replay-memory.md``): the process tree 309-310 ->
    280-296 MB (export) and 291-292 -> 265-280 MB (convert to RocksDB), CPU within the noise."""
    if not files:
        return [pa.array([], pa.binary()), pa.array([], pa.binary()), np.zeros(0, dtype=bool)]
    total = max(sum(_data_bytes(f[0]) for f in files), sum(_data_bytes(f[1]) for f in files))
    large = total > OFFSET_LIMIT or any(pa.types.is_large_binary(f[0].type) for f in files)
    key_type = pa.large_binary() if large else pa.binary()
    per_file_keys = [f[0] for f in files]
    per_file_values = [f[1] for f in files]
    removed = np.concatenate([f[2] for f in files])
    files.clear()
    keys, values = _join(per_file_keys, key_type), _join(per_file_values, key_type)
    return [keys, values, removed]


def _data_bytes(arr: pa.Array) -> int:
    """The bytes of a binary array's elements (its offsets' span: the array may be a slice)."""
    offs, _ = _offsets(arr)
    return int(offs[-1] - offs[0])


def gather_files(parts: list[tuple[bytes | bytearray, np.ndarray]]) -> list:
    """What :func:`combine_files` returns, straight from the decompressed files: ``parts`` holds
    each file's bytes and :func:`record_starts`, in chain order, and is emptied file by file as
    the compiled ``_framing.gather_files`` copies the records into buffers sized for all of them
    (int64 offsets only when the keys or the values of all files reach 2 GiB). Each record is
    copied once where :func:`record_arrays` per file and the join copied it twice, and a file's
    bytes go as soon as its records are out, so the peak holds the files' bytes and one copy of
    the records, not the records twice."""
    koff, kdata, voff, vdata, removed, large = _framing.gather_files(parts, OFFSET_LIMIT)
    binary = pa.large_binary() if large else pa.binary()
    n = len(removed)
    keys = pa.Array.from_buffers(binary, n, [None, pa.py_buffer(koff), pa.py_buffer(kdata)])
    values = pa.Array.from_buffers(binary, n, [None, pa.py_buffer(voff), pa.py_buffer(vdata)])
    return [keys, values, np.frombuffer(removed, dtype=np.bool_)]


def _join(arrays: list[pa.Array], binary: pa.DataType) -> pa.Array:
    """One array of ``arrays`` in order; ``arrays`` is emptied once the copy exists. A single
    array is returned as it is (Arrow's ``combine_chunks`` copies even one chunk: 0.87 ms per
    200k 40-byte elements, measured), as when a snapshot the tool wrote is read back."""
    if len(arrays) == 1:
        joined = arrays[0].cast(binary)  # the same type: no copy
    else:
        joined = pa.chunked_array([a.cast(binary) for a in arrays], binary).combine_chunks()
    arrays.clear()
    return joined


def replay(combined: list, key_order: bool = False) -> tuple[pa.Array, pa.Array]:
    """:func:`resolve_versions` over records already combined by :func:`combine_files` (the list
    is emptied)."""
    if _keysort is None:
        return _replay(combined, _last_writes_dictionary, key_order)
    if not key_order and _HASHED and len(combined[0]) < _HASHED_MAX:
        return _replay(combined, _last_writes_hashed, key_order, in_file_order=True)
    return _replay(combined, _last_writes_sorted, key_order)


def _replay(
    combined: list, last_writes: Callable[[pa.Array], np.ndarray], key_order: bool, in_file_order: bool = False
) -> tuple[pa.Array, pa.Array]:
    """The replay with ``last_writes`` (the position of each distinct key's last record, in
    byte-wise order of the keys; with ``in_file_order``, in increasing order of position: then
    ``key_order`` must be false) over the combined records of all files. ``combined`` is emptied:
    the joined keys go once the survivors' keys are copied, before the values are."""
    keys, values, removed = combined
    combined.clear()
    if not len(keys):
        return keys, values
    survivors = last_writes(keys)
    survivors = survivors[~removed[survivors]]
    del removed
    if not key_order and not in_file_order:
        survivors = np.sort(survivors)
    if len(survivors) == len(keys) and (len(keys) < 2 or bool((np.diff(survivors) > 0).all())):
        return keys, values  # every record survives, and the files hold them in the order asked for
    keys = take(keys, survivors)
    return keys, take(values, survivors)


def batch_bounds(keys: pa.Array, values: pa.Array) -> Iterator[tuple[int, int]]:
    """[start, end) row ranges of the batches a read hands on: BATCH_ROWS rows each, and for
    arrays with int64 offsets (a chain of more than 2 GiB) also at most BATCH_BYTES of keys and of
    values (or one row), so each batch can be cast to ``binary``, whose offsets are int32 (a
    record's key and value each hold less than 2 GiB: their lengths are int32 in the file)."""
    n = len(keys)
    if not pa.types.is_large_binary(keys.type) and not pa.types.is_large_binary(values.type):
        yield from ((i, min(i + BATCH_ROWS, n)) for i in range(0, n, BATCH_ROWS))
        return
    (ko, _), (vo, _) = _offsets(keys), _offsets(values)
    i = 0
    while i < n:
        j = min(i + BATCH_ROWS, n)
        if ko[j] - ko[i] > BATCH_BYTES or vo[j] - vo[i] > BATCH_BYTES:
            fits = min(np.searchsorted(ko, ko[i] + BATCH_BYTES, "right"), np.searchsorted(vo, vo[i] + BATCH_BYTES, "right"))
            j = max(i + 1, min(j, int(fits) - 1))
        yield i, j
        i = j


def take(arr: pa.Array, positions: np.ndarray) -> pa.Array:
    """The elements of a binary array at ``positions`` (int64), in that order: by the compiled
    gather of :mod:`._framing` when it is built, else Arrow's ``take`` (the reference). The
    survivors of a replay in key order lie scattered over the records; the compiled gather asks
    for each element's memory a few elements ahead. Measured on the survivors of six 10M-key
    benchmark partitions (keys and values), alternating four rounds in one process: 0.126-0.167
    -> 0.087-0.093 CPU us per row."""
    if _framing is None or not plain_binary(arr):
        return arr.take(pa.array(positions, pa.int64()))
    positions = np.ascontiguousarray(positions, dtype=np.int64)
    offsets, data = _framing.take_binary(*binary_args(arr), len(arr), positions)
    return pa.Array.from_buffers(arr.type, len(positions), [None, pa.py_buffer(offsets), pa.py_buffer(data)])


def _last_writes_hashed(keys: pa.Array) -> np.ndarray:
    """By the compiled hash table: ``_keysort.last_in_file_order`` (positions increasing)."""
    offsets, data, offset, large = binary_args(keys)
    return np.frombuffer(_keysort.last_in_file_order(offsets, data, offset, len(keys), large), dtype=np.int64)


def _last_writes_sorted(keys: pa.Array) -> np.ndarray:
    """By the compiled sort: ``_keysort.last_of_each``."""
    offsets, data, offset, large = binary_args(keys)
    return np.frombuffer(_keysort.last_of_each(offsets, data, offset, len(keys), large), dtype=np.int64)


def _last_writes_dictionary(keys: pa.Array) -> np.ndarray:
    """By dictionary encoding, the reference. The records are numbered newest first and
    dictionary-encoded: a key's id is the order of its first appearance there, so the record where
    the running maximum of the ids grows is the newest write of a new key. One hash pass (Arrow's
    dictionary encoding) and whole-array numpy; measured against the hash aggregation it replaced
    (``Table.group_by``) on one 10M-key benchmark partition, each in a fresh process: the same
    CPU time (86-104 vs 97-106 ms) and 18 MB less peak memory; and no ``pyarrow.acero``, whose
    import brings ``pyarrow.dataset``. The positions are then put in key order by Arrow's sort.
    """
    total = len(keys)
    encoded = pc.dictionary_encode(keys.take(pa.array(np.arange(total - 1, -1, -1, dtype=np.int64))))
    if len(encoded.dictionary) == total:  # every key once
        return pc.sort_indices(keys).to_numpy().astype(np.int64)
    ids = encoded.indices.to_numpy()
    newest = np.flatnonzero(np.diff(np.maximum.accumulate(ids), prepend=-1) > 0)  # first appearances
    last = (total - 1) - newest  # as positions in file order
    return last[pc.sort_indices(keys.take(pa.array(last))).to_numpy().astype(np.int64)]  # in byte-wise key order


def frame_records(batches: Iterable[pa.RecordBatch]) -> bytes:
    """Records of every row plus the end marker, uncompressed, as one buffer."""
    return b"".join(framed_parts(batches))


def framed_parts(batches: Iterable[pa.RecordBatch]) -> Iterator[bytes]:
    """The records of each batch as it comes (framed per batch), then the end marker: what
    :func:`frame_records` joins, for a codec that compresses part by part
    (:func:`~migrate.codecs.compress_parts`), so the file's records are never held joined."""
    for batch in batches:
        if batch.num_rows:
            yield _frame_batch(batch)
    yield _END


def _offsets(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    arr = arr.cast(pa.large_binary()) if pa.types.is_binary(arr.type) else arr
    _, off_buf, data_buf = arr.buffers()
    offs = np.frombuffer(off_buf, dtype=np.int64, count=len(arr) + 1, offset=arr.offset * 8)
    data = np.frombuffer(data_buf, dtype=np.uint8) if data_buf is not None else np.zeros(0, np.uint8)
    return offs, data


def _frame_batch(batch: pa.RecordBatch) -> bytes:
    """The records of one batch without the end marker: by the compiled ``frame_records`` of
    :mod:`._framing` when it is built, else :func:`_frame_batch_py` (the reference). Measured on
    four 156k-row partitions of the 10M-key benchmark checkpoint, four alternating runs:
    0.67-0.76 CPU us per row with numpy, 0.022-0.025 compiled."""
    keys, values = batch.column("key"), batch.column("value")
    if _framing is None or not (plain_binary(keys) and plain_binary(values)):
        return _frame_batch_py(batch)
    return _framing.frame_records(*binary_args(keys), *binary_args(values), batch.num_rows)


def _frame_batch_py(batch: pa.RecordBatch) -> bytes:
    koffs, kdata = _offsets(batch.column("key"))
    voffs, vdata = _offsets(batch.column("value"))
    klen = np.diff(koffs)
    vlen = np.diff(voffs)
    rec = 8 + klen + vlen
    starts = np.concatenate(([0], np.cumsum(rec)[:-1]))
    out = np.empty(int(rec.sum()), dtype=np.uint8)
    _put_int32_be(out, starts, klen)
    _put_int32_be(out, starts + 4 + klen, vlen)
    kpos = np.repeat(starts + 4 - koffs[:-1], klen) + np.arange(int(koffs[0]), int(koffs[-1]))
    out[kpos] = kdata[int(koffs[0]) : int(koffs[-1])]
    vpos = np.repeat(starts + 8 + klen - voffs[:-1], vlen) + np.arange(int(voffs[0]), int(voffs[-1]))
    out[vpos] = vdata[int(voffs[0]) : int(voffs[-1])]
    return out.tobytes()


def _put_int32_be(out: np.ndarray, at: np.ndarray, values: np.ndarray) -> None:
    out[(at[:, None] + np.arange(4)).ravel()] = values.astype(">i4").view(np.uint8)


class HDFSProvider(Provider):
    name = "hdfs"
    class_names = ("org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider",)

    @staticmethod
    def _files(listing: dict[str, Entry], where: str) -> tuple[dict[int, str], dict[int, str]]:
        deltas: dict[int, str] = {}
        snapshots: dict[int, str] = {}
        for name in listing:
            m = _FILE.match(name)
            if not m:
                continue
            if m.group(2):
                raise Unsupported(
                    f"heap-map state file {name} carries a unique id (state checkpoint format 2), which the engine "
                    "never writes for the heap map (it refuses that format: STATE_STORE_CHECKPOINT_IDS_NOT_SUPPORTED, "
                    "observed on 4.3.0); not a layout this tool reads", where
                )
            (deltas if m.group(3) == "delta" else snapshots)[int(m.group(1))] = name
        return deltas, snapshots

    def versions(self, listing: dict[str, Entry]) -> list[int]:
        deltas, snapshots = self._files(listing, "")
        return sorted(set(deltas) | set(snapshots))

    def chain(self, store: StoreDir, version: int, listing: dict[str, Entry]) -> list[str]:
        """File names to read, oldest first: newest snapshot <= version, then its deltas."""
        deltas, snapshots = self._files(listing, store.describe())
        base = max((v for v in snapshots if v <= version), default=0)
        names = [snapshots[base]] if base else []
        for v in range(base + 1, version + 1):
            if v not in deltas:
                have = ", ".join(sorted(listing)) or "no files"
                raise CorruptInput(
                    f"cannot rebuild version {version}: {v}.delta is missing (gap in the delta chain after "
                    f"{'snapshot ' + str(base) if base else 'the start'}; found: {have[:200]})",
                    store.describe(),
                )
            names.append(deltas[v])
        return names

    def _listing(self, store: StoreDir, ctx: ReadContext) -> dict[str, Entry]:
        return ctx.listing if ctx.listing is not None else store.location.list_dir(store.rel)

    def source_files(self, store: StoreDir, version: int, ctx: ReadContext) -> list[WrittenFile]:
        listing = self._listing(store, ctx)
        return [WrittenFile(f"{store.rel}/{n}", listing[n].size) for n in self.chain(store, version, listing)]

    def read_file(self, store: StoreDir, name: str, codec: str, listing: dict[str, Entry]) -> bytes:
        rel = f"{store.rel}/{name}"
        where = store.describe(name)
        raw = store.location.read_bytes(rel)
        crc = crc_name(name)
        if crc in listing:
            verify_crc(raw, store.location.read_bytes(f"{store.rel}/{crc}"), where)
        return codec_of_stream(raw, codec, where).decompress(raw, where)  # older versions may use another codec

    def read(self, store: StoreDir, version: int, ctx: ReadContext) -> Iterator[pa.RecordBatch]:
        if version == 0:
            return
        listing = self._listing(store, ctx)
        names = self.chain(store, version, listing)
        if _framing is not None:  # every file walked, then all records copied once into one array each
            parts = []
            for name in names:
                data = self.read_file(store, name, ctx.codec, listing)
                parts.append((data, record_starts(data, store.describe(name), allow_removals=name.endswith(".delta"))))
                del data
            combined = gather_files(parts)
        else:  # each decompressed file is held only until its records are copied out
            files = []
            for name in names:
                data = self.read_file(store, name, ctx.codec, listing)
                files.append(record_arrays(data, store.describe(name), allow_removals=name.endswith(".delta")))
                del data
            combined = combine_files(files)
        keys, values = replay(combined, ctx.key_order)  # replay and both joins empty what they are given
        for i, j in batch_bounds(keys, values):
            k, v = keys.slice(i, j - i), values.slice(i, j - i)
            if k.type != pa.binary():
                k, v = k.cast(pa.binary()), v.cast(pa.binary())
            yield pa.RecordBatch.from_arrays([k, v], schema=ROW_SCHEMA)

    def write(
        self, store: StoreDir, version: int, batches: Iterable[pa.RecordBatch], ctx: WriteContext
    ) -> list[WrittenFile]:
        name = f"{version}.snapshot"
        where = store.describe(name)
        data = compress_parts(codec_for(ctx.codec, where), framed_parts(batches))
        crc_rel = f"{store.rel}/{crc_name(name)}"
        # never leave a stale sidecar beside a rewritten file: drop it before the data changes
        # (sidecars only live on local disk; on object stores this would be a wasted DELETE)
        if ctx.write_crc or store.location.is_local:
            store.location.remove(crc_rel)
        store.location.write_bytes(f"{store.rel}/{name}", data)
        written = [WrittenFile(f"{store.rel}/{name}", len(data))]
        if ctx.write_crc:
            crc = make_crc(data)
            store.location.write_bytes(crc_rel, crc)
            written.append(WrittenFile(crc_rel, len(crc)))
        return written
