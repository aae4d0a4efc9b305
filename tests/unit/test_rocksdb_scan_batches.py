"""The RocksDB scan hands out every key once, in byte-wise order, in batches of at most
``BATCH_ROWS`` rows, at and around the batch boundary (the loop binds the iterator's methods
once and counts with ``itertools.repeat``; an off-by-one there would drop or repeat a key)."""

from __future__ import annotations

import os

import pyarrow as pa
import pytest
from rocksdict import Rdict

from migrate.providers import rocksdb_db
from migrate.providers.rocksdb_db import iterate


def _db(path: str, pairs: dict[bytes, bytes]) -> str:
    from rocksdict import Options

    options = Options(raw_mode=True)
    options.create_if_missing(True)
    db = Rdict(path, options=options)
    for k, v in pairs.items():
        db[k] = v
    db.flush()
    db.close()
    return path


@pytest.mark.parametrize("count", [0, 1, 3, 4, 5, 8, 9, 13])
def test_scan_batches_at_the_boundary(tmp_path, monkeypatch, count: int) -> None:
    monkeypatch.setattr(rocksdb_db, "BATCH_ROWS", 4)
    # keys with shared prefixes, zero bytes and prefix-of-each-other pairs
    pairs = {bytes([i % 3]) * (1 + i % 4) + i.to_bytes(2, "big"): b"v%d" % i for i in range(count)}
    db_dir = _db(os.path.join(tmp_path, "db"), pairs)
    batches = list(iterate(db_dir, "test"))
    assert all(0 < len(k) <= 4 and len(k) == len(v) for k, v in batches)
    assert all(k.type == pa.binary() and v.type == pa.binary() for k, v in batches)
    got = [(k, v) for ks, vs in batches for k, v in zip(ks.to_pylist(), vs.to_pylist())]
    # Python's bytes order is byte-wise (unsigned memcmp, then length), as RocksDB's default
    # comparator (common practice)
    assert got == sorted(pairs.items())
    assert len(batches) == -(-count // 4)
