"""The lz4-java block stream: hand-built vectors, checksums, corrupt input, multi-block streams.

Block payloads are built by hand from the published LZ4 block format description (lz4 project,
doc/lz4_Block_format.md: token = literal length << 4 | (match length - 4), literals, 2-byte
little-endian offset) and cross-checked with the ``lz4.block`` reference library. Checksums are
cross-checked with the ``xxhash`` reference library.
"""

from __future__ import annotations

import struct

import lz4.block
import pytest
import xxhash

from migrate.codecs import codec_for
from migrate.codecs.lz4_stream import Lz4BlockStream, level_for
from migrate.errors import CorruptInput

WHERE = "cp/state/0/3/12.delta"
SEED = 0x9747B28C  # lz4-java's stream seed (from memory; the engine fixtures confirm it)
END = b"LZ4Block\x15" + bytes(12)  # end mark for 32 KiB blocks, as observed in engine files


def header(token: int, comp: int, orig: int, check: int) -> bytes:
    return b"LZ4Block" + bytes([token]) + struct.pack("<iiI", comp, orig, check)


def check_of(raw: bytes) -> int:
    return xxhash.xxh32_intdigest(raw, seed=SEED) & 0x0FFFFFFF  # xxhash package = reference


# Literal-only block from the spec: token 0x50 (5 literals, no match), then the literals.
LITERALS_BLOCK = b"\x50hello"
# One literal run of 20 bytes: length 15 in the token, 5 more in the next byte.
LONG_LITERALS_BLOCK = b"\xf0\x05" + b"0123456789abcdefghij"
# Literals "abcd", match offset 4 length 8, then the 5 final literals the spec requires.
MATCH_BLOCK = b"\x44abcd\x04\x00" + b"\x50xyzwv"
VECTORS = [
    (LITERALS_BLOCK, b"hello"),
    (LONG_LITERALS_BLOCK, b"0123456789abcdefghij"),
    (MATCH_BLOCK, b"abcdabcdabcdxyzwv"),
]


@pytest.mark.parametrize(("block", "raw"), VECTORS)
def test_hand_built_blocks_agree_with_the_reference_library(block: bytes, raw: bytes) -> None:
    assert lz4.block.decompress(block, uncompressed_size=len(raw)) == raw  # lz4.block = reference


@pytest.mark.parametrize(("block", "raw"), VECTORS)
def test_hand_built_stream_of_one_lz4_block_decodes(block: bytes, raw: bytes) -> None:
    stream = header(0x25, len(block), len(raw), check_of(raw)) + block + END
    assert Lz4BlockStream().decompress(stream, WHERE) == raw


def test_raw_block_is_stored_verbatim() -> None:
    raw = b"stored, not compressed"
    stream = header(0x15, len(raw), len(raw), check_of(raw)) + raw + END
    assert Lz4BlockStream().decompress(stream, WHERE) == raw


def test_several_blocks_and_concatenated_streams_are_joined() -> None:
    one = header(0x25, len(LITERALS_BLOCK), 5, check_of(b"hello")) + LITERALS_BLOCK
    two = header(0x25, len(MATCH_BLOCK), 17, check_of(b"abcdabcdabcdxyzwv")) + MATCH_BLOCK
    assert Lz4BlockStream().decompress(one + two + END, WHERE) == b"helloabcdabcdabcdxyzwv"
    assert Lz4BlockStream().decompress(one + END + two + END, WHERE) == b"helloabcdabcdabcdxyzwv"


def test_empty_input_stream_is_just_the_end_mark() -> None:
    assert Lz4BlockStream().compress(b"") == END
    assert Lz4BlockStream().decompress(END, WHERE) == b""


def test_level_nibble_follows_block_size() -> None:
    # lz4-java: level = ceil(log2(block size)) - 10; 32 KiB -> 5 (observed token 0x25 / 0x15)
    assert level_for(32 * 1024) == 5
    assert level_for(64) == 0
    assert level_for(1 << 16) == 6
    assert level_for((1 << 16) + 1) == 7


def test_compress_writes_engine_shaped_blocks() -> None:
    raw = b"locker-000001 " * 6000  # 84000 bytes: two full 32 KiB blocks and a short one
    stream = Lz4BlockStream().compress(raw)
    pos, blocks = 0, []
    while pos < len(stream):
        magic, token, comp, orig, check = struct.unpack_from("<8sBiiI", stream, pos)
        assert magic == b"LZ4Block"
        payload = stream[pos + 21 : pos + 21 + comp]
        if orig:
            assert token == 0x25
            assert check == check_of(lz4.block.decompress(payload, uncompressed_size=orig))
        blocks.append((token, orig))
        pos += 21 + comp
    assert blocks == [(0x25, 32768), (0x25, 32768), (0x25, 84000 - 65536), (0x15, 0)]


def test_incompressible_block_is_written_raw() -> None:
    raw = bytes((i * 7919) % 251 for i in range(40))  # 40 distinct bytes: lz4 output would be 42
    stream = Lz4BlockStream().compress(raw)
    assert stream[8] == 0x15
    assert stream[21 : 21 + len(raw)] == raw
    assert Lz4BlockStream().decompress(stream, WHERE) == raw


def good_stream() -> bytes:
    return header(0x25, len(MATCH_BLOCK), 17, check_of(b"abcdabcdabcdxyzwv")) + MATCH_BLOCK + END


def flip(data: bytes, index: int, mask: int = 0x01) -> bytes:
    out = bytearray(data)
    out[index] ^= mask
    return bytes(out)


CORRUPTIONS = {
    "bad magic": lambda s: b"LZ4Blocx" + s[8:],
    "flipped checksum": lambda s: flip(s, 17),
    "flipped payload": lambda s: flip(s, 21 + 2),
    "unknown method": lambda s: s[:8] + b"\x35" + s[9:],
    "truncated block": lambda s: s[: 21 + len(MATCH_BLOCK) - 1],
    "truncated header": lambda s: s[:15],
    "missing end mark": lambda s: s[: -len(END)],
    "end mark cut short": lambda s: s[:-3],
    "trailing garbage": lambda s: s + b"\x00junk",
    "trailing partial header": lambda s: s + b"LZ4Bl",
    "original length too long": lambda s: s[:13] + struct.pack("<i", 18) + s[17:],
    "original length too short": lambda s: s[:13] + struct.pack("<i", 16) + s[17:],
    "original length over block size": lambda s: s[:8] + b"\x20" + s[9:13] + struct.pack("<i", 2000) + s[17:],
    "negative compressed length": lambda s: s[:9] + struct.pack("<i", -1) + s[13:],
    "compressed length too long": lambda s: s[:9] + struct.pack("<i", len(MATCH_BLOCK) + 1) + s[13:],
    "raw block with unequal lengths": lambda s: s[:8] + b"\x15" + s[9:],
    "end mark with checksum": lambda s: s[:-1] + b"\x01",
    "empty file": lambda s: b"",
}


@pytest.mark.parametrize("corrupt", sorted(CORRUPTIONS))
def test_corrupt_streams_raise_corrupt_input_naming_the_file(corrupt: str) -> None:
    stream = good_stream()
    assert Lz4BlockStream().decompress(stream, WHERE) == b"abcdabcdabcdxyzwv"
    with pytest.raises(CorruptInput) as info:
        Lz4BlockStream().decompress(CORRUPTIONS[corrupt](stream), WHERE)
    assert info.value.path == WHERE
    assert str(info.value).startswith(WHERE + ": lz4 stream: ")


def test_registry_returns_this_stream_for_lz4() -> None:
    assert isinstance(codec_for("lz4"), Lz4BlockStream)


def test_block_size_outside_lz4_java_limits_is_refused() -> None:
    with pytest.raises(ValueError):
        Lz4BlockStream(block_size=32)
    with pytest.raises(ValueError):
        Lz4BlockStream(block_size=(1 << 25) + 1)
