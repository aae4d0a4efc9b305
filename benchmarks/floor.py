"""The floor of a benchmark case: move the same bytes without decoding anything.

For one case the floor reads every source file the tool reads, decompresses it with the same
library, and writes as many bytes as the tool wrote into as many files (each fsync'd, as the
tool's storage layer does), partition by partition over the same number of worker processes.
Nothing is parsed beyond what decompression needs:

* heap-map files: the lz4-java block framing (21-byte headers) around ``lz4.block`` payloads;
  checksums are not verified (the tool verifies them, so the floor is lower than the tool);
* RocksDB table files: footer -> index block -> each data block, LZ4-decompressed (block-based
  table layout as written by RocksDB 9.8, format_version 5: from memory of the published
  format description, checked here only by decompressing to the sizes the blocks announce);
  the version zip is read and inflated with ``zipfile``;
* Parquet archive files: ``pyarrow.parquet`` reads the raw ``key``/``value`` columns (page
  decompression plus plain binary pages, the minimum pyarrow offers).

Run by ``benchmarks.run`` as its own subprocess, like the tool, so both are measured alike.
"""

from __future__ import annotations

import argparse
import json
import os
import struct
import sys
import zipfile
from concurrent.futures import ProcessPoolExecutor
from io import BytesIO
from multiprocessing import get_context

import lz4.block

LZ4_HEADER = struct.Struct("<8sBiiI")
SST_MAGIC = 0x88E241B785F4CFF7
SST_FOOTER = 53  # checksum type, two handles padded to 40 bytes, format version, magic
LZ4_TYPE = 0x04
NO_COMPRESSION = 0x00


def lz4_stream_bytes(data: bytes) -> int:
    """Decompress an lz4-java block stream; return the decompressed size."""
    view = memoryview(data)
    pos = total = 0
    while pos < len(view):
        _, token, clen, olen, _ = LZ4_HEADER.unpack_from(view, pos)
        pos += LZ4_HEADER.size
        if olen:
            payload = view[pos : pos + clen]
            total += len(payload) if token & 0xF0 == 0x10 else len(lz4.block.decompress(payload, uncompressed_size=olen))
        pos += clen
    return total


def _varint(buf: bytes | memoryview, pos: int) -> tuple[int, int]:
    shift = value = 0
    while True:
        b = buf[pos]
        pos += 1
        value |= (b & 0x7F) << shift
        if b < 0x80:
            return value, pos
        shift += 7


def _block(data: bytes, offset: int, size: int) -> bytes:
    """Contents of one table block, decompressed (the 5-byte trailer holds the type)."""
    kind = data[offset + size]
    raw = data[offset : offset + size]
    if kind == NO_COMPRESSION:
        return raw
    if kind != LZ4_TYPE:
        raise ValueError(f"block compression type {kind} is not handled by the floor")
    n, start = _varint(raw, 0)
    return lz4.block.decompress(raw[start:], uncompressed_size=n)


def sst_bytes(data: bytes) -> int:
    """Decompress every data block of a block-based table file; return the decompressed size."""
    (magic,) = struct.unpack_from("<Q", data, len(data) - 8)
    if magic != SST_MAGIC:
        raise ValueError("not a block-based table file")
    footer = len(data) - SST_FOOTER
    pos = footer + 1
    _, pos = _varint(data, pos)  # metaindex offset
    _, pos = _varint(data, pos)  # metaindex size
    index_offset, pos = _varint(data, pos)
    index_size, pos = _varint(data, pos)
    index = _block(data, index_offset, index_size)
    (restarts,) = struct.unpack_from("<I", index, len(index) - 4)
    restarts &= 0x7FFFFFFF
    end = len(index) - 4 * (restarts + 1)
    points = set(struct.unpack_from(f"<{restarts}I", index, end))
    pos = total = 0
    handle_offset = handle_size = 0
    while pos < end:  # index entries: shared, non-shared, key delta, block handle (delta-encoded)
        at = pos
        _, pos = _varint(index, pos)
        non_shared, pos = _varint(index, pos)
        pos += non_shared
        if at in points:
            handle_offset, pos = _varint(index, pos)
            handle_size, pos = _varint(index, pos)
        else:  # not a restart point: only the size delta, the block follows the previous one
            delta, pos = _varint(index, pos)
            handle_offset += handle_size + 5
            handle_size += (delta >> 1) ^ -(delta & 1)
        total += len(_block(data, handle_offset, handle_size))
    return total


def zip_bytes(data: bytes) -> int:
    with zipfile.ZipFile(BytesIO(data)) as z:
        return sum(len(z.read(i)) for i in z.infolist())


def parquet_bytes(path: str) -> int:
    import pyarrow.parquet as pq

    table = pq.read_table(path, columns=["key", "value"], use_threads=False)
    return table.nbytes


def read_one(path: str) -> int:
    name = os.path.basename(path)
    if name.endswith(".parquet"):
        return parquet_bytes(path)
    with open(path, "rb") as f:
        data = f.read()
    if name.endswith((".delta", ".snapshot")):
        return lz4_stream_bytes(data)
    if name.endswith(".sst"):
        return sst_bytes(data)
    if name.endswith(".zip"):
        return zip_bytes(data)
    return len(data)


def floor_partition(task: tuple[list[str], list[int], str]) -> int:
    """Read + decompress one partition's source files, then write its target byte counts."""
    sources, target_sizes, scratch = task
    raw = sum(read_one(p) for p in sources)
    os.makedirs(scratch, exist_ok=True)
    for i, size in enumerate(target_sizes):
        path = os.path.join(scratch, f"out-{i}")
        with open(path, "wb") as f:
            chunk = b"\x5a" * min(size, 1 << 20)
            left = size
            while left > 0:
                f.write(chunk[: min(left, len(chunk))])
                left -= len(chunk)
            f.flush()
            os.fsync(f.fileno())
    return raw


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.floor")
    ap.add_argument("plan", help="JSON file: {'jobs': N, 'tasks': [[sources], [target sizes], scratch]...}")
    args = ap.parse_args(argv)
    with open(args.plan) as f:
        plan = json.load(f)
    tasks = [tuple(t) for t in plan["tasks"]]
    if plan["jobs"] <= 1:
        raw = sum(floor_partition(t) for t in tasks)
    else:
        with ProcessPoolExecutor(max_workers=plan["jobs"], mp_context=get_context("spawn")) as pool:
            raw = sum(pool.map(floor_partition, tasks))
    print(json.dumps({"decompressed_bytes": raw}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
