"""The engine's LZ4 stream: lz4-java's ``LZ4BlockOutputStream`` framing around LZ4 blocks.

The LZ4 block compression itself is the ``lz4.block`` library; this module only owns the framing,
as observed in state files written by Spark 4.3.0 (``spark.io.compression.lz4.blockSize`` 32 KiB):

    block  = "LZ4Block"                      8 bytes magic
             token                           1 byte: method | level
                                             method 0x10 RAW (stored), 0x20 LZ4
                                             level = log2(block size) - 10 (5 for 32 KiB)
             compressed length               int32 little-endian
             original length                 int32 little-endian (<= 1 << (level + 10))
             checksum                        int32 little-endian: xxHash32 (seed 0x9747b28c) of the
                                             original bytes, masked with 0x0FFFFFFF
             payload                         compressed length bytes
    stream = block* end-mark                 end mark: a header with method RAW and three zeros

The reader also accepts several such streams back to back, as the engine's reader does (it reads
on after an end mark). It rejects everything else: a missing end mark (truncation), trailing bytes
that are not another stream, bad lengths, failed checksums.

A well-formed stream is decoded by the compiled helper ``_lz4stream`` when it is built and the
system's liblz4 and libxxhash load (one pass, every block straight into the output); anything it
does not take, and every stream when it is not there, goes through :meth:`Lz4BlockStream._decompress_py`,
the reference, which also names what is wrong with a bad stream. Streams are written by the same
helper part by part (:meth:`Lz4BlockStream.compress_parts`), else by
:meth:`Lz4BlockStream._compress_py`, the reference.
"""

from __future__ import annotations

import struct
from collections.abc import Iterable
from dataclasses import dataclass

import lz4.block
import xxhash

from ..errors import CorruptInput

try:  # the compiled decoder (setup.py builds it when a C compiler is there; it loads liblz4 and libxxhash)
    from . import _lz4stream
except ImportError:  # not built: the Python decoder below
    _lz4stream = None
if _lz4stream is not None and not _lz4stream.available():  # built, but the system's libraries did not load
    _lz4stream = None

MAGIC = b"LZ4Block"
HEADER = struct.Struct("<8sBiiI")  # magic, token, compressed length, original length, checksum
HEADER_LEN = HEADER.size  # 21
METHOD_RAW = 0x10
METHOD_LZ4 = 0x20
LEVEL_BASE = 10
XXHASH_SEED = 0x9747B28C  # lz4-java's default seed for this stream (observed: matches engine files)
CHECKSUM_MASK = 0x0FFFFFFF  # lz4-java's Checksum view of xxHash32 keeps 28 bits (observed)
DEFAULT_BLOCK_SIZE = 32 * 1024  # the engine's spark.io.compression.lz4.blockSize default
MIN_BLOCK_SIZE = 64
MAX_BLOCK_SIZE = 1 << 25


def block_checksum(raw: bytes | memoryview) -> int:
    """The checksum stored in a block header for these original bytes."""
    return xxhash.xxh32_intdigest(raw, seed=XXHASH_SEED) & CHECKSUM_MASK


def level_for(block_size: int) -> int:
    """The token's level nibble for a block size (lz4-java: ceil(log2(size)) - 10, at least 0)."""
    return max(0, (block_size - 1).bit_length() - LEVEL_BASE)


@dataclass(frozen=True)
class Lz4BlockStream:
    """lz4-java block stream, as the engine's ``LZ4CompressionCodec`` reads and writes it."""

    name: str = "lz4"
    block_size: int = DEFAULT_BLOCK_SIZE

    def __post_init__(self) -> None:
        if not MIN_BLOCK_SIZE <= self.block_size <= MAX_BLOCK_SIZE:
            raise ValueError(f"lz4 block size must be in [{MIN_BLOCK_SIZE}, {MAX_BLOCK_SIZE}], got {self.block_size}")

    def decompress(self, data: bytes, where: str) -> bytearray:
        """The stream's bytes, each block checked: by the compiled decoder when it is loaded and
        takes the stream, else (and to name the problem of a bad stream) by :meth:`_decompress_py`."""
        if _lz4stream is not None:
            out = _lz4stream.decompress(data, XXHASH_SEED, CHECKSUM_MASK)
            if out is not None:
                return out
        return self._decompress_py(data, where)

    def _decompress_py(self, data: bytes, where: str) -> bytearray:
        """The reference decoder: each block decompressed by ``lz4.block``, checked by ``xxhash``,
        and appended to one growing buffer (a list of blocks joined at the end held the output
        twice at its peak)."""
        view = memoryview(data)
        total = len(view)
        out = bytearray()
        pos = 0
        ended = False
        while pos < total:
            if total - pos < HEADER_LEN:
                raise CorruptInput(f"lz4 stream: truncated block header at offset {pos}", where)
            magic, token, comp_len, orig_len, check = HEADER.unpack_from(view, pos)
            if magic != MAGIC:
                what = "trailing bytes after end of stream" if ended else "bad block magic"
                raise CorruptInput(f"lz4 stream: {what} at offset {pos}", where)
            method = token & 0xF0
            max_len = 1 << (LEVEL_BASE + (token & 0x0F))
            bad = (
                method not in (METHOD_RAW, METHOD_LZ4)
                or comp_len < 0
                or orig_len < 0
                or orig_len > max_len
                or (orig_len == 0) != (comp_len == 0)
                or (method == METHOD_RAW and orig_len != comp_len)
            )
            if bad:
                raise CorruptInput(
                    f"lz4 stream: bad block header at offset {pos} "
                    f"(token 0x{token:02x}, compressed {comp_len}, original {orig_len})",
                    where,
                )
            body = pos + HEADER_LEN
            if orig_len == 0:  # end mark
                if check != 0:
                    raise CorruptInput(f"lz4 stream: end mark with non-zero checksum at offset {pos}", where)
                ended = True
                pos = body
                continue
            ended = False
            if total - body < comp_len:
                raise CorruptInput(
                    f"lz4 stream: truncated block at offset {pos} (needs {comp_len} bytes, {total - body} left)",
                    where,
                )
            payload = view[body : body + comp_len]
            if method == METHOD_RAW:
                raw = bytes(payload)
            else:
                try:
                    raw = lz4.block.decompress(payload, uncompressed_size=orig_len)
                except lz4.block.LZ4BlockError as exc:
                    raise CorruptInput(
                        f"lz4 stream: block at offset {pos} does not decompress ({exc})", where
                    ) from None
                if len(raw) != orig_len:
                    raise CorruptInput(
                        f"lz4 stream: block at offset {pos} decompresses to {len(raw)} bytes, header says {orig_len}",
                        where,
                    )
            if block_checksum(raw) != check:
                raise CorruptInput(f"lz4 stream: checksum mismatch in block at offset {pos}", where)
            out += raw
            pos = body + comp_len
        if not ended:
            raise CorruptInput("lz4 stream: missing end mark (file truncated?)", where)
        return out

    def compress(self, data: bytes) -> bytes:
        return self.compress_parts([data])

    def compress_parts(self, parts: Iterable[bytes | bytearray | memoryview]) -> bytes:
        """The stream of the parts' bytes one after the other, blocks spanning parts as if they were
        joined. By the compiled writer when it is loaded: each part is compressed as it comes, its
        last short block carried into the next, so the input is never held joined; else the parts
        are joined for :meth:`_compress_py`, the reference. Measured on the 10M-key convert
        RocksDB -> heap map, five alternating pairs of whole commands: 8.69 -> 7.97 CPU s, the
        largest process 118-126 -> 105-111 MB (benchmarks/results/2026-12-04-ab-lz4-compress.md)."""
        if _lz4stream is None:
            return self._compress_py(b"".join(parts))
        level = level_for(self.block_size)
        out: list[bytes] = []
        tail = b""
        for part in parts:
            blocks, tail = _lz4stream.compress(tail, part, self.block_size, level, XXHASH_SEED, CHECKSUM_MASK, False)
            if blocks:
                out.append(blocks)
        blocks, _ = _lz4stream.compress(tail, b"", self.block_size, level, XXHASH_SEED, CHECKSUM_MASK, True)
        out.append(blocks)
        return out[0] if len(out) == 1 else b"".join(out)

    def _compress_py(self, data: bytes) -> bytes:
        """The reference writer: each block by ``lz4.block``, its checksum by ``xxhash``."""
        level = level_for(self.block_size)
        view = memoryview(data)
        out: list[bytes] = []
        for start in range(0, len(view), self.block_size):
            raw = view[start : start + self.block_size]
            packed = lz4.block.compress(raw, store_size=False)
            if len(packed) >= len(raw):  # like lz4-java: store blocks that do not shrink
                method, payload = METHOD_RAW, bytes(raw)
            else:
                method, payload = METHOD_LZ4, packed
            out.append(HEADER.pack(MAGIC, method | level, len(payload), len(raw), block_checksum(raw)))
            out.append(payload)
        out.append(HEADER.pack(MAGIC, METHOD_RAW | level, 0, 0, 0))
        return b"".join(out)
