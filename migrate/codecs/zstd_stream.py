"""The engine's zstd stream: zstd-jni's output stream writes standard zstd frames.

Compression and decompression are the ``zstandard`` library; this module only walks the frames.
Observed in state files written by Spark 4.3.0 (``spark.io.compression.zstd.level`` 1): one frame
per file, frame header without content size or checksum, window 512 KiB, ending in an empty last
block. The engine's reader reads concatenated frames, so this reader does too (skippable frames
included); a frame cut short, or bytes after the last frame that are not a frame, raise
:class:`~migrate.errors.CorruptInput`.
"""

from __future__ import annotations

from dataclasses import dataclass

import zstandard

from ..errors import CorruptInput

DEFAULT_LEVEL = 1  # the engine's spark.io.compression.zstd.level default


@dataclass(frozen=True)
class ZstdStream:
    """Concatenated zstd frames, as the engine's ``ZStdCompressionCodec`` reads and writes them."""

    name: str = "zstd"
    level: int = DEFAULT_LEVEL

    def decompress(self, data: bytes, where: str) -> bytes:
        view = memoryview(data)
        total = len(view)
        if total == 0:
            raise CorruptInput("zstd stream: empty (no frame)", where)
        parts: list[bytes] = []
        pos = 0
        dctx = zstandard.ZstdDecompressor()
        while pos < total:
            frame = dctx.decompressobj()
            try:
                parts.append(frame.decompress(view[pos:]))
            except zstandard.ZstdError as exc:
                raise CorruptInput(f"zstd stream: bad frame at offset {pos} ({exc})", where) from None
            if not frame.eof:
                raise CorruptInput(f"zstd stream: frame at offset {pos} is truncated", where)
            pos = total - len(frame.unused_data)
        return b"".join(parts)

    def compress(self, data: bytes) -> bytes:
        # One standard frame (with content size; zstd-jni reads frames with or without it).
        return zstandard.ZstdCompressor(level=self.level).compress(data)
