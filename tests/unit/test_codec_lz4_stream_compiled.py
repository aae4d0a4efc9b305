"""The compiled LZ4 stream decoder (``migrate.codecs._lz4stream``) gives the bytes of the Python
decoder (``Lz4BlockStream._decompress_py``, the reference) for every well-formed stream, and
declines (None) exactly the streams the reference refuses, so the reference names the problem:
hypothesis data of every kind through every block size, streams back to back, stored (RAW)
blocks, hand-built blocks from the published LZ4 block format, and every truncation and every
single flipped byte of a small stream. test_codec_lz4_stream.py runs its checks through
``Lz4BlockStream.decompress``, which takes this decoder when it is loaded.

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
    stream = Lz4BlockStream(block_size=block_size).compress(data)
    out = fast(compiled, stream)
    assert out is not None
    assert isinstance(out, bytearray)
    assert out == data == reference(stream)


@settings(max_examples=50, deadline=None)
@given(parts=st.lists(payloads(), min_size=1, max_size=4))
def test_streams_back_to_back(compiled: ModuleType, parts: list[bytes]) -> None:
    stream = b"".join(Lz4BlockStream(block_size=256).compress(p) for p in parts)
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
    stream = Lz4BlockStream(block_size=256).compress(data)
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
    stream = Lz4BlockStream(block_size=1024).compress(data)
    assert fast(compiled, bytearray(stream)) == data
    assert fast(compiled, memoryview(b"xx" + stream)[2:]) == data


def test_the_codec_uses_the_compiled_decoder_when_loaded(compiled: ModuleType, monkeypatch: pytest.MonkeyPatch) -> None:
    assert lz4_stream._lz4stream is compiled
    data = b"queue-depth " * 700
    stream = Lz4BlockStream().compress(data)
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
    stream = Lz4BlockStream().compress(data)
    monkeypatch.setattr(lz4_stream, "_lz4stream", None)
    assert Lz4BlockStream().decompress(stream, WHERE) == data
    with pytest.raises(CorruptInput, match="missing end mark"):
        Lz4BlockStream().decompress(stream[:-21], WHERE)
