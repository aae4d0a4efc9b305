"""Hadoop checksum sidecars: the ``.NAME.crc`` file the engine's local file system writes beside NAME.

Layout (observed on files written by Spark 4.3.0 through Hadoop's checksummed local file system;
the CRC matched ``zlib.crc32``, the plain CRC-32 polynomial, not CRC-32C):

    "crc" 00                    4 bytes magic
    bytes per checksum          int32 big-endian (512)
    one CRC-32 per chunk        uint32 big-endian, for each ``bytes per checksum`` slice of the
                                data file; the last slice may be shorter; none for an empty
                                file (from memory: Hadoop writes the header only)

The engine does not check sidecars on its own state reads (its FileContext path on the local file
system; observed), but Hadoop's FileSystem reader does, so a rewritten file needs a fresh sidecar
(or none: from memory, a missing sidecar is not an error for either reader).

The per-chunk loop runs in the compiled helper ``_chunkcrc`` (a CRC per slice, without the GIL)
when it is built: measured 0.46-0.72 -> 0.91-1.12 GB/s on a 64 MiB buffer with zlib's crc32 (over
the whole buffer at once: 1.9-2.2 GB/s; the per-call work on 512-byte slices is the rest). The
helper takes the system's libdeflate instead when it loads (``libdeflate.so.0``, checked against
the published check value and zlib at import): 7.9 GB/s on the same slices; the 10M-key convert
heap map -> RocksDB, four alternating pairs of whole commands: 20.30 -> 18.66 CPU s (medians,
``benchmarks/results/2026-12-03-ab-libdeflate-crc.md``).
:func:`chunk_crcs_py`
(``map`` of ``zlib.crc32`` over memoryview slices, itself ten times faster than a numpy
table-driven CRC over all chunks at once) is the reference and the fallback.
"""

from __future__ import annotations

import posixpath
import struct
import sys
import zlib
from array import array

from ..errors import CorruptInput

try:  # the compiled per-chunk loop (setup.py builds it when a C compiler and zlib's headers are there)
    from . import _chunkcrc
except ImportError:  # not built: the Python loop below
    _chunkcrc = None

MAGIC = b"crc\x00"
if array("I").itemsize != 4:  # pragma: no cover - never: "I" is 4 bytes wherever CPython runs here
    raise ImportError("hadoop_crc needs a 4-byte unsigned int array type")
HEADER = struct.Struct(">4si")
DEFAULT_BYTES_PER_CHECKSUM = 512


def crc_name(filename: str) -> str:
    """Sidecar name for a file name or path: ``"3.delta"`` -> ``".3.delta.crc"`` (same folder)."""
    folder, base = posixpath.split(filename)
    if not base:
        raise ValueError(f"not a file name: {filename!r}")
    return posixpath.join(folder, f".{base}.crc") if folder else f".{base}.crc"


def chunk_crcs(data: bytes, bytes_per_checksum: int = DEFAULT_BYTES_PER_CHECKSUM) -> bytes:
    """The big-endian CRC-32 of every ``bytes_per_checksum`` slice of ``data``, concatenated."""
    if _chunkcrc is None:
        return chunk_crcs_py(data, bytes_per_checksum)
    return _chunkcrc.chunk_crcs(data, bytes_per_checksum)


def chunk_crcs_py(data: bytes, bytes_per_checksum: int = DEFAULT_BYTES_PER_CHECKSUM) -> bytes:
    """:func:`chunk_crcs` in Python: the reference of the compiled loop, and its fallback."""
    if bytes_per_checksum <= 0:
        raise ValueError(f"bytes per checksum must be positive, got {bytes_per_checksum}")
    view = memoryview(data)
    step = bytes_per_checksum
    sums = array("I", map(zlib.crc32, (view[i : i + step] for i in range(0, len(view), step))))
    if sys.byteorder == "little":
        sums.byteswap()
    return sums.tobytes()


def make_crc(data: bytes, bytes_per_checksum: int = DEFAULT_BYTES_PER_CHECKSUM) -> bytes:
    """The whole sidecar file for ``data``."""
    return HEADER.pack(MAGIC, bytes_per_checksum) + chunk_crcs(data, bytes_per_checksum)


def verify_crc(data: bytes, crc: bytes, where: str) -> None:
    """Raise :class:`CorruptInput` (naming ``where``, the data file) unless ``crc`` is its sidecar."""
    if len(crc) < HEADER.size:
        raise CorruptInput(f"checksum sidecar is truncated ({len(crc)} bytes)", where)
    magic, step = HEADER.unpack_from(crc, 0)
    if magic != MAGIC:
        raise CorruptInput("checksum sidecar has a bad magic", where)
    if step <= 0:
        raise CorruptInput(f"checksum sidecar has bad bytes-per-checksum {step}", where)
    expected = chunk_crcs(data, step)
    stored = memoryview(crc)[HEADER.size :]
    if len(stored) != len(expected):
        raise CorruptInput(
            f"checksum sidecar covers {len(stored) // 4} chunks of {step} bytes, file has {len(expected) // 4}"
            + (" (sidecar length is not a whole number of checksums)" if len(stored) % 4 else ""),
            where,
        )
    if stored != expected:
        first = next(i for i in range(0, len(expected), 4) if stored[i : i + 4] != expected[i : i + 4]) // 4
        raise CorruptInput(
            f"checksum mismatch in bytes {first * step}..{min(len(data), (first + 1) * step) - 1}", where
        )
