"""The snappy-java stream: header bytes, hand-built chunks, concatenation, corrupt input.

Raw snappy chunks are built by hand from the published snappy format description (google/snappy,
format_description.txt: varint uncompressed length, then elements; literal tag = (len - 1) << 2
for up to 60 bytes; copy-1 tag = (len - 4) << 2 | offset >> 8 << 5 | 01, then offset low byte)
and cross-checked with the ``cramjam`` reference library.
"""

from __future__ import annotations

import struct

import cramjam
import pytest

from migrate.codecs import codec_for
from migrate.codecs.snappy_stream import SnappyStream
from migrate.errors import CorruptInput

WHERE = "cp/state/0/1/2.delta"
HEADER = b"\x82SNAPPY\x00" + b"\x00\x00\x00\x01" + b"\x00\x00\x00\x01"  # observed in engine files
LITERAL_CHUNK = b"\x05" + b"\x10" + b"hello"
# "abcabcabcab": literal "abc" (tag 0x08), then copy-1 of 8 bytes at offset 3: ((8-4) << 2) | 1 = 0x11.
COPY_CHUNK = b"\x0b" + b"\x08abc" + b"\x11\x03"


def chunk(raw_snappy: bytes) -> bytes:
    return struct.pack(">i", len(raw_snappy)) + raw_snappy


@pytest.mark.parametrize(("block", "raw"), [(LITERAL_CHUNK, b"hello"), (COPY_CHUNK, b"abcabcabcab")])
def test_hand_built_chunks_agree_with_the_reference_library(block: bytes, raw: bytes) -> None:
    assert bytes(cramjam.snappy.decompress_raw(block)) == raw  # cramjam = reference
    assert SnappyStream().decompress(HEADER + chunk(block), WHERE) == raw


def test_several_chunks_and_concatenated_streams_are_joined() -> None:
    stream = HEADER + chunk(LITERAL_CHUNK) + chunk(COPY_CHUNK) + HEADER + chunk(LITERAL_CHUNK)
    assert SnappyStream().decompress(stream, WHERE) == b"helloabcabcabcabhello"


def test_empty_file_and_header_only_read_as_empty() -> None:
    assert SnappyStream().decompress(b"", WHERE) == b""
    assert SnappyStream().decompress(HEADER, WHERE) == b""


def test_compress_writes_header_and_32k_chunks() -> None:
    raw = b"locker-000007 " * 5000  # 70000 bytes -> chunks of 32768, 32768, 4464
    stream = SnappyStream().compress(raw)
    assert stream[:16] == HEADER
    pos, sizes = 16, []
    while pos < len(stream):
        (length,) = struct.unpack_from(">i", stream, pos)
        sizes.append(len(cramjam.snappy.decompress_raw(stream[pos + 4 : pos + 4 + length])))
        pos += 4 + length
    assert sizes == [32768, 32768, 70000 - 65536]


CORRUPTIONS = {
    "bad magic": lambda s: b"\x83" + s[1:],
    "unknown version": lambda s: s[:15] + b"\x02" + s[16:],
    "truncated header": lambda s: s[:10],
    "truncated chunk length": lambda s: s[:18],
    "truncated chunk": lambda s: s[:-1],
    "chunk length too long": lambda s: s[:16] + struct.pack(">i", len(LITERAL_CHUNK) + 1) + s[20:],
    "zero chunk length": lambda s: s[:16] + struct.pack(">i", 0) + s[20:],
    "negative chunk length": lambda s: s[:16] + struct.pack(">i", -5) + s[20:],
    "chunk does not decode": lambda s: s[:20] + b"\x09" + s[21:],  # says 9 bytes, holds 5
    "trailing garbage": lambda s: s + b"\x00\x01",
    "trailing bad header": lambda s: s + b"\x82SNAPPX\x00" + bytes(8),
}


@pytest.mark.parametrize("corrupt", sorted(CORRUPTIONS))
def test_corrupt_streams_raise_corrupt_input_naming_the_file(corrupt: str) -> None:
    stream = HEADER + chunk(LITERAL_CHUNK)
    with pytest.raises(CorruptInput) as info:
        SnappyStream().decompress(CORRUPTIONS[corrupt](stream), WHERE)
    assert info.value.path == WHERE
    assert str(info.value).startswith(WHERE + ": snappy stream: ")


def test_registry_returns_this_stream_for_snappy() -> None:
    assert isinstance(codec_for("org.apache.spark.io.SnappyCompressionCodec"), SnappyStream)
