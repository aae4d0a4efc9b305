"""The compiled LZ4 stream decoder (``migrate.codecs._lz4stream``) gives the bytes of the Python
decoder (``Lz4BlockStream._decompress_py``, the reference) for every well-formed stream, and
declines (None) exactly the streams the reference refuses, so the reference names the problem:
hypothesis data of every kind through every block size, streams back to back, stored (RAW)
blocks, hand-built blocks from the published LZ4 block format, and every truncation and every
single flipped byte of a small stream. The streams these tests decode are written by the Python
writer (``Lz4BlockStream._compress_py``, the reference). test_codec_lz4_stream.py runs its checks
through ``Lz4BlockStream.decompress`` and ``compress``, which take the helper when it is loaded.

The compiled writer (``compress``, used part by part by ``Lz4BlockStream.compress_parts``) is held
to the reference writer: the same blocks (level, original lengths, checksums by the xxhash
package; a block stored exactly when it does not shrink), and every stream it writes decoded by
the reference decoder and by ``lz4.block`` block by block, however the input is cut into parts.

Under ``CI=true`` the system's liblz4 and libxxhash must load (``available()``); outside CI a
missing extension skips these tests (as in test_digest_compiled.py).
"""

from __future__ import annotations

import os
import struct
from types import ModuleType

import lz4.block
import pytest
import xxhash
from compiled_extensions import load
from hypothesis import given, settings
from hypothesis import strategies as st

from migrate.codecs import lz4_stream
from migrate.codecs.lz4_stream import CHECKSUM_MASK, XXHASH_SEED, Lz4BlockStream
from migrate.errors import CorruptInput

WHERE = "cp/state/0/1/4.delta"


@pytest.fixture(scope="module")
def compiled() -> ModuleType:
    module = load("migrate.codecs._lz4stream", "the compiled LZ4 stream decoder")
    if not module.available():
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail("liblz4.so.1 or libxxhash.so.0 did not load or failed its check, and CI=true", pytrace=False)
        pytest.skip("the system's liblz4.so.1 or libxxhash.so.0 is not there")
    return module


def fast(module: ModuleType, stream: bytes) -> bytearray | None:
    return module.decompress(stream, XXHASH_SEED, CHECKSUM_MASK)


def reference(stream: bytes) -> bytearray | None:
    """The reference's bytes, or None where it refuses the stream."""
    try:
        return Lz4BlockStream()._decompress_py(stream, WHERE)
    except CorruptInput:
        return None


def header(token: int, comp: int, orig: int, check: int) -> bytes:
    return b"LZ4Block" + bytes([token]) + struct.pack("<iiI", comp, orig, check)


def check_of(raw: bytes) -> int:
    return xxhash.xxh32_intdigest(raw, seed=XXHASH_SEED) & CHECKSUM_MASK  # xxhash package: the reference


def payloads() -> st.SearchStrategy[bytes]:
    """Incompressible bytes, long runs, and repeated phrases (long matches), mixed."""
    random_bytes = st.binary(max_size=3000)
    runs = st.builds(lambda b, n: bytes([b]) * n, st.integers(0, 255), st.integers(0, 5000))
    phrases = st.builds(lambda p, n: p * n, st.binary(min_size=1, max_size=40), st.integers(1, 300))
    return st.lists(st.one_of(random_bytes, runs, phrases), max_size=6).map(b"".join)


@settings(max_examples=200, deadline=None)
@given(data=payloads(), block_size=st.sampled_from([64, 100, 1024, 32 * 1024, 1 << 16]))
def test_same_bytes_as_the_reference(compiled: ModuleType, data: bytes, block_size: int) -> None:
    stream = Lz4BlockStream(block_size=block_size)._compress_py(data)
    out = fast(compiled, stream)
    assert out is not None
    assert isinstance(out, bytearray)
    assert out == data == reference(stream)


@settings(max_examples=50, deadline=None)
@given(parts=st.lists(payloads(), min_size=1, max_size=4))
def test_streams_back_to_back(compiled: ModuleType, parts: list[bytes]) -> None:
    stream = b"".join(Lz4BlockStream(block_size=256)._compress_py(p) for p in parts)
    assert fast(compiled, stream) == b"".join(parts) == reference(stream)


def test_stored_blocks_and_hand_built_lz4_blocks(compiled: ModuleType) -> None:
    # Token, literals, 2-byte little-endian offset, as the published LZ4 block format describes;
    # lz4.block (the reference library) agrees on each.
    match_block, match_raw = b"\x44abcd\x04\x00" + b"\x50xyzwv", b"abcdabcdabcdxyzwv"
    assert lz4.block.decompress(match_block, uncompressed_size=len(match_raw)) == match_raw
    stored = b"kept as it is"
    stream = (
        header(0x15, len(stored), len(stored), check_of(stored)) + stored
        + header(0x25, len(match_block), len(match_raw), check_of(match_raw)) + match_block
        + header(0x15, 0, 0, 0)
    )
    assert fast(compiled, stream) == stored + match_raw == reference(stream)


def test_empty_streams(compiled: ModuleType) -> None:
    end = header(0x15, 0, 0, 0)
    assert fast(compiled, end) == b"" == reference(end)
    assert fast(compiled, end + end) == b""
    assert fast(compiled, b"") is None and reference(b"") is None  # no end mark: the reference refuses it too


def test_every_truncation_and_every_flipped_byte(compiled: ModuleType) -> None:
    data = (b"sensor-17;" * 30) + os.urandom(200) + b"\x00" * 400
    stream = Lz4BlockStream(block_size=256)._compress_py(data)
    for cut in range(len(stream)):
        assert fast(compiled, stream[:cut]) is None, cut
        assert reference(stream[:cut]) is None, cut
    for at in range(len(stream)):
        for flip in (0x01, 0x80, 0xFF):
            bad = bytearray(stream)
            bad[at] ^= flip
            assert fast(compiled, bytes(bad)) == reference(bytes(bad)), (at, flip)


def test_headers_that_claim_too_much_are_declined_without_allocating(compiled: ModuleType) -> None:
    # a 6-byte LZ4 block cannot expand to 32 MiB; a stream of such headers claims terabytes
    block = b"\x50hello"
    claim = header(0x2F, len(block), 1 << 25, 0) + block
    stream = claim * 40000 + header(0x1F, 0, 0, 0)
    assert fast(compiled, stream) is None
    with pytest.raises(CorruptInput, match="decompresses to 5 bytes, header says 33554432"):
        Lz4BlockStream().decompress(stream, WHERE)


def test_takes_any_buffer(compiled: ModuleType) -> None:
    data = b"meter-reading " * 500
    stream = Lz4BlockStream(block_size=1024)._compress_py(data)
    assert fast(compiled, bytearray(stream)) == data
    assert fast(compiled, memoryview(b"xx" + stream)[2:]) == data


def test_the_codec_uses_the_compiled_decoder_when_loaded(compiled: ModuleType, monkeypatch: pytest.MonkeyPatch) -> None:
    assert lz4_stream._lz4stream is compiled
    data = b"queue-depth " * 700
    stream = Lz4BlockStream()._compress_py(data)
    calls = []
    monkeypatch.setattr(Lz4BlockStream, "_decompress_py", lambda self, d, w: calls.append(w) or bytearray())
    assert Lz4BlockStream().decompress(stream, WHERE) == data and not calls  # taken by the compiled decoder
    Lz4BlockStream().decompress(stream[:-1], WHERE)
    assert calls == [WHERE]  # a bad stream goes to the reference, which names the problem


def test_the_import_check_values_agree_with_the_reference_libraries() -> None:
    # the values _lz4stream.c checks the system's libraries against at import (from memory there)
    assert xxhash.xxh32_intdigest(b"", seed=0) == 0x02CC5D05  # python xxhash package: the reference
    block = bytes([0x34]) + b"abc" + bytes([0x03, 0x00, 0x50]) + b"tail!"
    assert lz4.block.decompress(block, uncompressed_size=16) == b"abcabcabcabtail!"  # lz4.block: the reference
    with pytest.raises(lz4.block.LZ4BlockError):
        lz4.block.decompress(block[:8], uncompressed_size=16)


def test_without_the_compiled_decoder_the_reference_decodes(monkeypatch: pytest.MonkeyPatch) -> None:
    data = b"pump-pressure " * 900
    stream = Lz4BlockStream()._compress_py(data)
    monkeypatch.setattr(lz4_stream, "_lz4stream", None)
    assert Lz4BlockStream().decompress(stream, WHERE) == data
    with pytest.raises(CorruptInput, match="missing end mark"):
        Lz4BlockStream().decompress(stream[:-21], WHERE)


# ------------------------------------------------------------------------ the compiled writer


def blocks_of(stream: bytes) -> list[tuple[int, int, int, int]]:
    """(token, compressed length, original length, checksum) of every block header, the end mark
    included, each payload checked against its header with ``lz4.block`` (the reference library)
    and the xxhash package."""
    out = []
    pos = 0
    while pos < len(stream):
        magic, token, comp, orig, check = struct.unpack_from("<8sBiiI", stream, pos)
        assert magic == b"LZ4Block"
        payload = stream[pos + 21 : pos + 21 + comp]
        if orig:
            raw = payload if token & 0xF0 == 0x10 else lz4.block.decompress(payload, uncompressed_size=orig)
            assert len(raw) == orig and check_of(raw) == check
        out.append((token, comp, orig, check))
        pos += 21 + comp
    assert pos == len(stream)
    return out


def framing(stream: bytes) -> list[tuple[int, int, int]]:
    """What any writer of the stream must agree on: each block's level, original length and
    checksum. Whether a block is stored or compressed, and its compressed bytes, may differ between
    LZ4 entry points even of one library version (seen: an 18-byte block the python lz4 package
    stores, LZ4_compress_default shrinks to 15 bytes), and each stream's blocks are checked to
    decode by blocks_of; a block is stored exactly when it does not shrink."""
    out = []
    for token, comp, orig, check in blocks_of(stream):
        assert (token & 0xF0 == 0x10) == (comp == orig), (token, comp, orig)
        out.append((token & 0x0F, orig, check))
    return out


def cut(data: bytes, cuts: list[int]) -> list[bytes]:
    points = sorted({min(c, len(data)) for c in cuts})
    return [data[a:b] for a, b in zip([0] + points, points + [len(data)])]


@settings(max_examples=200, deadline=None)
@given(
    data=payloads(),
    block_size=st.sampled_from([64, 100, 1024, 32 * 1024]),
    cuts=st.lists(st.integers(0, 20000), max_size=6),
)
def test_the_compiled_writer_writes_the_references_blocks(compiled: ModuleType, data: bytes, block_size: int, cuts: list[int]) -> None:
    codec = Lz4BlockStream(block_size=block_size)
    expected = codec._compress_py(data)
    got = codec.compress_parts(cut(data, cuts))
    assert framing(got) == framing(expected)
    assert reference(got) == data
    assert codec.compress(data) == codec.compress_parts([data])  # however the input is cut: the same stream


def test_parts_of_every_kind_and_size(compiled: ModuleType) -> None:
    data = (b"valve-7;" * 5000) + os.urandom(9000) + b"\x00" * 70000
    codec = Lz4BlockStream(block_size=1024)
    expected_blocks = framing(codec._compress_py(data))
    for parts in (
        [data],
        [b"", data, b""],
        [data[i : i + 1] for i in range(0, 5000)] + [data[5000:]],  # one byte at a time, then the rest
        [bytearray(data[:777]), memoryview(data)[777:4000], data[4000:]],
        cut(data, [1023, 1024, 1025, 2048, 50000]),
    ):
        got = codec.compress_parts(iter(parts))
        assert framing(got) == expected_blocks
        assert reference(got) == data


def test_incompressible_blocks_are_stored_and_repeats_compressed(compiled: ModuleType) -> None:
    noise, calm = os.urandom(4096), b"\x00" * 4096
    tokens = [t for t, _, orig, _ in blocks_of(Lz4BlockStream(block_size=1024).compress(noise + calm)) if orig]
    assert tokens == [0x10] * 4 + [0x20] * 4  # level 0 for 1 KiB blocks; RAW, then LZ4
    assert blocks_of(Lz4BlockStream(block_size=1024).compress(b"")) == [(0x10, 0, 0, 0)]  # the end mark alone


def test_the_compiled_writer_returns_the_tail(compiled: ModuleType) -> None:
    def call(prefix: bytes, data: bytes, final: bool) -> tuple[bytes, bytes]:
        return compiled.compress(prefix, data, 64, 0, XXHASH_SEED, CHECKSUM_MASK, final)

    blocks, tail = call(b"", b"x" * 150, False)
    assert tail == b"x" * 22 and [b[2] for b in blocks_of(blocks)] == [64, 64]
    blocks, tail = call(b"ab", b"c" * 10, False)  # no whole block yet: everything is the tail
    assert blocks == b"" and tail == b"ab" + b"c" * 10
    blocks, tail = call(b"p" * 63, b"q" * 70, False)  # the first block spans prefix and data
    assert tail == b"q" * 5
    assert reference(blocks + header(0x10, 0, 0, 0)) == b"p" * 63 + b"q" * 65
    blocks, tail = call(b"p" * 20, b"", True)
    assert tail == b"" and reference(blocks) == b"p" * 20 and blocks_of(blocks)[-1] == (0x10, 0, 0, 0)


def test_the_compiled_writer_refuses_bad_arguments(compiled: ModuleType) -> None:
    with pytest.raises(ValueError, match="prefix must be shorter"):
        compiled.compress(b"x" * 64, b"", 64, 0, XXHASH_SEED, CHECKSUM_MASK, False)
    for block_size, level in ((63, 0), ((1 << 25) + 1, 0), (64, 16), (64, -1)):
        with pytest.raises(ValueError, match="block_size must be"):
            compiled.compress(b"", b"abc", block_size, level, XXHASH_SEED, CHECKSUM_MASK, True)


def test_without_the_compiled_writer_the_reference_writes(monkeypatch: pytest.MonkeyPatch) -> None:
    data = b"flow-rate " * 4000
    parts = [data[:1000], data[1000:]]
    with_helper = Lz4BlockStream().compress_parts(parts)
    monkeypatch.setattr(lz4_stream, "_lz4stream", None)
    calls = []
    real = Lz4BlockStream._compress_py
    monkeypatch.setattr(Lz4BlockStream, "_compress_py", lambda self, d: calls.append(len(d)) or real(self, d))
    without = Lz4BlockStream().compress_parts(iter(parts))
    assert calls == [len(data)] and framing(without) == framing(with_helper)
    assert Lz4BlockStream().decompress(without, WHERE) == data
