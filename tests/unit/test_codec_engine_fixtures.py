"""Engine-written state files (tests/fixtures/codecs, made by its generate.py) decode correctly.

Proves the reader side for all four codecs against real engine output: each file decompresses,
the four codecs' files of one (case, partition, version) give the same raw bytes, the raw bytes
are a well-formed delta (length-prefixed key/value records closed by -1) holding exactly the keys
the manifest's input had, and every lz4 block's stored checksum equals xxHash32 (seed 0x9747b28c,
28-bit mask) computed by the ``xxhash`` reference library over the block as decoded by ``lz4.block``.
"""

from __future__ import annotations

import json
import re
import struct
from collections import defaultdict
from pathlib import Path

import lz4.block
import pytest
import xxhash

from migrate.codecs import CODEC_NAMES, codec_for
from migrate.codecs.hadoop_crc import crc_name, make_crc, verify_crc

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "codecs"
MANIFEST = json.loads((FIXTURES / "manifest.json").read_text())
FILES = MANIFEST["files"]


def decoded(entry: dict) -> bytes:
    # bytes for hashing: a codec may return a bytearray (lz4 grows its output in place)
    return bytes(codec_for(entry["codec"]).decompress((FIXTURES / entry["path"]).read_bytes(), entry["path"]))


def delta_keys(raw: bytes) -> list[bytes]:
    """Walk the delta records (int32 BE key size, key, int32 BE value size, value; -1 ends)."""
    keys, pos = [], 0
    while True:
        (key_size,) = struct.unpack_from(">i", raw, pos)
        if key_size == -1:
            assert pos + 4 == len(raw), "bytes after the end marker"
            return keys
        key = raw[pos + 4 : pos + 4 + key_size]
        (value_size,) = struct.unpack_from(">i", raw, pos + 4 + key_size)
        assert key_size > 0 and value_size > 0
        keys.append(key)
        pos += 8 + key_size + value_size


def test_manifest_covers_every_codec_and_case() -> None:
    seen = {(f["codec"], f["case"]) for f in FILES}
    assert seen == {(c, case) for c in CODEC_NAMES for case in MANIFEST["cases"]}
    for entry in FILES:
        assert (FIXTURES / entry["path"]).stat().st_size < 50_000


@pytest.mark.parametrize("entry", FILES, ids=[f["path"] for f in FILES])
def test_engine_file_decodes_and_its_sidecar_verifies(entry: dict) -> None:
    path = FIXTURES / entry["path"]
    data = path.read_bytes()
    sidecar = (path.parent / crc_name(path.name)).read_bytes()
    verify_crc(data, sidecar, entry["path"])
    assert make_crc(data) == sidecar  # our sidecar writer reproduces the engine's byte for byte
    raw = decoded(entry)
    assert raw.endswith(b"\xff\xff\xff\xff")


def test_all_codecs_decode_to_the_same_delta_and_all_keys_are_there() -> None:
    by_slot: dict[tuple, dict[str, bytes]] = defaultdict(dict)
    for entry in FILES:
        by_slot[(entry["case"], entry["version"], entry["partition"])][entry["codec"]] = decoded(entry)
    for (case, version, _part), raws in by_slot.items():
        assert set(raws) == set(CODEC_NAMES)
        assert len(set(raws.values())) == 1, f"codecs disagree for {case} v{version}"
    pattern = re.compile(rb"locker-\d{6}")
    for case, spec in MANIFEST["cases"].items():
        for version in range(1, spec["versions"] + 1):
            keys: list[bytes] = []
            for part in range(MANIFEST["partitions"]):
                records = delta_keys(by_slot[(case, version, part)]["lz4"])
                keys += [m.group() for k in records for m in [pattern.search(k)] if m]
                assert len(records) > 0
            expected = {MANIFEST["key_format"].format(i).encode() for i in range(spec["lockers"])}
            assert sorted(keys) == sorted(expected)  # every key once, across the partitions


def test_engine_lz4_blocks_checksums_match_reference_xxhash32() -> None:
    blocks = 0
    for entry in (f for f in FILES if f["codec"] == "lz4"):
        data, pos = (FIXTURES / entry["path"]).read_bytes(), 0
        while pos < len(data):
            magic, token, comp, orig, check = struct.unpack_from("<8sBiiI", data, pos)
            assert magic == b"LZ4Block" and token in (0x25, 0x15)
            if orig:
                payload = data[pos + 21 : pos + 21 + comp]
                raw = payload if token == 0x15 else lz4.block.decompress(payload, uncompressed_size=orig)
                assert check == xxhash.xxh32_intdigest(raw, seed=0x9747B28C) & 0x0FFFFFFF
                assert orig <= 32768
                blocks += 1
            pos += 21 + comp
    assert blocks > 8  # the multi case has several blocks per file


def test_engine_snappy_and_lzf_chunk_sizes() -> None:
    entry = next(f for f in FILES if f["codec"] == "snappy" and f["case"] == "multi")
    data = (FIXTURES / entry["path"]).read_bytes()
    assert data[:16] == b"\x82SNAPPY\x00\x00\x00\x00\x01\x00\x00\x00\x01"
    entry = next(f for f in FILES if f["codec"] == "lzf" and f["case"] == "multi")
    data = (FIXTURES / entry["path"]).read_bytes()
    assert data[:3] == b"ZV\x01" and struct.unpack_from(">H", data, 5)[0] == 0xFFFF


@pytest.mark.parametrize("codec", CODEC_NAMES)
def test_recompressing_engine_deltas_round_trips(codec: str) -> None:
    for entry in (f for f in FILES if f["codec"] == codec):
        raw = decoded(entry)
        for target in CODEC_NAMES:
            stream = codec_for(target).compress(raw)
            assert codec_for(target).decompress(stream, "x") == raw
