"""Hadoop ``.crc`` sidecars: names, layout, reference CRC-32 values, and rejection of bad sidecars."""

from __future__ import annotations

import struct
import zlib

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from migrate.codecs.hadoop_crc import crc_name, make_crc, verify_crc
from migrate.errors import CorruptInput

WHERE = "cp/state/0/1/3.delta"


@pytest.mark.parametrize(
    ("name", "sidecar"),
    [
        ("3.delta", ".3.delta.crc"),
        ("12.snapshot", ".12.snapshot.crc"),
        ("0", ".0.crc"),
        ("cp/offsets/7", "cp/offsets/.7.crc"),
        ("/abs/state/0/1/3.delta", "/abs/state/0/1/.3.delta.crc"),
        ("s3://bucket/cp/state/0/1/3.delta", "s3://bucket/cp/state/0/1/.3.delta.crc"),
    ],
)
def test_crc_name(name: str, sidecar: str) -> None:
    assert crc_name(name) == sidecar


def test_crc_name_refuses_a_folder() -> None:
    with pytest.raises(ValueError):
        crc_name("cp/state/")


def test_check_value_from_the_crc_catalogue() -> None:
    # CRC-32 (ISO-HDLC) check value for b"123456789" is 0xCBF43926 (published CRC catalogue).
    assert make_crc(b"123456789") == b"crc\x00" + struct.pack(">i", 512) + bytes.fromhex("cbf43926")


def test_layout_one_big_endian_crc32_per_chunk() -> None:
    data = bytes(range(256)) * 5  # 1280 bytes -> chunks of 512, 512, 256
    sidecar = make_crc(data)
    assert sidecar[:8] == b"crc\x00\x00\x00\x02\x00"
    sums = struct.unpack(">3I", sidecar[8:])
    assert sums == tuple(zlib.crc32(data[i : i + 512]) for i in (0, 512, 1024))  # zlib = reference
    assert make_crc(b"") == b"crc\x00\x00\x00\x02\x00"
    assert make_crc(data, 1000)[4:8] == struct.pack(">i", 1000)
    assert len(make_crc(data, 1000)) == 8 + 2 * 4


@settings(max_examples=100, deadline=None)
@given(data=st.binary(max_size=5000), step=st.sampled_from([1, 7, 512, 4096]))
def test_round_trip(data: bytes, step: int) -> None:
    verify_crc(data, make_crc(data, step), WHERE)


@settings(max_examples=100, deadline=None)
@given(data=st.binary(min_size=1, max_size=3000), index=st.integers(0), mask=st.integers(1, 255))
def test_any_flipped_data_byte_is_caught(data: bytes, index: int, mask: int) -> None:
    sidecar = make_crc(data)
    damaged = bytearray(data)
    damaged[index % len(data)] ^= mask
    with pytest.raises(CorruptInput) as info:
        verify_crc(bytes(damaged), sidecar, WHERE)
    assert info.value.path == WHERE
    lo = (index % len(data)) // 512 * 512
    assert f"bytes {lo}.." in str(info.value)


DATA = b"parcel drops " * 100  # 1300 bytes, 3 chunks
BAD_SIDECARS = {
    "empty": b"",
    "truncated header": make_crc(DATA)[:6],
    "bad magic": b"CRC\x00" + make_crc(DATA)[4:],
    "zero bytes per checksum": b"crc\x00" + bytes(4) + make_crc(DATA)[8:],
    "negative bytes per checksum": b"crc\x00" + struct.pack(">i", -512) + make_crc(DATA)[8:],
    "one checksum missing": make_crc(DATA)[:-4],
    "one checksum too many": make_crc(DATA) + bytes(4),
    "partial checksum": make_crc(DATA)[:-1],
    "other bytes per checksum": make_crc(DATA, 256)[:8] + make_crc(DATA)[8:],
    "wrong checksum": make_crc(DATA)[:-1] + bytes([make_crc(DATA)[-1] ^ 1]),
}


@pytest.mark.parametrize("case", sorted(BAD_SIDECARS))
def test_bad_sidecars_raise_corrupt_input_naming_the_file(case: str) -> None:
    verify_crc(DATA, make_crc(DATA), WHERE)
    with pytest.raises(CorruptInput) as info:
        verify_crc(DATA, BAD_SIDECARS[case], WHERE)
    assert info.value.path == WHERE
    assert "\n" not in str(info.value)
