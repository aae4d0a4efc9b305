"""The compiled digest (``migrate._digest``) gives the same sums as the numpy digest and the
plain-Python reference of the algorithm (test_digest_order_and_sensitivity.reference), on
hypothesis rows of every length class (empty, shorter than a word, whole words, past the numpy
path's column limit), slices, every binary / large_binary combination, and engine-shaped rows.
Those two test files run their own checks against both implementations too.

Outside CI a missing extension skips these tests; under ``CI=true`` it fails them (as in
test_hdfs_framing_compiled.py).
"""

from __future__ import annotations

import random
from types import ModuleType

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from compiled_extensions import load
from test_digest_order_and_sensitivity import reference  # the plain-Python reference of the algorithm

from migrate import digest
from migrate.digest import Digest, digest_batch, digest_batch_numpy


@pytest.fixture(scope="module")
def compiled() -> ModuleType:
    return load("migrate._digest", "the compiled digest")


def _batch(rows, key_type=pa.binary(), value_type=pa.binary()) -> pa.RecordBatch:
    return pa.RecordBatch.from_arrays(
        [pa.array([k for k, _ in rows], key_type), pa.array([v for _, v in rows], value_type)], names=["key", "value"]
    )


_side = st.one_of(st.binary(max_size=20), st.binary(min_size=250, max_size=400))
_types = st.sampled_from([pa.binary(), pa.large_binary()])


def test_the_compiled_digest_is_the_one_used(compiled: ModuleType) -> None:
    assert digest._compiled is compiled


@settings(max_examples=300, deadline=None)
@given(rows=st.lists(st.tuples(_side, _side), max_size=25), key_type=_types, value_type=_types, cut=st.data())
def test_compiled_equals_numpy_and_the_reference(compiled: ModuleType, rows, key_type, value_type, cut) -> None:
    batch = _batch(rows, key_type, value_type)
    assert digest_batch(batch) == digest_batch_numpy(batch) == reference(rows)
    start = cut.draw(st.integers(0, len(rows)))
    stop = cut.draw(st.integers(start, len(rows)))
    assert digest_batch(batch.slice(start, stop - start)) == reference(rows[start:stop])


def test_engine_shaped_rows(compiled: ModuleType) -> None:
    rng = random.Random(4)
    rows = [(bytes(8) + rng.randbytes(16) + rng.randbytes(rng.randrange(0, 24)), rng.randbytes(rng.choice([8, 32, 41]))) for _ in range(3000)]
    assert digest_batch(_batch(rows)) == digest_batch_numpy(_batch(rows)) == reference(rows)


def test_offsets_that_describe_no_array_are_refused(compiled: ModuleType) -> None:
    values = pa.array([b"x", b"y"], pa.binary())
    _, voffsets, vdata = values.buffers()
    with pytest.raises(ValueError, match="key offsets are not those of a binary array"):
        compiled.digest_rows(np.array([0, 3, 1], np.int32).tobytes(), b"abcd", 0, False, voffsets, vdata, 0, False, 2)
    with pytest.raises(ValueError, match="value offsets buffer is shorter"):
        compiled.digest_rows(np.array([0, 1, 2], np.int32).tobytes(), b"ab", 0, False, voffsets, vdata, 1, False, 2)


def test_nulls_and_other_types_take_the_numpy_digest(compiled: ModuleType, monkeypatch: pytest.MonkeyPatch) -> None:
    calls = []
    monkeypatch.setattr(digest, "digest_batch_numpy", lambda batch: calls.append(batch) or Digest())
    with_null = pa.RecordBatch.from_arrays([pa.array([b"k", None]), pa.array([b"v", b"w"])], names=["key", "value"])
    strings = pa.RecordBatch.from_arrays([pa.array(["k"]), pa.array([b"v"])], names=["key", "value"])
    digest_batch(with_null)
    digest_batch(strings)
    assert calls == [with_null, strings]
