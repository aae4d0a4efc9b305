"""The engine's LZF stream: compress-lzf's ``LZFOutputStream`` "ZV" chunk framing.

LZF chunk (de)compression is the ``lzf`` library (python-lzf, liblzf's format); this module only
owns the framing, as observed in state files written by Spark 4.3.0:

    stream       = chunk*                    no header, no end mark, no checksum
    compressed   = "ZV" 01 clen ulen data    clen, ulen: uint16 big-endian; data: LZF, clen bytes
    uncompressed = "ZV" 00 len data          len: uint16 big-endian; data stored as is
    each chunk holds up to 65535 input bytes (the engine's files: 65535 per chunk, the last shorter)

A file cut exactly at a chunk boundary cannot be told from a shorter one; an empty file reads as
empty (as in the engine). Anything else out of shape raises :class:`~migrate.errors.CorruptInput`.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass

import lzf

from ..errors import CorruptInput

SIGNATURE = b"ZV"
TYPE_STORED = 0
TYPE_COMPRESSED = 1
STORED = struct.Struct(">2sBH")  # signature, type, length
COMPRESSED = struct.Struct(">2sBHH")  # signature, type, compressed length, original length
MAX_CHUNK = 0xFFFF
MIN_TO_COMPRESS = 16  # shorter chunks are stored (common practice in compress-lzf, from memory)


@dataclass(frozen=True)
class LzfStream:
    """compress-lzf chunk stream, as the engine's ``LZFCompressionCodec`` reads and writes it."""

    name: str = "lzf"

    def decompress(self, data: bytes, where: str) -> bytes:
        view = memoryview(data)
        total = len(view)
        parts: list[bytes] = []
        pos = 0
        while pos < total:
            if total - pos < STORED.size:
                raise CorruptInput(f"lzf stream: truncated chunk header at offset {pos}", where)
            signature, kind, length = STORED.unpack_from(view, pos)
            if signature != SIGNATURE:
                raise CorruptInput(f"lzf stream: bad chunk signature at offset {pos}", where)
            if kind == TYPE_STORED:
                body, original = pos + STORED.size, length
            elif kind == TYPE_COMPRESSED:
                if total - pos < COMPRESSED.size:
                    raise CorruptInput(f"lzf stream: truncated chunk header at offset {pos}", where)
                _, _, length, original = COMPRESSED.unpack_from(view, pos)
                body = pos + COMPRESSED.size
                if length == 0 or original == 0:
                    raise CorruptInput(f"lzf stream: empty compressed chunk at offset {pos}", where)
            else:
                raise CorruptInput(f"lzf stream: unknown chunk type {kind} at offset {pos}", where)
            if total - body < length:
                raise CorruptInput(
                    f"lzf stream: truncated chunk at offset {pos} (needs {length} bytes, {total - body} left)",
                    where,
                )
            payload = view[body : body + length]
            if kind == TYPE_STORED:
                parts.append(bytes(payload))
            else:
                try:
                    raw = lzf.decompress(bytes(payload), original)
                except (ValueError, SystemError) as exc:
                    raise CorruptInput(
                        f"lzf stream: chunk at offset {pos} does not decompress ({exc})", where
                    ) from None
                if raw is None or len(raw) != original:
                    raise CorruptInput(
                        f"lzf stream: chunk at offset {pos} does not decompress to the {original} bytes its header says",
                        where,
                    )
                parts.append(raw)
            pos = body + length
        return b"".join(parts)

    def compress(self, data: bytes) -> bytes:
        view = memoryview(data)
        out: list[bytes] = []
        for start in range(0, len(view), MAX_CHUNK):
            raw = bytes(view[start : start + MAX_CHUNK])
            packed = lzf.compress(raw) if len(raw) >= MIN_TO_COMPRESS else None
            if packed is not None and len(packed) + 2 < len(raw):  # worth the 2 extra header bytes
                out.append(COMPRESSED.pack(SIGNATURE, TYPE_COMPRESSED, len(packed), len(raw)))
                out.append(packed)
            else:
                out.append(STORED.pack(SIGNATURE, TYPE_STORED, len(raw)))
                out.append(raw)
        return b"".join(out)
