"""The compiled per-chunk CRC loop (``migrate.codecs._chunkcrc``) gives the sidecar bodies of the
Python loop (``hadoop_crc.chunk_crcs_py``, the reference) and of a bitwise CRC-32 written here from
the algorithm's definition, on hypothesis data of every length around the slice size, and the
published check value; it refuses a slice size that is not positive as the reference does. Each
check runs through both CRC libraries the loop can call: the system's libdeflate (loaded when
present) and zlib (``use_zlib=True``). test_hadoop_crc.py runs its sidecar checks through whichever
loop is in use. Under ``CI=true`` libdeflate must be the one loaded (``.ci/run`` installs it).

Outside CI a missing extension skips these tests; under ``CI=true`` it fails them (as in
test_digest_compiled.py).
"""

from __future__ import annotations

import os
import struct
from types import ModuleType

import pytest
from compiled_extensions import load
from hypothesis import given, settings
from hypothesis import strategies as st

from migrate.codecs import hadoop_crc
from migrate.codecs.hadoop_crc import chunk_crcs_py


@pytest.fixture(scope="module")
def compiled() -> ModuleType:
    return load("migrate.codecs._chunkcrc", "the compiled per-chunk CRC loop")


def bitwise_crc32(data: bytes) -> int:
    """CRC-32 (ISO-HDLC) by its definition: reflected polynomial 0xEDB88320, initial value and final
    XOR 0xFFFFFFFF (the parameters of the published CRC catalogue's CRC-32/ISO-HDLC entry; common
    practice). Slow, independent of zlib."""
    crc = 0xFFFFFFFF
    for byte in data:
        crc ^= byte
        for _ in range(8):
            crc = (crc >> 1) ^ (0xEDB88320 if crc & 1 else 0)
    return crc ^ 0xFFFFFFFF


BOTH = pytest.mark.parametrize("use_zlib", [False, True], ids=["loaded-library", "zlib"])


@BOTH
def test_check_value_from_the_crc_catalogue(compiled: ModuleType, use_zlib: bool) -> None:
    # CRC-32/ISO-HDLC check value for b"123456789" is 0xCBF43926 (published CRC catalogue)
    assert compiled.chunk_crcs(b"123456789", 512, use_zlib=use_zlib) == bytes.fromhex("cbf43926")
    assert bitwise_crc32(b"123456789") == 0xCBF43926


@BOTH
@settings(max_examples=150, deadline=None)
@given(data=st.binary(max_size=1600), step=st.sampled_from([1, 3, 64, 511, 512, 513, 4096]))
def test_same_body_as_the_python_loop_and_the_bitwise_crc(
    compiled: ModuleType, use_zlib: bool, data: bytes, step: int
) -> None:
    body = compiled.chunk_crcs(data, step, use_zlib=use_zlib)
    assert body == chunk_crcs_py(data, step)
    slices = [data[i : i + step] for i in range(0, len(data), step)]
    assert body == b"".join(struct.pack(">I", bitwise_crc32(s)) for s in slices)


@BOTH
@pytest.mark.parametrize("size", [0, 1, 511, 512, 513, 1024, 5 * 512 + 17])
def test_slice_boundaries(compiled: ModuleType, use_zlib: bool, size: int) -> None:
    data = bytes((7 * i + 3) % 256 for i in range(size))
    body = compiled.chunk_crcs(data, 512, use_zlib=use_zlib)
    assert len(body) == 4 * ((size + 511) // 512)
    assert body == chunk_crcs_py(data, 512)


@BOTH
def test_large_buffers_at_odd_alignments(compiled: ModuleType, use_zlib: bool) -> None:
    # the folding code of a hardware CRC takes wide, aligned steps: slices at every alignment
    data = os.urandom(3 * 4096 + 77)
    for start in range(0, 16):
        view = memoryview(data)[start:]
        assert compiled.chunk_crcs(view, 512, use_zlib=use_zlib) == chunk_crcs_py(view, 512)
    assert compiled.chunk_crcs(data, 1 << 20, use_zlib=use_zlib) == chunk_crcs_py(data, 1 << 20)


@BOTH
def test_takes_any_buffer(compiled: ModuleType, use_zlib: bool) -> None:
    data = bytes(range(256)) * 9
    assert compiled.chunk_crcs(memoryview(data)[100:], 512, use_zlib=use_zlib) == chunk_crcs_py(data[100:], 512)
    assert compiled.chunk_crcs(bytearray(data), 512, use_zlib=use_zlib) == chunk_crcs_py(data, 512)


@BOTH
@pytest.mark.parametrize("step", [0, -512])
def test_refuses_a_slice_size_that_is_not_positive(compiled: ModuleType, use_zlib: bool, step: int) -> None:
    with pytest.raises(ValueError):
        compiled.chunk_crcs(b"abc", step, use_zlib=use_zlib)
    with pytest.raises(ValueError):
        chunk_crcs_py(b"abc", step)


def test_names_the_library_it_uses(compiled: ModuleType) -> None:
    assert compiled.crc_library() in ("libdeflate", "zlib")
    if os.environ.get("CI", "").lower() == "true":
        assert compiled.crc_library() == "libdeflate", "CI installs libdeflate0; the loop must load it"


def test_the_module_uses_the_compiled_loop_when_built(compiled: ModuleType) -> None:
    assert hadoop_crc._chunkcrc is compiled
