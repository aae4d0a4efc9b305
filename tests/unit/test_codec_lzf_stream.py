"""The compress-lzf "ZV" chunk stream: hand-built chunks, stored chunks, corrupt input.

LZF chunk payloads are built by hand from liblzf's format (lzf_d.c: control byte < 32 means a
literal run of control + 1 bytes; otherwise length = (control >> 5) + 2 and back-reference
offset = ((control & 0x1f) << 8 | next byte) + 1) and cross-checked with the ``lzf`` reference
library (python-lzf, which wraps liblzf).
"""

from __future__ import annotations

import struct

import lzf
import pytest

from migrate.codecs import codec_for
from migrate.codecs.lzf_stream import LzfStream
from migrate.errors import CorruptInput

WHERE = "cp/state/2/5/9.delta"
LITERAL_LZF = b"\x04hello"
# literal "abc", then a back-reference of 6 bytes (length code 4) at offset 3 (stored as 2).
BACKREF_LZF = b"\x02abc" + b"\x80\x02"


def compressed(payload: bytes, original: int) -> bytes:
    return b"ZV\x01" + struct.pack(">HH", len(payload), original) + payload


def stored(raw: bytes) -> bytes:
    return b"ZV\x00" + struct.pack(">H", len(raw)) + raw


@pytest.mark.parametrize(("payload", "raw"), [(LITERAL_LZF, b"hello"), (BACKREF_LZF, b"abcabcabc")])
def test_hand_built_chunks_agree_with_the_reference_library(payload: bytes, raw: bytes) -> None:
    assert lzf.decompress(payload, len(raw)) == raw  # python-lzf = reference
    assert LzfStream().decompress(compressed(payload, len(raw)), WHERE) == raw


def test_stored_and_compressed_chunks_are_joined() -> None:
    stream = stored(b"plain ") + compressed(BACKREF_LZF, 9) + stored(b"") + compressed(LITERAL_LZF, 5)
    assert LzfStream().decompress(stream, WHERE) == b"plain abcabcabchello"


def test_empty_file_reads_as_empty() -> None:
    assert LzfStream().decompress(b"", WHERE) == b""
    assert LzfStream().compress(b"") == b""


def test_compress_writes_65535_byte_chunks_and_stores_what_does_not_shrink() -> None:
    raw = b"locker-000003 " * 10000  # 140000 bytes -> 65535, 65535, 8930
    stream = LzfStream().compress(raw + bytes((i * 7919) % 251 for i in range(40)))
    pos, chunks = 0, []
    while pos < len(stream):
        assert stream[pos : pos + 2] == b"ZV"
        if stream[pos + 2] == 1:
            clen, ulen = struct.unpack_from(">HH", stream, pos + 3)
            assert len(lzf.decompress(stream[pos + 7 : pos + 7 + clen], ulen)) == ulen
            chunks.append((1, ulen))
            pos += 7 + clen
        else:
            (length,) = struct.unpack_from(">H", stream, pos + 3)
            chunks.append((0, length))
            pos += 5 + length
    assert chunks == [(1, 65535), (1, 65535), (1, 140000 - 2 * 65535 + 40)]
    tail = bytes((i * 7919) % 251 for i in range(40))
    assert LzfStream().compress(tail) == stored(tail)


CORRUPTIONS = {
    "bad signature": lambda s: b"ZW" + s[2:],
    "unknown chunk type": lambda s: s[:2] + b"\x02" + s[3:],
    "truncated header": lambda s: s[:4],
    "truncated compressed header": lambda s: s[:6],
    "truncated chunk": lambda s: s[:-1],
    "original length too long": lambda s: s[:5] + struct.pack(">H", 10) + s[7:],
    "original length too short": lambda s: s[:5] + struct.pack(">H", 8) + s[7:],
    "compressed length too long": lambda s: s[:3] + struct.pack(">H", len(BACKREF_LZF) + 1) + s[5:],
    "bad back-reference": lambda s: s[:7] + b"\x02abc\x80\x10",  # offset before the start
    "zero original length": lambda s: s[:5] + struct.pack(">H", 0) + s[7:],
    "trailing garbage": lambda s: s + b"\x00",
    "trailing partial chunk": lambda s: s + b"ZV\x00\x00\x05ab",
}


@pytest.mark.parametrize("corrupt", sorted(CORRUPTIONS))
def test_corrupt_streams_raise_corrupt_input_naming_the_file(corrupt: str) -> None:
    stream = compressed(BACKREF_LZF, 9)
    assert LzfStream().decompress(stream, WHERE) == b"abcabcabc"
    with pytest.raises(CorruptInput) as info:
        LzfStream().decompress(CORRUPTIONS[corrupt](stream), WHERE)
    assert info.value.path == WHERE
    assert str(info.value).startswith(WHERE + ": lzf stream: ")


def test_registry_returns_this_stream_for_lzf() -> None:
    assert isinstance(codec_for("LZFCompressionCodec"), LzfStream)
