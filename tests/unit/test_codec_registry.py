"""codec_for resolves the engine's conf values (short names and codec class names) and nothing else."""

from __future__ import annotations

import pytest

from migrate.codecs import CODEC_NAMES, Codec, codec_for, compress_parts
from migrate.errors import Unsupported

# The engine's codec class names (org.apache.spark.io.*; value of CompressionCodec's short-name
# table, from memory and matching the names the engine accepts for spark.io.compression.codec).
ENGINE_CLASSES = {
    "lz4": "org.apache.spark.io.LZ4CompressionCodec",
    "zstd": "org.apache.spark.io.ZStdCompressionCodec",
    "snappy": "org.apache.spark.io.SnappyCompressionCodec",
    "lzf": "org.apache.spark.io.LZFCompressionCodec",
}


def test_codec_names_are_the_four_engine_codecs() -> None:
    assert sorted(CODEC_NAMES) == sorted(ENGINE_CLASSES)


@pytest.mark.parametrize("short", sorted(ENGINE_CLASSES))
def test_short_names_class_names_and_case_all_resolve_to_the_same_codec(short: str) -> None:
    codec = codec_for(short)
    assert isinstance(codec, Codec)
    assert codec.name == short
    cls = ENGINE_CLASSES[short]
    for spelling in (short.upper(), f" {short} ", cls, cls.upper(), cls.rsplit(".", 1)[1]):
        assert codec_for(spelling) is codec


@pytest.mark.parametrize("bad", ["gzip", "", "lz4x", "org.apache.spark.io.NoCodec", "none"])
def test_unknown_names_are_unsupported_and_name_the_source(bad: str) -> None:
    with pytest.raises(Unsupported) as info:
        codec_for(bad, "cp/offsets/7")
    assert info.value.path == "cp/offsets/7"
    assert "cp/offsets/7" in str(info.value)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize("short", CODEC_NAMES)
def test_compress_parts_writes_the_stream_of_the_parts_joined(short: str) -> None:
    """Every codec, whether it compresses part by part (lz4) or joins the parts first: the stream
    decodes, by the codec's own reader, to the parts' bytes one after the other."""
    codec = codec_for(short)
    parts = [b"gate-3 open;" * 300, b"", bytearray(b"\x00" * 5000), memoryview(b"gate-3 shut;" * 200)]
    stream = compress_parts(codec, iter(parts))
    assert bytes(codec.decompress(stream, "parts")) == b"".join(bytes(p) for p in parts)
