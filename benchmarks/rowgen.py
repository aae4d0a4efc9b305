"""Synthetic state rows for the benchmarks: two row shapes, built as UnsafeRow bytes with numpy.

Invented scenario: greenhouse sensors keyed by (sensor name, sensor id). Both shapes are the
state of a streaming aggregation grouped by those two columns, so the engine can restart a query
on a generated checkpoint (see ``engine_load.py``):

* ``narrow``: value = count, sum, max, min (four longs: ``count(*)``, ``sum(reading)``,
  ``max(reading)``, ``min(reading)``);
* ``wide``: value = ``max(label)`` string, ``max(zone)`` string, count, sum, ``max(ts)`` long and
  ``max(recent)`` array<long> of 0..12 elements (variable length: strings and an array).

Every value is a pure function of (key id, version, seed) (splitmix64 of the three), so a delta
that updates a key and the final state agree without keeping the values around.

The encoders write the engine's row layout (``migrate/rows/layout.py``) with whole-array numpy
operations; ``check_against_reference`` compares a sample with the project's reference writer
``migrate.rows.encode_rows`` (the generator runs it on every run).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

KEY_SCHEMA = {
    "type": "struct",
    "fields": [
        {"name": "sensor", "type": "string", "nullable": True, "metadata": {}},
        {"name": "sensor_id", "type": "long", "nullable": True, "metadata": {}},
    ],
}


def _long(name: str) -> dict:
    return {"name": name, "type": "long", "nullable": True, "metadata": {}}


VALUE_SCHEMAS = {
    "narrow": {"type": "struct", "fields": [_long("count"), _long("sum"), _long("max"), _long("min")]},
    "wide": {
        "type": "struct",
        "fields": [
            {"name": "max", "type": "string", "nullable": True, "metadata": {}},
            {"name": "max", "type": "string", "nullable": True, "metadata": {}},
            _long("count"),
            _long("sum"),
            _long("max"),
            {"name": "max", "type": {"type": "array", "elementType": "long", "containsNull": True},
             "nullable": True, "metadata": {}},
        ],
    },
}
SHAPES = tuple(VALUE_SCHEMAS)

# invented vocabulary: sensor names, plant labels, zones
_SITES = ["north", "south", "east", "west", "annex", "nursery", "seedbank", "hothouse"]
_KINDS = ["soil", "air", "leaf", "light", "co2", "drip", "root", "vent", "mist"]
_LABELS = ["basil", "tomato-cherry", "pepper", "lettuce-romaine", "mint", "cucumber-long",
           "strawberry-alpine", "kale", "chard-rainbow", "orchid-moth", "fern", "thyme"]
_ZONES = ["A", "B-2", "C-12", "propagation", "quarantine-bench-7", "roof", "D-4", "shade-hall"]

_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def mix(*parts: np.ndarray | int) -> np.ndarray:
    """splitmix64 of a combination of integer arrays (common practice; constants from memory)."""
    with np.errstate(over="ignore"):
        x = np.zeros(1, np.uint64)
        for p in parts:
            x = (x + np.asarray(p).astype(np.uint64)) * _GOLDEN
            x = x ^ (x >> np.uint64(30))
            x = x * _M1
            x = x ^ (x >> np.uint64(27))
            x = x * _M2
            x = x ^ (x >> np.uint64(31))
    return x


def _vocab(words: list[str], n: int) -> pa.Array:
    """``n`` distinct-ish strings of varying length built from a word list (a small vocabulary)."""
    out = []
    for i in range(n):
        a = words[i % len(words)]
        b = _KINDS[(i // len(words)) % len(_KINDS)]
        out.append(f"{a}/{b}-{i}" if i >= len(words) * len(_KINDS) else f"{a}/{b}")
    return pa.array(out, pa.string())


_SENSOR_NAMES = _vocab(_SITES, 4096)
_LABEL_NAMES = pa.array(_LABELS, pa.string())
_ZONE_NAMES = pa.array(_ZONES, pa.string())


# ------------------------------------------------------------------------ vectorised row building
def _round8(n: np.ndarray) -> np.ndarray:
    return (n + 7) & ~np.int64(7)


def _str_parts(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(offsets int64, data uint8) of a string/binary array."""
    arr = arr.cast(pa.large_binary())
    _, off, data = arr.buffers()
    offs = np.frombuffer(off, np.int64, count=len(arr) + 1, offset=arr.offset * 8)
    d = np.frombuffer(data, np.uint8) if data is not None else np.zeros(0, np.uint8)
    return offs, d


@dataclass
class _Var:
    offsets: np.ndarray  # int64, n + 1
    data: np.ndarray  # uint8

    @property
    def lengths(self) -> np.ndarray:
        return np.diff(self.offsets)


def _build_rows(fixed: list[np.ndarray | None], var: dict[int, _Var], n: int) -> pa.Array:
    """UnsafeRows: ``fixed[i]`` the int64 slot of field i (None for variable fields in ``var``)."""
    nf = len(fixed)
    head = 8 * ((nf + 63) // 64) + 8 * nf
    padded = {i: _round8(v.lengths) for i, v in var.items()}
    row_len = np.full(n, head, np.int64)
    for p in padded.values():
        row_len += p
    starts = np.zeros(n + 1, np.int64)
    np.cumsum(row_len, out=starts[1:])
    out = np.zeros(int(starts[-1]), np.uint8)
    words = out.view("<i8")
    wstart = starts[:-1] // 8
    bitset_words = (nf + 63) // 64
    cursor = np.full(n, head, np.int64)  # offset of the next variable part, from the row start
    for i in range(nf):
        slot = wstart + bitset_words + i
        if i in var:
            v = var[i]
            lens = v.lengths
            words[slot] = (cursor << 32) | lens
            total = int(lens.sum())
            if total:
                dest = np.repeat(starts[:-1] + cursor - v.offsets[:-1], lens) + np.arange(int(v.offsets[0]), int(v.offsets[0]) + total)
                out[dest] = v.data[int(v.offsets[0]) : int(v.offsets[0]) + total]
            cursor = cursor + padded[i]
        else:
            words[slot] = fixed[i]
    return pa.Array.from_buffers(pa.binary(), n, [None, pa.py_buffer(starts.astype(np.int32)), pa.py_buffer(out)]) \
        if starts[-1] < 2**31 else pa.Array.from_buffers(pa.large_binary(), n, [None, pa.py_buffer(starts), pa.py_buffer(out)])


def _long_arrays(counts: np.ndarray, values: np.ndarray) -> _Var:
    """UnsafeArrayData of longs per row: count word, zero null bitset, elements."""
    n = len(counts)
    bitset = (counts + 63) // 64
    nwords = 1 + bitset + counts
    wstarts = np.zeros(n + 1, np.int64)
    np.cumsum(nwords, out=wstarts[1:])
    words = np.zeros(int(wstarts[-1]), np.int64)
    words[wstarts[:-1]] = counts
    total = int(counts.sum())
    elem_first = np.repeat(wstarts[:-1] + 1 + bitset, counts)
    within = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)
    words[elem_first + within] = values[:total]
    return _Var(wstarts * 8, words.view(np.uint8))


# ------------------------------------------------------------------------ the shapes
def key_columns(key_ids: np.ndarray, seed: int) -> pa.StructArray:
    """Typed key columns (sensor name, sensor id) for key ids; the id makes every key distinct."""
    pick = (mix(key_ids, seed, 1) % np.uint64(len(_SENSOR_NAMES))).astype(np.int64)
    names = _SENSOR_NAMES.take(pa.array(pick))
    ids = pa.array((key_ids.astype(np.int64) * 7919 + 1_000_003).astype(np.int64))
    return pa.StructArray.from_arrays([names, ids], names=["sensor", "sensor_id"])


def key_rows(key_ids: np.ndarray, seed: int) -> pa.Array:
    cols = key_columns(key_ids, seed)
    offs, data = _str_parts(cols.field(0))
    ids = np.asarray(cols.field(1), dtype=np.int64)
    return _build_rows([None, ids], {0: _Var(offs, data)}, len(key_ids))


def _narrow_numbers(key_ids: np.ndarray, versions: np.ndarray, seed: int) -> list[np.ndarray]:
    h = mix(key_ids, versions, seed)
    count = (versions.astype(np.int64) * 3 + (h % np.uint64(50)).astype(np.int64))
    s = (h >> np.uint64(20)).astype(np.int64) % 1_000_000
    mx = (h >> np.uint64(8)).astype(np.int64) % 5000
    mn = -((h >> np.uint64(40)).astype(np.int64) % 5000)
    return [count, s, mx, mn]


def value_columns(shape: str, key_ids: np.ndarray, versions: np.ndarray, seed: int) -> pa.StructArray:
    """Typed value columns (for the reference check and for people reading this code)."""
    if shape == "narrow":
        c, s, mx, mn = _narrow_numbers(key_ids, versions, seed)
        return pa.StructArray.from_arrays([pa.array(c), pa.array(s), pa.array(mx), pa.array(mn)],
                                          names=["count", "sum", "max", "min"])
    label, zone, c, s, last, counts, elems = _wide_parts(key_ids, versions, seed)
    offs = np.zeros(len(counts) + 1, np.int32)
    np.cumsum(counts, out=offs[1:])
    recent = pa.ListArray.from_arrays(pa.array(offs), pa.array(elems[: int(offs[-1])]))
    return pa.StructArray.from_arrays([label, zone, pa.array(c), pa.array(s), pa.array(last), recent],
                                      names=["max", "max", "count", "sum", "max", "max"])


def _wide_parts(key_ids: np.ndarray, versions: np.ndarray, seed: int):
    h = mix(key_ids, versions, seed)
    g = mix(h, 7)
    label = _LABEL_NAMES.take(pa.array((h % np.uint64(len(_LABELS))).astype(np.int64)))
    zone = _ZONE_NAMES.take(pa.array(((h >> np.uint64(8)) % np.uint64(len(_ZONES))).astype(np.int64)))
    c = versions.astype(np.int64) * 5 + (g % np.uint64(9)).astype(np.int64)
    s = (g >> np.uint64(16)).astype(np.int64) % 10_000_000
    last = 1_700_000_000_000 + versions.astype(np.int64) * 60_000 + (g % np.uint64(60_000)).astype(np.int64)
    counts = ((h >> np.uint64(32)) % np.uint64(13)).astype(np.int64)
    total = int(counts.sum())
    base = np.repeat(g, counts)
    within = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)
    elems = (mix(base, within) % np.uint64(100_000)).astype(np.int64)
    return label, zone, c, s, last, counts, elems


def value_rows(shape: str, key_ids: np.ndarray, versions: np.ndarray, seed: int) -> pa.Array:
    n = len(key_ids)
    if shape == "narrow":
        return _build_rows(_narrow_numbers(key_ids, versions, seed), {}, n)
    label, zone, c, s, last, counts, elems = _wide_parts(key_ids, versions, seed)
    lo, ld = _str_parts(label)
    zo, zd = _str_parts(zone)
    return _build_rows([None, None, c, s, last, None],
                       {0: _Var(lo, ld), 1: _Var(zo, zd), 5: _long_arrays(counts, elems)}, n)


def check_against_reference(shape: str, seed: int, n: int = 300) -> None:
    """Encode a sample with the project's reference writer and require identical bytes."""
    from migrate.rows import encode_rows
    from migrate.rows.schema import spark_type_from_json

    ids = np.arange(n, dtype=np.int64) * 104729 + 17
    vers = (ids % 5 + 1).astype(np.int64)
    ref_k = encode_rows(key_columns(ids, seed), spark_type_from_json(KEY_SCHEMA))
    ref_v = encode_rows(value_columns(shape, ids, vers, seed), spark_type_from_json(VALUE_SCHEMAS[shape]))
    got_k = key_rows(ids, seed).cast(pa.binary())
    got_v = value_rows(shape, ids, vers, seed).cast(pa.binary())
    if not (ref_k.equals(got_k) and ref_v.equals(got_v)):
        bad = next(i for i in range(n) if ref_k[i] != got_k[i] or ref_v[i] != got_v[i])
        raise AssertionError(f"vectorised {shape} rows differ from migrate.rows.encode_rows at sample row {bad}")
