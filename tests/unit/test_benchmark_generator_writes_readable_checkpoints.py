"""The benchmark generator's checkpoints are what it says they are.

Its vectorised rows equal the project's reference row writer byte for byte, its delta framing
equals the provider's framing, and a small generated checkpoint, read back by the tool's own
readers, holds exactly the keys and the per-partition digests the generator recorded (which it
computes from its own model of the history, not by reading the files).
"""

import json

import numpy as np
import pyarrow as pa
import pytest

from benchmarks import rowgen
from benchmarks.generate import Params, frame_delta, generate
from migrate.checkpoint.model import load_checkpoint
from migrate.digest import digest_batches
from migrate.providers.base import ReadContext
from migrate.providers.hdfs import parse_records
from migrate.storage import open_location


@pytest.mark.parametrize("shape", rowgen.SHAPES)
def test_rows_equal_the_reference_writer(shape):
    rowgen.check_against_reference(shape, seed=5, n=200)


def test_a_mismatch_with_the_reference_is_reported(monkeypatch):
    real = rowgen.value_rows
    monkeypatch.setattr(rowgen, "value_rows", lambda *a: pa.array([b"\x00" * 8] * len(a[1]), pa.binary()))
    with pytest.raises(AssertionError, match="differ"):
        rowgen.check_against_reference("narrow", seed=5, n=10)
    monkeypatch.setattr(rowgen, "value_rows", real)


def test_delta_framing_with_removals_parses_back():
    ids = np.arange(40, dtype=np.int64)
    keys = rowgen.key_rows(ids, 3)
    values = pa.array([None if i % 3 == 0 else v for i, v in enumerate(rowgen.value_rows("wide", ids, ids + 1, 3).to_pylist())], pa.binary())
    got = list(parse_records(frame_delta(keys, values), "t.delta", allow_removals=True))
    assert got == list(zip(keys.to_pylist(), values.to_pylist()))


@pytest.mark.parametrize("layout", ["hdfs", "rocksdb"])
def test_generated_checkpoint_reads_back_with_the_recorded_digests(tmp_path, layout):
    p = Params(keys=3000, partitions=4, shape="wide", layout=layout, deltas=3, seed=11)
    info = generate(p, tmp_path / "ckpt", jobs=1, quiet=True)
    recorded = json.loads((tmp_path / "ckpt.bench.json").read_text())
    assert recorded["rows"] == info["rows"] == 3000
    ck = load_checkpoint(open_location(str(tmp_path / "ckpt")))
    assert ck.state_version == 4 and len(ck.store_partitions()) == 4
    for sp in ck.store_partitions():
        batches = list(ck.provider.read(sp.dir, ck.state_version, ReadContext(conf=ck.conf, listing=sp.listing)))
        expected = recorded["partitions"][sp.partition]
        assert digest_batches(batches).hexdigest == expected["digest"]
        assert sum(b.num_rows for b in batches) == expected["rows"]


@pytest.mark.parametrize("shape", rowgen.SHAPES)
def test_engine_load_expects_the_count_the_checkpoint_holds_for_key_0(tmp_path, shape):
    """``benchmarks.engine_load`` checks that the engine continued generated key 0 from the count
    the generator says it holds; that count must be the one in the files, decoded by the tool's
    own row decoder from the rows its reader rebuilds (the wide aggregate names several value
    fields "max", which once broke the lookup)."""
    from benchmarks.engine_load import existing_key
    from migrate.rows import decode_rows, parse_state_schema_file

    p = Params(keys=2000, partitions=3, shape=shape, layout="hdfs", deltas=3, seed=17)
    info = generate(p, tmp_path / "ckpt", jobs=1, quiet=True)
    sensor, sensor_id, count = existing_key(info)
    ck = load_checkpoint(open_location(str(tmp_path / "ckpt")))
    schema_file = next((tmp_path / "ckpt" / "state" / "0").glob("*/_metadata/schema"))
    schema = parse_state_schema_file(schema_file.read_bytes(), str(schema_file))[0]
    found = []
    for sp in ck.store_partitions():
        for batch in ck.provider.read(sp.dir, ck.state_version, ReadContext(conf=ck.conf, listing=sp.listing)):
            keys = decode_rows(batch.column("key"), schema.key_schema).to_pylist()
            values = decode_rows(batch.column("value"), schema.value_schema)
            counts = values.field(values.type.get_field_index("count")).to_pylist()
            found += [c for k, c in zip(keys, counts) if list(k.values()) == [sensor, sensor_id]]
    assert found == [count] and count > 0
