"""Order-independent state digests: pure functions over batches of (key, value) bytes.

A digest of one store partition is ``(rows, lane_a, lane_b)``: the row count plus two 64-bit sums
(mod 2**64) of a per-row hash, each lane with its own multiplier. Summing makes the digest
independent of row order (and it counts duplicates, unlike XOR).

Per-row hash, for each lane: the key and the value are each read as little-endian 64-bit words
(the last word zero-padded), ``h = sum(w_j * P**j) mod 2**64`` over the words, with P odd. A
change of one byte changes one word by ``d * 256**k`` (0 < |d| < 256, k < 8), which times an odd
power of P is never 0 mod 2**64, so every single-byte change changes ``h``. ``h`` and the length
of each side are then mixed with the splitmix64 finaliser (common practice; constants from
memory, checked by the unit tests against a plain-Python reference) so rows are bound to their
own key/value split.

Everything is numpy over whole Arrow buffers: no per-row Python.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_LANES = (np.uint64(0x100000001B3), np.uint64(0xC2B2AE3D27D4EB4F))  # odd multipliers
_SEEDS = (np.uint64(0x243F6A8885A308D3), np.uint64(0x13198A2E03707344))


@dataclass(frozen=True)
class Digest:
    rows: int = 0
    lane_a: int = 0
    lane_b: int = 0

    def __add__(self, other: "Digest") -> "Digest":
        mask = (1 << 64) - 1
        return Digest(self.rows + other.rows, (self.lane_a + other.lane_a) & mask, (self.lane_b + other.lane_b) & mask)

    @property
    def hexdigest(self) -> str:
        return f"{self.lane_a:016x}{self.lane_b:016x}"

    def to_json(self) -> dict[str, object]:
        return {"rows": self.rows, "hash": self.hexdigest}

    @classmethod
    def from_json(cls, obj: dict[str, object]) -> "Digest":
        h = str(obj["hash"])
        return cls(int(obj["rows"]), int(h[:16], 16), int(h[16:], 16))  # type: ignore[arg-type]


def _mix(x: np.ndarray) -> np.ndarray:
    x = x ^ (x >> np.uint64(30))
    x = x * _M1
    x = x ^ (x >> np.uint64(27))
    x = x * _M2
    return x ^ (x >> np.uint64(31))


def _words(arr: pa.Array) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(word buffer, first word index per row, word count per row) for a binary array."""
    if not (pa.types.is_binary(arr.type) or pa.types.is_large_binary(arr.type)):
        arr = arr.cast(pa.large_binary())
    n = len(arr)
    _, off_buf, data_buf = arr.buffers()
    off_dtype = np.int64 if pa.types.is_large_binary(arr.type) else np.int32
    offsets = np.frombuffer(off_buf, dtype=off_dtype, count=n + 1, offset=arr.offset * np.dtype(off_dtype).itemsize).astype(np.int64)
    lengths = np.diff(offsets)
    data = np.frombuffer(data_buf, dtype=np.uint8) if data_buf is not None else np.zeros(0, np.uint8)
    nwords = (lengths + 7) // 8
    if n and offsets[0] % 8 == 0 and not np.any(lengths % 8) and offsets[-1] <= len(data):
        start = int(offsets[0])
        words = data[start : int(offsets[-1])].view("<u8")
        first = (offsets[:-1] - start) // 8
        return words, first, nwords
    # general path: copy each row into a zero-padded, 8-byte aligned buffer (vectorised scatter)
    first = np.concatenate(([0], np.cumsum(nwords)[:-1])) if n else np.zeros(0, np.int64)
    padded = np.zeros(int(nwords.sum()) * 8, dtype=np.uint8)
    total = int(lengths.sum())
    if total:
        row_of_byte = np.repeat(np.arange(n), lengths)
        within = np.arange(total) - np.repeat(offsets[:-1] - offsets[0], lengths)
        src = data[int(offsets[0]) : int(offsets[0]) + total] if offsets[-1] - offsets[0] == total else None
        if src is None:  # offsets not contiguous (cannot happen for Arrow arrays, kept for safety)
            src = np.concatenate([data[int(a) : int(b)] for a, b in zip(offsets[:-1], offsets[1:])])
        padded[first[row_of_byte] * 8 + within] = src
    return padded.view("<u8"), first, nwords


def _side_hash(arr: pa.Array, lane: int) -> tuple[np.ndarray, np.ndarray]:
    words, first, nwords = _words(arr)
    n = len(first)
    h = np.zeros(n, dtype=np.uint64)
    total = int(nwords.sum())
    if total:
        maxw = int(nwords.max())
        powers = np.empty(maxw, dtype=np.uint64)
        powers[0] = 1
        if maxw > 1:
            powers[1:] = _LANES[lane]
            powers = np.cumprod(powers, dtype=np.uint64)
        pos = np.arange(total) - np.repeat(np.cumsum(nwords) - nwords, nwords)
        idx = np.repeat(first, nwords) + pos
        contrib = words[idx] * powers[pos]
        nonempty = nwords > 0
        starts = (np.cumsum(nwords) - nwords)[nonempty]
        h[nonempty] = np.add.reduceat(contrib, starts)
    return h, nwords


def _byte_lengths(arr: pa.Array) -> np.ndarray:
    import pyarrow.compute as pc

    return np.asarray(pc.binary_length(arr).fill_null(0), dtype=np.uint64)


def digest_batch(batch: pa.RecordBatch) -> Digest:
    """Digest of one batch of ``key``/``value`` binary columns."""
    n = batch.num_rows
    if n == 0:
        return Digest()
    keys = batch.column("key")
    values = batch.column("value")
    klen = _byte_lengths(keys)
    vlen = _byte_lengths(values)
    lanes = []
    with np.errstate(over="ignore"):
        for lane in (0, 1):
            hk, _ = _side_hash(keys, lane)
            hv, _ = _side_hash(values, lane)
            a = _mix(hk ^ _SEEDS[lane] ^ (klen * _GOLDEN))
            b = _mix(hv + (vlen * _GOLDEN) + _SEEDS[1 - lane])
            row = _mix(a * _LANES[lane] + b)
            lanes.append(int(row.sum(dtype=np.uint64)))
    return Digest(n, lanes[0], lanes[1])


def digest_batches(batches: Iterable[pa.RecordBatch]) -> Digest:
    total = Digest()
    for b in batches:
        total = total + digest_batch(b)
    return total


class DigestingIterator:
    """Passes batches through unchanged while accumulating their digest and byte counts."""

    def __init__(self, batches: Iterable[pa.RecordBatch]) -> None:
        self._it = iter(batches)
        self.digest = Digest()
        self.key_bytes = 0
        self.value_bytes = 0

    def __iter__(self) -> "DigestingIterator":
        return self

    def __next__(self) -> pa.RecordBatch:
        batch = next(self._it)
        self.digest = self.digest + digest_batch(batch)
        self.key_bytes += int(_byte_lengths(batch.column("key")).sum())
        self.value_bytes += int(_byte_lengths(batch.column("value")).sum())
        return batch
