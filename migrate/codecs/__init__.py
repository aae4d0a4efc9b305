"""The engine's compression streams for state files, and the codec registry.

A state file (delta or snapshot of the HDFS-backed provider) is one compressed stream written with
the query's ``spark.sql.streaming.stateStore.compression.codec`` (default ``lz4``; the value is
pinned in each offsets-log entry's conf). Each codec is one module here behind :class:`Codec`:

* ``lz4``    :mod:`.lz4_stream`     lz4-java block stream ("LZ4Block" headers, xxHash32 per block)
* ``zstd``   :mod:`.zstd_stream`    standard zstd frames
* ``snappy`` :mod:`.snappy_stream`  snappy-java stream (0x82 "SNAPPY" header, length-prefixed chunks)
* ``lzf``    :mod:`.lzf_stream`     compress-lzf "ZV" chunks

Hadoop ``.crc`` sidecars live in :mod:`.hadoop_crc`. Adding a codec: one module, one line in
``_CODECS``.
"""

from __future__ import annotations

from types import MappingProxyType
from typing import Protocol, runtime_checkable

from ..errors import Unsupported
from .lz4_stream import Lz4BlockStream
from .lzf_stream import LzfStream
from .snappy_stream import SnappyStream
from .zstd_stream import ZstdStream


@runtime_checkable
class Codec(Protocol):
    """One of the engine's compression streams.

    ``decompress`` takes a whole stream and returns the raw bytes; it raises
    :class:`~migrate.errors.CorruptInput` naming ``where`` on any problem (bad magic, checksum
    mismatch, truncation, trailing garbage). ``compress`` returns a stream the engine reads.
    """

    name: str

    def decompress(self, data: bytes, where: str) -> bytes: ...

    def compress(self, data: bytes) -> bytes: ...


# short name -> (codec, the engine's codec class name)
_CODECS: MappingProxyType[str, tuple[Codec, str]] = MappingProxyType(
    {
        "lz4": (Lz4BlockStream(), "org.apache.spark.io.LZ4CompressionCodec"),
        "zstd": (ZstdStream(), "org.apache.spark.io.ZStdCompressionCodec"),
        "snappy": (SnappyStream(), "org.apache.spark.io.SnappyCompressionCodec"),
        "lzf": (LzfStream(), "org.apache.spark.io.LZFCompressionCodec"),
    }
)

CODEC_NAMES: tuple[str, ...] = tuple(_CODECS)

_ALIASES: MappingProxyType[str, str] = MappingProxyType(
    {alias.lower(): short for short, (_, cls) in _CODECS.items() for alias in (short, cls, cls.rsplit(".", 1)[1])}
)


def codec_for(name: str, where: str = "") -> Codec:
    """The codec for a conf value: a short name (any case) or the engine's codec class name.

    Unknown names raise :class:`~migrate.errors.Unsupported` (naming ``where``, e.g. the offsets
    file the value came from).
    """
    short = _ALIASES.get(name.strip().lower())
    if short is None:
        raise Unsupported(f"unknown state compression codec {name!r} (known: {', '.join(CODEC_NAMES)})", where or None)
    return _CODECS[short][0]


__all__ = ["CODEC_NAMES", "Codec", "codec_for"]
