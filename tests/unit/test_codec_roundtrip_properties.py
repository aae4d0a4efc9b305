"""Property tests: every codec round-trips any bytes; damage is reported, never returned as data."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from migrate.codecs import CODEC_NAMES, codec_for
from migrate.codecs.lz4_stream import Lz4BlockStream
from migrate.codecs.snappy_stream import SnappyStream
from migrate.errors import CorruptInput

WHERE = "cp/state/0/0/5.delta"
# Random bytes (incompressible: raw blocks / stored chunks) and repetitive bytes long enough to
# cross 32 KiB and 64 KiB block boundaries.
payloads = st.one_of(
    st.binary(max_size=4096),
    st.builds(lambda unit, n: unit * n, st.binary(min_size=1, max_size=40), st.integers(1, 6000)),
)
CODECS = [codec_for(name) for name in CODEC_NAMES] + [Lz4BlockStream(block_size=64), SnappyStream(block_size=100)]
IDS = list(CODEC_NAMES) + ["lz4-64B-blocks", "snappy-100B-chunks"]


@pytest.mark.parametrize("codec", CODECS, ids=IDS)
@settings(max_examples=60, deadline=None)
@given(data=payloads)
def test_round_trip(codec, data: bytes) -> None:
    assert codec.decompress(codec.compress(data), WHERE) == data


@pytest.mark.parametrize("codec", CODECS, ids=IDS)
@settings(max_examples=60, deadline=None)
@given(data=payloads, a=st.binary(max_size=300))
def test_concatenated_streams_read_as_one(codec, data: bytes, a: bytes) -> None:
    assert codec.decompress(codec.compress(a) + codec.compress(data), WHERE) == a + data


@pytest.mark.parametrize("name", ["lz4", "zstd"])
@settings(max_examples=80, deadline=None)
@given(data=payloads, cut=st.floats(0, 1, exclude_max=True))
def test_any_truncation_of_an_end_marked_stream_is_caught(name: str, data: bytes, cut: float) -> None:
    codec = codec_for(name)
    stream = codec.compress(data)
    with pytest.raises(CorruptInput) as info:
        codec.decompress(stream[: int(len(stream) * cut)], WHERE)
    assert info.value.path == WHERE


@pytest.mark.parametrize("name", ["snappy", "lzf"])
@settings(max_examples=80, deadline=None)
@given(data=st.binary(min_size=1, max_size=3000), drop=st.integers(1, 40))
def test_truncation_inside_the_last_chunk_is_caught(name: str, data: bytes, drop: int) -> None:
    # These formats have no end mark: only a cut inside a chunk can be seen. One chunk here
    # (data < 32 KiB), so any cut that keeps the header and loses part of the chunk must raise.
    codec = codec_for(name)
    stream = codec.compress(data)
    header = 16 if name == "snappy" else 0
    cut = max(header + 1, len(stream) - drop)
    with pytest.raises(CorruptInput):
        codec.decompress(stream[:cut], WHERE)


@settings(max_examples=150, deadline=None)
@given(data=payloads, where=st.floats(0, 1, exclude_max=True), mask=st.integers(1, 255))
def test_lz4_damage_is_never_returned_as_different_data(data: bytes, where: float, mask: int) -> None:
    # A flip in the level nibble of a small block's token is invisible to the format (the engine's
    # reader accepts it too); every other change must raise. Different bytes must never come back.
    codec = codec_for("lz4")
    stream = bytearray(codec.compress(data))
    stream[int(len(stream) * where)] ^= mask
    try:
        result = codec.decompress(bytes(stream), WHERE)
    except CorruptInput:
        return
    assert result == data
