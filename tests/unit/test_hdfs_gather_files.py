"""The records of a heap-map chain copied once into one array each (``_framing.gather_files``).

The reference is ``combine_files`` over ``record_arrays`` of each file (the gather per file, then
a join): the compiled join must give the same keys, values, removals and array type for any
chain, empty parts and removals included, and refuse what the per-file gather refuses. Chains
past 2 GiB are tested with the limit lowered (``OFFSET_LIMIT``, ``offset_limit``): the logic is
the same, and both paths then switch to int64 offsets where the join used to fail with Arrow's
"offset overflow" (observed on two 1.1 GiB arrays). The batches a read hands on stay castable to
``binary``: at most ``BATCH_BYTES`` of keys and of values each, or one row.
"""

from __future__ import annotations

import json
import random
from types import ModuleType

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest
from compiled_extensions import load
from hypothesis import given, settings
from hypothesis import strategies as st
from test_hdfs_framing_compiled import build

from benchmarks.generate import Params, generate
from migrate.checkpoint.model import load_checkpoint
from migrate.digest import digest_batches
from migrate.providers import hdfs
from migrate.providers.base import ReadContext
from migrate.storage import open_location


@pytest.fixture(scope="module")
def framing() -> ModuleType:
    return load("migrate.providers._framing", "the compiled record walk")


def reference(files: list[bytes]) -> list:
    """combine_files over the per-file gather: what read() did before the compiled join."""
    return hdfs.combine_files([hdfs.record_arrays(data, "f", True) for data in files])


def compiled(files: list[bytes]) -> list:
    return hdfs.gather_files([(data, hdfs.record_starts(data, "f", True)) for data in files])


def same(got: list, want: list) -> None:
    assert got[0].type == want[0].type and got[1].type == want[1].type
    assert got[0].to_pylist() == want[0].to_pylist()
    assert got[1].to_pylist() == want[1].to_pylist()
    assert got[2].tolist() == want[2].tolist()
    got[0].validate(full=True)
    got[1].validate(full=True)


_bytes = st.one_of(st.just(b""), st.binary(max_size=20))
_record = st.tuples(_bytes, st.one_of(st.none(), _bytes))  # None: a removal
_chain = st.lists(st.lists(_record, max_size=30), max_size=6)


@settings(max_examples=300, deadline=None)
@given(_chain)
def test_the_join_equals_the_per_file_gather_and_join(framing, chain):
    files = [build(records)[0] for records in chain]
    same(compiled(files), reference(files))


def test_engine_sized_chain(framing):
    """A snapshot and four deltas of thousands of records, as a partition's chain holds them."""
    rng = random.Random(7)
    files = [build([(rng.randbytes(rng.randrange(1, 40)), None if rng.random() < 0.05 else rng.randbytes(rng.randrange(0, 300)))
                    for _ in range(n)])[0] for n in (20_000, 3_000, 0, 3_000, 2_500)]
    same(compiled(files), reference(files))


def test_each_part_is_let_go_once_copied(framing):
    files = [build([(b"k%d" % i, b"v")])[0] for i in range(3)]
    parts = [(data, hdfs.record_starts(data, "f", True)) for data in files]
    koff, keys, voff, values, removed, large = framing.gather_files(parts)
    assert parts == [None, None, None]
    assert (bytes(keys), bytes(values), bytes(removed), large) == (b"k0k1k2", b"vvv", b"\x00\x00\x00", False)
    assert np.frombuffer(koff, np.int32).tolist() == [0, 2, 4, 6]


def test_no_parts(framing):
    keys, values, removed = hdfs.gather_files([])
    assert keys.type == pa.binary() and len(keys) == len(values) == len(removed) == 0


@pytest.mark.parametrize("path", ["compiled", "reference"])
def test_a_chain_past_the_offset_limit_gets_int64_offsets(framing, monkeypatch, path):
    """Keys within the limit, values past it in total though not in any one file: both arrays
    become large_binary (the join keeps one type), with the same elements."""
    files = [build([(b"a", b"x" * 6), (b"b", None)])[0], build([(b"c", b"y" * 6)])[0]]
    small = (compiled if path == "compiled" else reference)(files)
    assert small[0].type == pa.binary()
    monkeypatch.setattr(hdfs, "OFFSET_LIMIT", 10)
    big = (compiled if path == "compiled" else reference)(files)
    assert big[0].type == big[1].type == pa.large_binary()
    assert big[0].to_pylist() == small[0].to_pylist() and big[1].to_pylist() == small[1].to_pylist()
    assert big[2].tolist() == [False, True, False]


@pytest.mark.parametrize("limit", [0, 5, 6])
def test_the_offset_limit_is_inclusive(framing, limit):
    data = build([(b"ab", b"cdef"), (b"g", b"hi")])[0]  # keys 3 bytes, values 6
    *_, large = framing.gather_files([(data, hdfs.record_starts(data, "f", True))], limit)
    assert large is (limit < 6)


def test_refusals(framing):
    data, starts = build([(b"k", b"v")])
    good = np.array(starts, np.int64)
    with pytest.raises(ValueError, match="does not hold a record"):
        framing.gather_files([(data, np.array([3], np.int64))])
    with pytest.raises(ValueError, match="does not hold a record"):
        framing.gather_files([(data[:6], good)])
    with pytest.raises(ValueError, match="int64"):
        framing.gather_files([(data, b"\x00" * 4)])
    with pytest.raises(TypeError, match="part 1"):
        framing.gather_files([(data, good), [data, good]])
    with pytest.raises(ValueError, match="offset_limit"):
        framing.gather_files([], 2**31)
    with pytest.raises(TypeError):
        framing.gather_files((data, good))  # not a list


# --- the batches of a read ----------------------------------------------------------------------


def _arrays(sizes: list[tuple[int, int]], large: bool) -> tuple[pa.Array, pa.Array]:
    t = pa.large_binary() if large else pa.binary()
    return (pa.array([b"k" * k for k, _ in sizes], t), pa.array([b"v" * v for _, v in sizes], t))


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 40), st.integers(0, 40)), max_size=60), st.integers(1, 50), st.integers(1, 7))
def test_large_batches_hold_at_most_batch_bytes_or_one_row(sizes, cap, rows):
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(hdfs, "BATCH_BYTES", cap)
        mp.setattr(hdfs, "BATCH_ROWS", rows)
        keys, values = _arrays(sizes, large=True)
        bounds = list(hdfs.batch_bounds(keys.slice(0), values))
    assert [i for i, _ in bounds] == ([0] + [j for _, j in bounds][:-1] if bounds else [])  # contiguous, from 0
    assert (bounds[-1][1] if bounds else 0) == len(sizes)
    for i, j in bounds:
        assert 1 <= j - i <= rows
        if j - i > 1:
            assert sum(k for k, _ in sizes[i:j]) <= cap and sum(v for _, v in sizes[i:j]) <= cap


def test_batches_of_int32_arrays_are_counted_in_rows_only(monkeypatch):
    monkeypatch.setattr(hdfs, "BATCH_BYTES", 1)
    keys, values = _arrays([(5, 5)] * 10, large=False)
    assert list(hdfs.batch_bounds(keys, values)) == [(0, 10)]


@pytest.mark.parametrize("compiled_join", [True, False])
def test_a_read_past_the_limits_gives_the_same_rows_in_binary_batches(tmp_path, monkeypatch, framing, compiled_join):
    """A generated chain (snapshot and deltas with removals) read with the limits lowered: int64
    offsets inside, small binary batches out, and the digest the generator recorded."""
    p = Params(keys=1500, partitions=2, shape="wide", layout="hdfs", deltas=3, seed=5)
    generate(p, tmp_path / "ckpt", jobs=1, quiet=True)
    recorded = json.loads((tmp_path / "ckpt.bench.json").read_text())["partitions"]
    if not compiled_join:
        monkeypatch.setattr(hdfs, "_framing", None)
    monkeypatch.setattr(hdfs, "OFFSET_LIMIT", 1000)
    monkeypatch.setattr(hdfs, "BATCH_BYTES", 4000)
    ck = load_checkpoint(open_location(str(tmp_path / "ckpt")))
    for key_order in (False, True):
        for sp in ck.store_partitions():
            batches = list(ck.provider.read(sp.dir, ck.state_version,
                                            ReadContext(conf=ck.conf, listing=sp.listing, key_order=key_order)))
            assert len(batches) > 5 and all(b.schema.field("value").type == pa.binary() for b in batches)
            assert all(b.num_rows == 1 or pc.sum(pc.binary_length(b.column("value"))).as_py() <= 4000 for b in batches)
            assert digest_batches(batches).hexdigest == recorded[sp.partition]["digest"]
