"""The engine's compression streams for state files, and the codec registry.

A state file (delta or snapshot of the HDFS-backed provider) is one compressed stream written with
the query's ``spark.sql.streaming.stateStore.compression.codec`` (default ``lz4``; the value is
pinned in each offsets-log entry's conf). Each codec is one module here behind :class:`Codec`:

* ``lz4``    :mod:`.lz4_stream`     lz4-java block stream ("LZ4Block" headers, xxHash32 per block)
* ``zstd``   :mod:`.zstd_stream`    standard zstd frames
* ``snappy`` :mod:`.snappy_stream`  snappy-java stream (0x82 "SNAPPY" header, length-prefixed chunks)
* ``lzf``    :mod:`.lzf_stream`     compress-lzf "ZV" chunks

Hadoop ``.crc`` sidecars live in :mod:`.hadoop_crc`. Adding a codec: one module, one line in
``_CODECS`` and its leading bytes in ``_SIGNATURES``.

Every stream starts with bytes that tell the codec apart (:func:`codec_of_stream`), so a file is
read with the codec that wrote it, not only the one the conf names today: a checkpoint whose
older versions were written with another codec still reads.
"""

from __future__ import annotations

from collections.abc import Iterable
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

    ``decompress`` takes a whole stream and returns the raw bytes (``bytes``, or a ``bytearray``
    where the codec grows its output in place: lz4); it raises
    :class:`~migrate.errors.CorruptInput` naming ``where`` on any problem (bad magic, checksum
    mismatch, truncation, trailing garbage). ``compress`` returns a stream the engine reads.
    """

    name: str

    def decompress(self, data: bytes, where: str) -> bytes | bytearray: ...

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

# The first bytes of each stream:
#   lz4    "LZ4Block"            lz4-java LZ4BlockOutputStream block magic (see lz4_stream)
#   zstd   28 b5 2f fd           zstd frame magic 0xFD2FB528 little-endian (RFC 8878, 3.1.1)
#   zstd   5? 2a 4d 18           skippable frame magic 0x184D2A5? (RFC 8878, 3.1.2)
#   snappy 82 "SNAPPY" 00        snappy-java SnappyOutputStream header (see snappy_stream)
#   lzf    "ZV" 00 | "ZV" 01     compress-lzf chunk signature + chunk type (see lzf_stream)
# No prefix is a prefix of another, so the match is unambiguous.
_SIGNATURES: tuple[tuple[bytes, str], ...] = (
    (b"LZ4Block", "lz4"),
    (b"\x28\xb5\x2f\xfd", "zstd"),
    (b"\x82SNAPPY\x00", "snappy"),
    (b"ZV\x00", "lzf"),
    (b"ZV\x01", "lzf"),
)

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


def compress_parts(codec: Codec, parts: Iterable[bytes | bytearray | memoryview]) -> bytes:
    """The stream of the parts' bytes one after the other: by the codec's own ``compress_parts``
    where it has one (lz4: each part compressed as it comes, the input never held joined), else
    ``compress`` of the parts joined."""
    own = getattr(codec, "compress_parts", None)
    return own(parts) if own is not None else codec.compress(b"".join(parts))


def codec_of_stream(data: bytes | memoryview, conf_name: str, where: str = "") -> Codec:
    """The codec that wrote ``data``, told from its first bytes; ``conf_name`` (the codec the conf
    names) when the bytes match no known stream, so that codec's reader reports what is wrong.

    An empty file is handed to the conf's codec too (every codec writes at least an end marker,
    so each reader refuses it with its own message)."""
    head = bytes(data[:8])
    for signature, name in _SIGNATURES:
        if head.startswith(signature):
            return _CODECS[name][0]
    if len(head) >= 4 and head[0] & 0xF0 == 0x50 and head[1:4] == b"\x2a\x4d\x18":
        return _CODECS["zstd"][0]
    return codec_for(conf_name, where)


__all__ = ["CODEC_NAMES", "Codec", "codec_for", "codec_of_stream", "compress_parts"]
