"""The digest's column-wise paths agree with the plain reference: fixed-width rows, rows longer
than the column limit, empty rows, unaligned lengths, and batches that are slices of larger ones."""

import random

import pyarrow as pa
import pytest

from migrate.digest import _COLUMN_WORDS, digest_batch, digest_batches
from migrate.providers.base import ROW_SCHEMA

# the plain-Python reference of the algorithm, and the autouse fixture that runs every test here
# against both the compiled and the numpy digest
from test_digest_order_and_sensitivity import implementation, reference  # noqa: F401


def _batch(rows):
    return pa.RecordBatch.from_arrays(
        [pa.array([k for k, _ in rows], pa.binary()), pa.array([v for _, v in rows], pa.binary())], schema=ROW_SCHEMA
    )


def _bytes(rng, n):
    return bytes(rng.randrange(256) for _ in range(n))


@pytest.mark.parametrize("seed", range(6))
def test_fixed_width_rows(seed):
    rng = random.Random(seed)
    width = rng.choice([8, 16, 40, 8 * _COLUMN_WORDS, 8 * (_COLUMN_WORDS + 3)])
    rows = [(_bytes(rng, 24), _bytes(rng, width)) for _ in range(50)]
    assert digest_batch(_batch(rows)) == reference(rows)


@pytest.mark.parametrize("seed", range(6))
def test_mixed_lengths_including_rows_past_the_column_limit(seed):
    rng = random.Random(10 + seed)
    lengths = [0, 1, 7, 8, 9, 63, 64, 8 * _COLUMN_WORDS - 1, 8 * _COLUMN_WORDS, 8 * _COLUMN_WORDS + 1, 1000]
    rows = [(_bytes(rng, rng.choice(lengths)), _bytes(rng, rng.choice(lengths))) for _ in range(60)]
    assert digest_batch(_batch(rows)) == reference(rows)


def test_slices_of_a_batch_sum_to_the_whole():
    rng = random.Random(99)
    rows = [(_bytes(rng, 8 * rng.randrange(1, 6)), _bytes(rng, 8 * rng.choice([5, 40]))) for _ in range(300)]
    batch = _batch(rows)
    parts = [batch.slice(i, 37) for i in range(0, 300, 37)]
    assert digest_batches(parts) == reference(rows) == digest_batch(batch)
