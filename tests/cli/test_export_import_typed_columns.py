"""The archive's Parquet files are ordinary: pyarrow and DuckDB (an independent reader) read the
same typed values, hive-style discovery yields operator/store/partition, and the typed columns
agree with what the engine itself emitted for the same groups."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest
from helpers import DEMO, demo_copy, stateshift

duckdb = pytest.importorskip("duckdb")


def export(tmp_path: Path, name: str) -> Path:
    src = demo_copy(name, tmp_path)
    archive = tmp_path / "archive"
    proc = stateshift("export", str(src), str(archive), "-j", "1")
    assert proc.returncode == 0, proc.stderr
    return archive


def _normal(v):
    if isinstance(v, dt.datetime) and v.tzinfo is not None:
        return v.astimezone(dt.timezone.utc).replace(tzinfo=None)
    return v


@pytest.mark.parametrize("name", ["greenhouse_totals_hdfs", "greenhouse_totals_rocksdb", "sensor_pings_dedup_hdfs"])
def test_pyarrow_and_duckdb_read_the_same_typed_values(tmp_path, name):
    archive = export(tmp_path, name)
    manifest = json.loads((archive / "manifest.json").read_text())
    columns = [c["column"] for c in manifest["operators"][0]["stores"][0]["columns"] if c["decoded"]]
    assert columns and all(c.startswith(("key_", "value_")) for c in columns)
    order = ["partition"] + columns

    table = ds.dataset(str(archive / "state" / "operator=0"), format="parquet", partitioning="hive").to_table()
    via_arrow = sorted(
        (tuple(_normal(r[c]) for c in order) for r in table.to_pylist()), key=repr
    )
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    pattern = str(archive / "state" / "operator=0" / "*" / "*" / "*.parquet")
    quoted = ", ".join(f'"{c}"' for c in order)
    via_duck = sorted(
        (tuple(_normal(v) for v in row) for row in con.execute(f"SELECT {quoted} FROM read_parquet(?, hive_partitioning = true)", [pattern]).fetchall()),
        key=repr,
    )
    assert len(via_arrow) == manifest["rows"] > 0
    assert via_duck == via_arrow
    # raw bytes too: DuckDB's blob is the same byte string
    raw_duck = sorted(con.execute("SELECT key, value FROM read_parquet(?)", [pattern]).fetchall())
    raw_arrow = sorted(zip(table.column("key").to_pylist(), table.column("value").to_pylist()))
    assert [(bytes(k), bytes(v)) for k, v in raw_duck] == raw_arrow


def test_typed_state_agrees_with_the_engine_output_of_the_last_batch(tmp_path):
    """Update mode emits every group the last batch touched with its new totals; the archived state
    of those groups must hold the same numbers (readings = count, moisture_sum = sum, average =
    sum / count of the temperature buffer, maximum = max)."""
    archive = export(tmp_path, "greenhouse_totals_hdfs")
    outputs = json.loads((DEMO / "greenhouse_totals_hdfs.outputs.json").read_text())
    last = outputs["batches"][max(outputs["batches"], key=int)]
    rows = pq.read_table(archive / "state").to_pylist()
    state = {(r["key_bay"], r["key_rack"]): r for r in rows}
    assert last, "the demo's last batch emitted nothing"
    for bay, rack, readings, moisture_sum, temp_avg, temp_max in last:
        r = state[(bay, rack)]
        assert r["value_count"] == readings
        assert r["value_sum"] == moisture_sum
        assert r["value_sum_2"] / r["value_count_2"] == pytest.approx(temp_avg)
        assert r["value_max"] == temp_max


def test_dedup_state_keys_are_pings_the_engine_emitted(tmp_path):
    archive = export(tmp_path, "sensor_pings_dedup_hdfs")
    outputs = json.loads((DEMO / "sensor_pings_dedup_hdfs.outputs.json").read_text())
    emitted = {(r[0], r[1]) for rows in outputs["batches"].values() for r in rows}
    rows = pq.read_table(archive / "state").to_pylist()
    assert rows, "the dedup state is empty; the test proves nothing"
    for r in rows:
        stamp = r["key_event_time"].astimezone(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
        assert (r["key_ping_id"], stamp) in emitted
