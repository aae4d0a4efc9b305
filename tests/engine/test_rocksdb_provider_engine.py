"""The engine loads RocksDB state versions written by our writer and continues exactly as before.

For each scenario: the engine runs three micro-batches (one input file each) on the RocksDB
provider. The checkpoint is copied twice: a control, left untouched, and a rewritten copy where,
for every store partition, the latest state version is read with our reader (from the original)
and written back with our writer after ALL of that partition's zips, checksum sidecars and SST
files were deleted - so the only state the engine can load there is ours. Both copies are then
restarted on one more input file. The proof:

1. the restarted outputs are equal (and not empty);
2. in the rewritten copy the engine wrote the next version's zip in every partition, its metadata
   still lists our SST files (the engine loaded and kept them), and that next version reads back
   (with our reader) to the same rows as the control's next version;
3. our reader agrees with the heap-map provider: the same query on the HDFS-backed provider
   yields byte-identical canonical rows (RocksDB rows minus the one-byte version prefix).

Nothing here reads state through the engine; the engine only runs queries.
"""

from __future__ import annotations

import json
import shutil
import zipfile
from pathlib import Path

import pytest
import scenarios as sc

from migrate.providers.base import ReadContext, StoreDir, WriteContext
from migrate.providers.hdfs import HDFSProvider
from migrate.providers.rocksdb import RocksDBProvider
from migrate.storage import open_location

FIRST_RUN_FILES = 3


def _one_group(df):
    from pyspark.sql import functions as F

    return df.groupBy("bay").agg(F.count(F.lit(1)).alias("readings"), F.max("temperature").alias("hottest"))


# A single group key: with two shuffle partitions one store partition stays empty.
SINGLE_BAY = sc.Scenario(
    name="single_bay",
    schema_ddl="bay STRING, rack INT, moisture BIGINT, temperature DOUBLE",
    build=_one_group,
    output_mode="update",
    columns=("bay", "readings", "hottest"),
    files=tuple(
        tuple({"bay": "cactus-dome", "rack": r, "moisture": 10 + r, "temperature": 30.0 + f + r / 4} for r in range(3))
        for f in range(4)
    ),
    notes="one group key, so one of two store partitions has no rows",
)

SCENARIOS = [sc.BAY_TOTALS, sc.PING_DEDUP, SINGLE_BAY]


def _conf(checkpoint: Path) -> dict[str, str]:
    """The conf pinned in the latest offsets entry (second line of the file, JSON)."""
    offsets = checkpoint / "offsets"
    latest = max(int(p.name) for p in offsets.iterdir() if p.name.isdigit())
    return json.loads((offsets / str(latest)).read_text().splitlines()[1])["conf"]


def _partitions(checkpoint: Path) -> list[int]:
    return sorted(int(p.name) for p in (checkpoint / "state" / "0").iterdir() if p.name.isdigit())


def _rows(provider, checkpoint: Path, partition: int, version: int, conf: dict[str, str]) -> list[tuple[bytes, bytes]]:
    store = StoreDir(open_location(str(checkpoint)), f"state/0/{partition}", 0, partition)
    out: list[tuple[bytes, bytes]] = []
    for batch in provider.read(store, version, ReadContext(conf=conf)):
        out += zip(batch.column("key").to_pylist(), batch.column("value").to_pylist())
    return sorted(out)


def _sst_names_in_zip(path: Path) -> set[str]:
    with zipfile.ZipFile(path) as z:
        text = z.read("metadata").decode()
    return {f["dfsSstFileName"] for f in json.loads(text.split("\n", 1)[1])["sstFiles"]}


def _replace_with_ours(original: Path, copy: Path, version: int, conf: dict[str, str]) -> dict[int, set[str]]:
    """Rewrite ``version`` of every partition in ``copy`` from the rows of ``original``."""
    provider = RocksDBProvider()
    target = open_location(str(copy), readonly=False)
    ours: dict[int, set[str]] = {}
    for p in _partitions(original):
        part_dir = copy / "state" / "0" / str(p)
        for f in list(part_dir.iterdir()):
            if f.name.endswith(".zip") or f.name.endswith(".zip.crc"):
                f.unlink()
        shutil.rmtree(part_dir / "SSTs", ignore_errors=True)
        source = StoreDir(open_location(str(original)), f"state/0/{p}", 0, p)
        written = provider.write(
            StoreDir(target, f"state/0/{p}", 0, p), version, provider.read(source, version, ReadContext(conf=conf)),
            WriteContext(conf=conf),
        )
        names = {w.rel.rsplit("/", 1)[1] for w in written}
        assert f"{version}.zip" in names and f".{version}.zip.crc" in names
        ours[p] = {n for n in names if n.endswith(".sst") and not n.startswith(".")}
        left = sorted(f.name for f in part_dir.iterdir() if f.name.endswith(".zip"))
        assert left == [f"{version}.zip"], f"partition {p} still has other zips: {left}"
    return ours


@pytest.mark.engine
@pytest.mark.parametrize("scenario", SCENARIOS, ids=lambda s: s.name)
def test_engine_continues_from_our_rocksdb_versions(spark, tmp_path: Path, scenario: sc.Scenario) -> None:
    inputs, first = tmp_path / "in", tmp_path / "first"
    sc.write_input_files(inputs, scenario, 0, FIRST_RUN_FILES)
    sc.run_query(spark, scenario, inputs, first, "rocksdb")
    committed = sc.batch_ids_in_commits(first)
    assert len(committed) >= FIRST_RUN_FILES  # watermark queries add a no-data batch
    version = committed[-1] + 1  # state version = last committed batch id + 1
    conf = _conf(first)

    control, rewritten = tmp_path / "control", tmp_path / "rewritten"
    shutil.copytree(first, control)
    shutil.copytree(first, rewritten)
    ours = _replace_with_ours(first, rewritten, version, conf)
    before = {p: _rows(RocksDBProvider(), first, p, version, conf) for p in _partitions(first)}
    for p, rows in before.items():
        assert _rows(RocksDBProvider(), rewritten, p, version, conf) == rows
    if scenario is SINGLE_BAY:
        assert sorted(len(r) for r in before.values()) == [0, 1], "expected one empty store partition"
        empty = next(p for p, r in before.items() if not r)
        assert ours[empty] == set()  # an empty version has no SST files, like the engine's

    sc.write_input_files(inputs, scenario, FIRST_RUN_FILES, FIRST_RUN_FILES + 1)
    out_control = sc.run_query(spark, scenario, inputs, control, None)
    out_rewritten = sc.run_query(spark, scenario, inputs, rewritten, None)
    assert out_control, "the restarted control produced no rows; the comparison would prove nothing"
    assert scenario.sorted_batches(out_rewritten) == scenario.sorted_batches(out_control)
    after = sc.batch_ids_in_commits(rewritten)
    assert after == sc.batch_ids_in_commits(control) and after[-1] > committed[-1]
    latest = after[-1] + 1

    provider = RocksDBProvider()
    for p in _partitions(rewritten):
        part = rewritten / "state" / "0" / str(p)
        next_zip = part / f"{version + 1}.zip"
        assert next_zip.exists(), f"the engine did not write version {version + 1} of partition {p}"
        assert ours[p] <= _sst_names_in_zip(next_zip), "the engine's next version dropped the SSTs we wrote"
        listing = open_location(str(part)).list_dir("")
        assert provider.versions(listing)[-1] == latest
        assert _rows(provider, rewritten, p, latest, _conf(rewritten)) == _rows(provider, control, p, latest, _conf(control))


@pytest.mark.engine
def test_rocksdb_rows_minus_version_byte_equal_heap_map_rows(spark, tmp_path: Path) -> None:
    scenario = sc.BAY_TOTALS
    inputs = tmp_path / "in"
    sc.write_input_files(inputs, scenario, 0, FIRST_RUN_FILES)
    sc.run_query(spark, scenario, inputs, tmp_path / "rocks", "rocksdb")
    sc.run_query(spark, scenario, inputs, tmp_path / "heap", "hdfs")
    rocks = [r for p in _partitions(tmp_path / "rocks") for r in _rows(RocksDBProvider(), tmp_path / "rocks", p, 3, {})]
    heap = [r for p in _partitions(tmp_path / "heap") for r in _rows(HDFSProvider(), tmp_path / "heap", p, 3, {})]
    assert rocks, "no state rows at all"
    assert sorted(rocks) == sorted(heap)
