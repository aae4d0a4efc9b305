"""The zstd stream: hand-built frames, concatenated frames, corrupt input.

Frames are built by hand from the published zstd format (RFC 8878: magic 0xFD2FB528, frame header
descriptor, 3-byte block headers with last-block flag, block type and size) and cross-checked
with the ``zstandard`` reference library.
"""

from __future__ import annotations

import pytest
import zstandard

from migrate.codecs import codec_for
from migrate.codecs.zstd_stream import ZstdStream
from migrate.errors import CorruptInput

WHERE = "cp/state/1/0/4.snapshot"
MAGIC = bytes.fromhex("28b52ffd")
# Single-segment frame (FHD 0x20: 1-byte content size), one last raw block of 5 bytes:
# block header = (size << 3) | (type raw = 0) << 1 | last = 1 -> 0x29 0x00 0x00.
RAW_FRAME = MAGIC + b"\x20\x05" + b"\x29\x00\x00" + b"hello"
# Same, one last RLE block (type 1) repeating b"z" 7 times: (7 << 3) | 1 << 1 | 1 = 0x3b.
RLE_FRAME = MAGIC + b"\x20\x07" + b"\x3b\x00\x00" + b"z"
# Skippable frame (magic 0x184D2A50, 4-byte length, payload), ignored by readers.
SKIPPABLE = bytes.fromhex("502a4d18") + (3).to_bytes(4, "little") + b"abc"


@pytest.mark.parametrize(("frame", "raw"), [(RAW_FRAME, b"hello"), (RLE_FRAME, b"zzzzzzz")])
def test_hand_built_frames_agree_with_the_reference_library(frame: bytes, raw: bytes) -> None:
    assert zstandard.ZstdDecompressor().decompress(frame) == raw  # zstandard = reference
    assert ZstdStream().decompress(frame, WHERE) == raw


def test_concatenated_and_skippable_frames_are_read_through() -> None:
    stream = RAW_FRAME + SKIPPABLE + RLE_FRAME + RAW_FRAME
    assert ZstdStream().decompress(stream, WHERE) == b"hellozzzzzzzhello"


def test_frames_without_content_size_like_the_engine_writes() -> None:
    # zstd-jni's stream writes no content size; the zstandard streaming writer does the same.
    raw = b"locker-000042 " * 5000
    writer = zstandard.ZstdCompressor(level=1).compressobj()
    stream = writer.compress(raw) + writer.flush()
    assert zstandard.get_frame_parameters(stream).content_size == zstandard.CONTENTSIZE_UNKNOWN
    assert ZstdStream().decompress(stream, WHERE) == raw


def test_compress_writes_one_standard_frame() -> None:
    raw = b"parcel " * 1000
    stream = ZstdStream().compress(raw)
    assert stream[:4] == MAGIC
    assert zstandard.ZstdDecompressor().decompress(stream) == raw  # reference reader


CORRUPTIONS = {
    "bad magic": lambda s: b"\x29" + s[1:],
    "truncated frame": lambda s: s[:-1],
    "truncated header": lambda s: s[:5],
    "trailing garbage": lambda s: s + b"junk",
    "trailing partial frame": lambda s: s + RAW_FRAME[:7],
    "reserved block type": lambda s: s[:6] + b"\x2f" + s[7:],  # type 3 is reserved
    "empty file": lambda s: b"",
}


@pytest.mark.parametrize("corrupt", sorted(CORRUPTIONS))
def test_corrupt_streams_raise_corrupt_input_naming_the_file(corrupt: str) -> None:
    with pytest.raises(CorruptInput) as info:
        ZstdStream().decompress(CORRUPTIONS[corrupt](RAW_FRAME), WHERE)
    assert info.value.path == WHERE
    assert str(info.value).startswith(WHERE + ": zstd stream: ")


def test_content_checksum_mismatch_is_caught() -> None:
    stream = zstandard.ZstdCompressor(level=3, write_checksum=True).compress(b"checksummed " * 50)
    bad = stream[:-1] + bytes([stream[-1] ^ 0xFF])
    with pytest.raises(CorruptInput):
        ZstdStream().decompress(bad, WHERE)


def test_registry_returns_this_stream_for_zstd() -> None:
    assert isinstance(codec_for("ZSTD"), ZstdStream)
