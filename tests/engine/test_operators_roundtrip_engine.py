"""Windows, joins, per-group state and chained operators survive convert and export/import.

For each scenario of ``scenarios_more`` and each source provider (one test per scenario covers
both sources), the engine writes three input files' worth of batches into a checkpoint, which is
copied to a control. Then, from the untouched source:

* ``stateshift convert`` builds a checkpoint for the other provider;
* ``stateshift export`` writes an archive and ``stateshift import`` rebuilds it for the other
  provider (the heap map from a RocksDB source, RocksDB from a heap-map source).

The engine restarts the control and both rebuilt checkpoints on two more input files, with no
provider set in the session, so each runs on the provider its checkpoint names (two queries at a
time, one per source provider, to overlap the engine's waiting). The proof:

1. every rebuilt checkpoint's continued output equals the control's, batch by batch, and the
   control's continued output contains a row that only state from before the move can explain;
2. in the rebuilt checkpoints the engine wrote the new provider's files for the new versions of
   every store (all four join stores, both operators of a chain), and every offsets entry names
   the new provider;
3. every store the operator metadata names was moved with rows, into its own directory, with its
   own schema file;
4. the source checkpoint and the archive are byte-for-byte unchanged;
5. with an event-time timeout, the archive's typed timeout column holds the deadlines the group
   function set (state format 1 declares it an int but stores a long).
"""

from __future__ import annotations

import json
import shutil
import time
import zipfile
from dataclasses import dataclass
from pathlib import Path

import pytest
import scenarios as sc
import scenarios_more as sm
from test_convert_roundtrip_engine import (
    describe,
    offsets_entries,
    run_cli,
    tree_digest,
    version_files,
)

FIRST_RUN_FILES = 3
TOTAL_FILES = 5
OTHER = {"hdfs": "rocksdb", "rocksdb": "hdfs"}

SOURCES = ("hdfs", "rocksdb")


@pytest.fixture(scope="module")
def java_functions(spark, tmp_path_factory):
    """The Java group functions for the JVM flatMapGroupsWithState scenarios, added as a jar."""
    return sm.install_java_functions(spark, tmp_path_factory.mktemp("java"))


def _cli_json(*args: str) -> dict:
    proc = run_cli(*args, "--json")
    assert proc.returncode == 0, describe(proc)
    return json.loads(proc.stdout)


def _operator_stores(checkpoint: Path) -> dict[int, list[str]]:
    """Operator id -> the store names its operator metadata lists (3.5: its folders)."""
    return sc.operator_stores(checkpoint)


def _assert_store_layout(checkpoint: Path, source: Path, stores: dict[int, list[str]], partitions: int) -> None:
    """Each store of each partition has its own directory (named stores in subdirectories), and
    each store's schema file (the engine writes it under partition 0 only, observed) is there,
    equal to the source's; the stores of one operator do not share one schema."""
    for store in _store_dirs(checkpoint, stores, partitions):
        assert store.is_dir(), f"{checkpoint.name}: no directory {store.relative_to(checkpoint)}"
    for op, names in stores.items():
        schemas = set()
        for store in _store_dirs(checkpoint, {op: names}, 1):
            rel = store.relative_to(checkpoint) / "_metadata" / "schema"
            assert (checkpoint / rel).is_file(), f"{checkpoint.name}: no schema file {rel}"
            assert (checkpoint / rel).read_bytes() == (source / rel).read_bytes(), f"{checkpoint.name}: {rel} differs"
            schemas.add((checkpoint / rel).read_bytes())
        # join stores: the two sides' key schemas can be equal (the engine names key fields
        # field0.., observed), but not every store of an operator can share one schema
        assert len(names) == 1 or len(schemas) > 1, f"op {op}: {len(names)} stores share one schema file content"


def _store_dirs(checkpoint: Path, stores: dict[int, list[str]], partitions: int) -> list[Path]:
    """Every store partition directory: state/<op>/<part> for the default store, else .../<name>."""
    out = []
    for op, names in stores.items():
        for p in range(partitions):
            base = checkpoint / "state" / str(op) / str(p)
            out += [base if name == "default" else base / name for name in names]
    return out


def assert_new_versions_written_by(checkpoint: Path, provider: str, versions: range, stores: dict, partitions: int) -> None:
    """The engine wrote ``provider``'s files (and not the other's) for ``versions`` in every store."""
    for store in _store_dirs(checkpoint, stores, partitions):
        for v in versions:
            files = version_files(store, v)
            if provider == "rocksdb":
                assert files["zip"] and not files["delta"], f"{store}: version {v} not written by RocksDB"
            else:
                assert files["delta"] and not files["zip"], f"{store}: version {v} not written by the heap map"


def assert_heap_map_files_in_codec(checkpoint: Path, codec: str) -> int:
    """Every heap-map state file under ``checkpoint`` is a ``codec`` stream (told from its first
    bytes); returns how many there are."""
    from migrate.codecs import codec_for, codec_of_stream

    files = [p for p in (checkpoint / "state").rglob("*") if p.suffix in (".delta", ".snapshot")]
    for path in files:
        got = codec_of_stream(path.read_bytes(), "lz4")
        assert got is codec_for(codec), f"{path}: a {got.name} stream, expected {codec}"
    return len(files)


def _zip_fields(store: Path, version: int) -> set[str]:
    with zipfile.ZipFile(store / f"{version}.zip") as z:
        return set(json.loads(z.read("metadata").decode().split("\n", 1)[1]))


def _assert_zip_fields_like_the_engine(checkpoint: Path, ours: int, engines: int, stores: dict, partitions: int) -> None:
    """The zip ``metadata`` stateshift wrote (version ``ours``) has the fields the engine itself then
    wrote in the same store (version ``engines``): 3.5 and 4.x write different sets (FINDINGS.md)."""
    for store in _store_dirs(checkpoint, stores, partitions):
        assert _zip_fields(store, ours) == _zip_fields(store, engines), f"{store}: zip metadata fields differ from the engine's"
        if sc.ENGINE_35:
            assert _zip_fields(store, ours) == {"sstFiles", "numKeys"}, store


def _moved_rows_by_store(report: dict) -> dict[tuple[int, str], int]:
    out: dict[tuple[int, str], int] = {}
    for p in report["partitions"]:
        key = (int(p["operator"]), p["store"])
        out[key] = out.get(key, 0) + int(p["rows"])
    return out


@dataclass(frozen=True)
class Moved:
    """One source provider's checkpoint after its first run and the three tool commands."""

    source: str
    input_dir: Path
    src: Path
    control: Path
    converted: Path
    imported: Path
    archive: Path
    last_batch: int
    stores: dict
    partitions: int
    before: dict
    archived: dict

    @property
    def target(self) -> str:
        return OTHER[self.source]


def _first_run_and_move(spark, scenario, root: Path, source: str) -> Moved:
    input_dir, src = root / "input", root / "src"
    sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
    first = sm.run(spark, scenario, input_dir, src, source)
    assert first, f"{scenario.name}: the first run on {source} produced no output rows"
    pinned = offsets_entries(src)[0]["conf"]
    assert pinned[sc.PROVIDER_CONF] == sc.PROVIDERS[source]
    assert pinned[sm.CODEC_CONF] == sm.SCENARIO_CODEC[scenario.name]
    if source == "hdfs":
        assert assert_heap_map_files_in_codec(src, sm.SCENARIO_CODEC[scenario.name]) > 0
    if sm.FMGWS_VERSION_CONF in sm.SESSION_CONF[scenario.name]:  # the engine pins the state format
        assert pinned[sm.FMGWS_VERSION_CONF] == sm.SESSION_CONF[scenario.name][sm.FMGWS_VERSION_CONF]
    last_batch = sc.batch_ids_in_commits(src)[-1]
    stores = _operator_stores(src)
    partitions = int(offsets_entries(src)[last_batch]["conf"]["spark.sql.shuffle.partitions"])
    before = tree_digest(src)
    control = root / "control"
    shutil.copytree(src, control)

    target = OTHER[source]
    converted = root / f"converted-{target}"
    convert_report = _cli_json("convert", str(src), str(converted), "--to", target)
    assert convert_report["verified"] is True
    # the engine that wrote the source is recognised, and the target is written for it by default
    assert convert_report["source_engine"]["family"] == sc.ENGINE_FAMILY, convert_report["source_engine"]
    assert convert_report["target_engine"] == sc.ENGINE_FAMILY
    joins = sorted(f"state/{op}/0/{n}/_metadata/schema" for op, names in stores.items() for n in names if n[:5] in ("left-", "right"))
    if sc.ENGINE_35:
        # written for 4.x, a 3.5 join's value schemas become nullable (the restart on 4.x is proven in
        # test_engine_upgrade_35_to_4_engine.py); nothing else is rewritten; the dry run writes nothing
        plan = _cli_json("convert", str(src), str(root / "for-4"), "--to", target, "--engine-version", "4.x", "--dry-run")
        assert plan["target_engine"] == "4.x" and plan["schema_rewrites"] == joins and not (root / "for-4").exists()
    assert convert_report["schema_rewrites"] == []  # same engine: schema files verbatim
    archive = root / "archive"
    assert _cli_json("export", str(src), str(archive))["batch"] == last_batch
    archived = tree_digest(archive)
    if "event_timeout" in scenario.name:
        _assert_archived_deadlines(scenario, archive)
    imported = root / f"imported-{target}"
    assert _cli_json("import", str(archive), str(imported), "--to", target)["verified"] is True
    assert tree_digest(src) == before, f"convert/export/import changed the {source} source checkpoint"

    # (3) every store the operator metadata names moved with rows, in its own place
    moved = _moved_rows_by_store(convert_report)
    expected = {(op, name) for op, names in stores.items() for name in names}
    assert set(moved) == expected, f"stores moved {sorted(moved)} != stores in the metadata {sorted(expected)}"
    empty = sorted(k for k, rows in moved.items() if rows == 0)
    assert not empty, f"{scenario.name}: no rows in state for {empty} at the move; the test would prove little"
    for checkpoint in (converted, imported):
        _assert_store_layout(checkpoint, src, stores, partitions)
    return Moved(source, input_dir, src, control, converted, imported, archive, last_batch, stores, partitions,
                 before, archived)


def _assert_archived_deadlines(scenario, archive: Path) -> None:
    """The archive's typed timeout column holds each open buoy's event-time deadline as the group
    function set it: its newest reading of the first run plus the deadline (the watermark, ten
    minutes behind, never wins). In state format 1 the engine declares that field an int but
    stores the 8-byte value; decoded as declared, a 2032 deadline would be garbage."""
    import pyarrow.parquet as pq
    from datetime import datetime

    newest: dict[str, int] = {}
    for rows in scenario.files[:FIRST_RUN_FILES]:
        for r in rows:
            ms = int(datetime.fromisoformat(r["event_time"].replace("Z", "+00:00")).timestamp() * 1000)
            newest[r["buoy"]] = max(newest.get(r["buoy"], ms), ms)
    found: dict[str, int] = {}
    for f in sorted((archive / "state").rglob("*.parquet")):
        table = pq.read_table(f)
        key = next(n for n in table.column_names if n.startswith("key_"))
        assert str(table.schema.field("value_timeoutTimestamp").type) == "int64", f
        found.update(zip(table.column(key).to_pylist(), table.column("value_timeoutTimestamp").to_pylist()))
    assert found, f"{scenario.name}: no per-group state in the archive"
    expected = {buoy: newest[buoy] + sm.DEADLINE_MS for buoy in found}
    assert found == expected, f"{scenario.name}: archived deadlines {found} != the group function's {expected}"


@pytest.mark.parametrize("scenario_name", list(sm.SCENARIOS))
def test_operator_state_moves_and_continues(spark, java_functions, tmp_path, scenario_name):
    scenario = sm.SCENARIOS[scenario_name]
    started = time.monotonic()
    cases = [_first_run_and_move(spark, scenario, tmp_path / source, source) for source in SOURCES]
    for m in cases:
        sc.write_input_files(m.input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)

    # The restarts run two at a time, one per source provider (two different query ids; the
    # engine refuses two running instances of one query, so control and copies go in turns).
    outputs: dict[tuple[str, str], list] = {}
    for role in ("control", "converted", "imported"):
        outs = sm.restart_many(spark, scenario, [(m.input_dir, getattr(m, role)) for m in cases])
        for m, out in zip(cases, outs):
            outputs[(m.source, role)] = out

    for m in cases:
        control_out = scenario.sorted_batches(outputs[(m.source, "control")])
        assert control_out, f"{m.source}: the control restart produced no output; the scenario proves nothing"
        assert min(control_out) > m.last_batch, f"{m.source}: the control restart re-ran old batches"
        carried = sm.CARRIED[scenario_name]
        assert carried in {row for rows in control_out.values() for row in rows}, (
            f"{scenario.name} on {m.source}: the control's continued output lacks {carried}, the row that needs the old state"
        )
        control_last = sc.batch_ids_in_commits(m.control)[-1]
        new_versions = range(m.last_batch + 2, control_last + 2)
        assert_new_versions_written_by(m.control, m.source, new_versions, m.stores, m.partitions)  # the harness

        # (1) + (2)
        for role in ("converted", "imported"):
            rebuilt = getattr(m, role)
            out = scenario.sorted_batches(outputs[(m.source, role)])
            assert out == control_out, f"{m.source} -> {role} {m.target}: continued output differs from the control"
            assert sc.batch_ids_in_commits(rebuilt)[-1] == control_last
            assert_new_versions_written_by(rebuilt, m.target, new_versions, m.stores, m.partitions)
            if m.target == "rocksdb":
                _assert_zip_fields_like_the_engine(rebuilt, m.last_batch + 1, control_last + 1, m.stores, m.partitions)
            named = {meta["conf"].get(sc.PROVIDER_CONF) for meta in offsets_entries(rebuilt).values()}
            assert named == {sc.PROVIDERS[m.target]}, f"{m.source} -> {role}: offsets name {named}"
            assert _operator_stores(rebuilt) == m.stores
            if m.target == "hdfs":  # the snapshot we wrote and the engine's new deltas: the pinned codec
                assert assert_heap_map_files_in_codec(rebuilt, sm.SCENARIO_CODEC[scenario_name]) > 0

        # (4)
        assert tree_digest(m.src) == m.before, f"{m.source}: the source checkpoint changed"
        assert tree_digest(m.archive) == m.archived, f"{m.source}: import or the restarts changed the archive"
    print(f"\n{scenario.name}: {time.monotonic() - started:.1f}s")
