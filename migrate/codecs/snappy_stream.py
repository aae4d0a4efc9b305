"""The engine's snappy stream: snappy-java's ``SnappyOutputStream`` framing around raw snappy blocks.

Raw snappy (de)compression is the ``cramjam`` library; this module only owns the framing, as
observed in state files written by Spark 4.3.0 (``spark.io.compression.snappy.blockSize`` 32 KiB):

    stream = header chunk*
    header = 82 53 4e 41 50 50 59 00         8 bytes magic: 0x82 "SNAPPY" 0x00
             00 00 00 01                     int32 big-endian stream version (1)
             00 00 00 01                     int32 big-endian minimum compatible version (1)
    chunk  = length                          int32 big-endian, > 0
             raw snappy block                ``length`` bytes; each holds up to 32 KiB of input

There is no end mark and no checksum: a file cut exactly at a chunk boundary cannot be told from a
shorter one. The engine's reader accepts a second header where a chunk length is expected
(concatenated streams) and reads an empty file as empty; this reader does the same and rejects
everything else with :class:`~migrate.errors.CorruptInput`.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass

import cramjam

from ..errors import CorruptInput

MAGIC = b"\x82SNAPPY\x00"
HEADER = struct.Struct(">8sii")  # magic, version, minimum compatible version
HEADER_LEN = HEADER.size  # 16
VERSION = 1
COMPATIBLE_VERSION = 1
LENGTH = struct.Struct(">i")
MAGIC_HEAD = LENGTH.unpack(MAGIC[:4])[0]  # what a chunk length reads as when a header follows
DEFAULT_BLOCK_SIZE = 32 * 1024  # the engine's spark.io.compression.snappy.blockSize default


@dataclass(frozen=True)
class SnappyStream:
    """snappy-java stream, as the engine's ``SnappyCompressionCodec`` reads and writes it."""

    name: str = "snappy"
    block_size: int = DEFAULT_BLOCK_SIZE

    def decompress(self, data: bytes, where: str) -> bytes:
        view = memoryview(data)
        total = len(view)
        if total == 0:
            return b""
        _check_header(view, 0, where)
        parts: list[bytes] = []
        pos = HEADER_LEN
        while pos < total:
            if total - pos < LENGTH.size:
                raise CorruptInput(f"snappy stream: truncated chunk length at offset {pos}", where)
            (length,) = LENGTH.unpack_from(view, pos)
            if length == MAGIC_HEAD:  # another stream's header: concatenated streams
                _check_header(view, pos, where)
                pos += HEADER_LEN
                continue
            if length <= 0:
                raise CorruptInput(f"snappy stream: bad chunk length {length} at offset {pos}", where)
            body = pos + LENGTH.size
            if total - body < length:
                raise CorruptInput(
                    f"snappy stream: truncated chunk at offset {pos} (needs {length} bytes, {total - body} left)",
                    where,
                )
            try:
                parts.append(bytes(cramjam.snappy.decompress_raw(view[body : body + length])))
            except cramjam.DecompressionError as exc:
                raise CorruptInput(f"snappy stream: chunk at offset {pos} does not decompress ({exc})", where) from None
            pos = body + length
        return b"".join(parts)

    def compress(self, data: bytes) -> bytes:
        view = memoryview(data)
        out = [HEADER.pack(MAGIC, VERSION, COMPATIBLE_VERSION)]
        for start in range(0, len(view), self.block_size):
            packed = bytes(cramjam.snappy.compress_raw(view[start : start + self.block_size]))
            out.append(LENGTH.pack(len(packed)))
            out.append(packed)
        return b"".join(out)


def _check_header(view: memoryview, pos: int, where: str) -> None:
    if len(view) - pos < HEADER_LEN:
        raise CorruptInput(f"snappy stream: truncated stream header at offset {pos}", where)
    magic, version, compatible = HEADER.unpack_from(view, pos)
    if magic != MAGIC:
        raise CorruptInput(f"snappy stream: bad magic at offset {pos}", where)
    if version < COMPATIBLE_VERSION or compatible != COMPATIBLE_VERSION:
        raise CorruptInput(f"snappy stream: unknown stream version {version}/{compatible} at offset {pos}", where)
