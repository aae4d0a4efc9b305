"""The heap-map provider layout: ``<v>.delta`` and ``<v>.snapshot`` files per store partition.

Each file is one compressed stream (codec from the pinned conf, lz4 by default) of records::

    int32 BE key length, key bytes, int32 BE value length, value bytes   -- an update
    int32 BE key length, key bytes, int32 BE -1                          -- a removal (deltas)
    int32 BE -1                                                          -- end of file

Version V is the newest snapshot S <= V (or the empty map when there is none) plus the deltas
S+1..V applied in order. A missing delta in that chain is an error, never a partial state.
"""

from __future__ import annotations

import re
import struct
from collections.abc import Iterable, Iterator

import numpy as np
import pyarrow as pa

from ..codecs import codec_for
from ..codecs.hadoop_crc import crc_name, make_crc, verify_crc
from ..errors import CorruptInput, Unsupported
from ..storage import Entry
from .base import BATCH_ROWS, ROW_SCHEMA, Provider, ReadContext, StoreDir, WriteContext, WrittenFile

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


def frame_records(batches: Iterable[pa.RecordBatch]) -> bytes:
    """Records of every row plus the end marker, uncompressed (vectorised per batch)."""
    parts: list[bytes] = []
    for batch in batches:
        if batch.num_rows == 0:
            continue
        parts.append(_frame_batch(batch))
    parts.append(_END)
    return b"".join(parts)


def _offsets(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    arr = arr.cast(pa.large_binary()) if pa.types.is_binary(arr.type) else arr
    _, off_buf, data_buf = arr.buffers()
    offs = np.frombuffer(off_buf, dtype=np.int64, count=len(arr) + 1, offset=arr.offset * 8)
    data = np.frombuffer(data_buf, dtype=np.uint8) if data_buf is not None else np.zeros(0, np.uint8)
    return offs, data


def _frame_batch(batch: pa.RecordBatch) -> bytes:
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
                    f"state file {name} carries a unique id (newer checkpoint format); not supported yet", where
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
        return codec_for(codec, where).decompress(raw, where)

    def read(self, store: StoreDir, version: int, ctx: ReadContext) -> Iterator[pa.RecordBatch]:
        if version == 0:
            return
        listing = self._listing(store, ctx)
        names = self.chain(store, version, listing)
        state: dict[bytes, bytes] = {}
        for name in names:
            data = self.read_file(store, name, ctx.codec, listing)
            is_delta = name.endswith(".delta")
            for key, value in parse_records(data, store.describe(name), allow_removals=is_delta):
                if value is None:
                    state.pop(key, None)
                else:
                    state[key] = value
        keys = list(state.keys())
        values = list(state.values())
        del state
        for i in range(0, len(keys), BATCH_ROWS):
            yield pa.RecordBatch.from_arrays(
                [pa.array(keys[i : i + BATCH_ROWS], pa.binary()), pa.array(values[i : i + BATCH_ROWS], pa.binary())],
                schema=ROW_SCHEMA,
            )

    def write(
        self, store: StoreDir, version: int, batches: Iterable[pa.RecordBatch], ctx: WriteContext
    ) -> list[WrittenFile]:
        name = f"{version}.snapshot"
        where = store.describe(name)
        data = codec_for(ctx.codec, where).compress(frame_records(batches))
        crc_rel = f"{store.rel}/{crc_name(name)}"
        # never leave a stale sidecar beside a rewritten file: drop it before the data changes
        store.location.remove(crc_rel)
        store.location.write_bytes(f"{store.rel}/{name}", data)
        written = [WrittenFile(f"{store.rel}/{name}", len(data))]
        if ctx.write_crc:
            crc = make_crc(data)
            store.location.write_bytes(crc_rel, crc)
            written.append(WrittenFile(crc_rel, len(crc)))
        return written
