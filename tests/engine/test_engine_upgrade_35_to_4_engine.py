"""A checkpoint written by engine 3.5, moved with ``--engine-version 4.x``, continues on 4.x, a
stream-stream join included (which 4.x refuses to continue untouched).

Runs in the 4.x suite: the 3.5 runs go through ``engine35_run.py`` under the pyspark 3.5
venv (``STATESHIFT_ENGINE35_PYTHON``, else ``.venv35/bin/python`` of this checkout, which
``make test`` builds before it runs the suites), the restarts through this session's 4.x engine.

* aggregation on the heap map: ``convert --to rocksdb --engine-version 4.x`` and ``export`` /
  ``import --to rocksdb --engine-version 4.x``; the 4.x engine continues both and the control (the
  untouched 3.5 checkpoint, which 4.3.0 continues too: FINDINGS.md) with the same output, and the
  zip ``metadata`` stateshift wrote has the fields 4.x then writes itself;
* a two-source inner join on RocksDB (``scenarios_upgrade``): the 4.x engine fails on the
  untouched copy (STATE_STORE_VALUE_SCHEMA_NOT_COMPATIBLE); ``convert --to hdfs`` and
  ``export`` / ``import --to rocksdb`` with ``--engine-version 4.x`` rewrite the four join stores'
  schema files with nullable value fields, and the 4.x engine continues both with exactly the
  output the 3.5 engine gives when it continues the untouched checkpoint itself;
* the other operators (deduplication, deduplication within the watermark, windows, session
  windows, deduplication chained with windows, per-group state with an event-time timeout through
  the Python API and, in state format 1, the JVM API): moved
  to the other provider with ``convert --engine-version 4.x`` and rebuilt on their own provider
  with ``export`` / ``import --engine-version 4.x``, the 4.x engine continues both with exactly
  the output of the 3.5 engine continuing the untouched checkpoint itself.
"""

from __future__ import annotations

import importlib
import json
import os
import shutil
import subprocess
import zipfile
from pathlib import Path

import pytest
import scenarios as sc
import scenarios_more as sm
import scenarios_upgrade as su
from test_convert_roundtrip_engine import describe, offsets_entries, run_cli, tree_digest

pytestmark = pytest.mark.skipif(sc.ENGINE_35, reason="writes with engine 3.5 and restarts on 4.x: runs in the 4.x suite")

_ENGINE_DIR = Path(__file__).resolve().parent
_REPO = _ENGINE_DIR.parents[1]
FIRST_RUN_FILES = 3
TOTAL_FILES = 5


def _python35() -> str:
    path = os.environ.get("STATESHIFT_ENGINE35_PYTHON") or str(_REPO / ".venv35" / "bin" / "python")
    if not Path(path).exists():
        reason = f"no pyspark 3.5 venv at {path} (run `make install-engine35` or set STATESHIFT_ENGINE35_PYTHON)"
        if os.environ.get("CI") == "true":
            pytest.fail(reason + ", and CI=true", pytrace=False)
        pytest.skip(reason)
    return path


def _run_on_35(module: str, name: str, input_dir: Path, checkpoint: Path, provider: str | None) -> dict:
    """One run of a scenario under the 3.5 engine (child process); its output rows, values as str.
    Its Python workers run the 3.5 venv's interpreter too: this session's engine set
    ``PYSPARK_PYTHON`` to the 4.x one, whose pyarrow the 3.5 worker code cannot use."""
    python = _python35()
    proc = subprocess.run(
        [python, str(_ENGINE_DIR / "engine35_run.py"), module, name, str(input_dir), str(checkpoint), provider or "-"],
        capture_output=True, text=True, timeout=900, cwd=_REPO,
        env={**os.environ, "PYSPARK_PYTHON": python, "PYSPARK_DRIVER_PYTHON": python,
             "PYTHONPATH": os.pathsep.join([str(_ENGINE_DIR), str(_REPO)])},
    )
    assert proc.returncode == 0, describe(proc)
    result = json.loads(proc.stdout.strip().splitlines()[-1])
    assert result["pyspark"].startswith("3.5."), result
    return result


def _as_text(rows: list) -> dict[int, list]:
    """(batch, row) pairs as the child reports them: values as str, grouped by batch and sorted."""
    out: dict[int, list] = {}
    for batch, row in rows:
        out.setdefault(int(batch), []).append([None if v is None else str(v) for v in row])
    return {b: sorted(r, key=str) for b, r in sorted(out.items())}


def _zip_fields(path: Path) -> set[str]:
    with zipfile.ZipFile(path) as z:
        return set(json.loads(z.read("metadata").decode().split("\n", 1)[1]))


def _cli(*args: str) -> dict:
    proc = run_cli(*args, "--json")
    assert proc.returncode == 0, describe(proc)
    return json.loads(proc.stdout)


def test_3_5_aggregation_moved_for_4_continues_on_4(spark, tmp_path: Path) -> None:
    scenario = sc.BAY_TOTALS
    input_dir, src = tmp_path / "input", tmp_path / "src"
    sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
    assert _run_on_35("scenarios", scenario.name, input_dir, src, "hdfs")["rows"]
    assert sc.ENGINE_FAMILY == "4.x"
    before = tree_digest(src)
    last_batch = sc.batch_ids_in_commits(src)[-1]
    control = tmp_path / "control"
    shutil.copytree(src, control)

    converted, archive, imported = tmp_path / "converted", tmp_path / "archive", tmp_path / "imported"
    report = _cli("convert", str(src), str(converted), "--to", "rocksdb", "--engine-version", "4.x")
    assert (report["source_engine"]["family"], report["target_engine"], report["schema_rewrites"]) == ("3.5", "4.x", [])
    _cli("export", str(src), str(archive))
    assert _cli("import", str(archive), str(imported), "--to", "rocksdb", "--engine-version", "4")["target_engine"] == "4.x"
    assert tree_digest(src) == before

    sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, control, None))
    assert control_out and min(control_out) > last_batch, "the 4.x control restart produced nothing new"
    new_last = sc.batch_ids_in_commits(control)[-1]
    for rebuilt in (converted, imported):
        out = scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, rebuilt, None))
        assert out == control_out, f"{rebuilt.name}: continued output on 4.x differs from the control"
        assert sc.batch_ids_in_commits(rebuilt)[-1] == new_last
        newest = offsets_entries(rebuilt)[new_last]["conf"]
        assert newest[sc.PROVIDER_CONF] == sc.ROCKSDB_PROVIDER
        assert "spark.sql.streaming.stateStore.encodingFormat" in newest, "the new batches were not run by 4.x"
        for store in sorted((rebuilt / "state" / "0").glob("[0-9]*")):
            ours, engines = _zip_fields(store / f"{last_batch + 1}.zip"), _zip_fields(store / f"{new_last + 1}.zip")
            assert ours == engines and "numInternalKeys" in ours, f"{store}: {ours} vs the engine's {engines}"


def test_3_5_join_moved_for_4_continues_on_4_where_the_untouched_one_fails(spark, tmp_path: Path) -> None:
    input_dir, src = tmp_path / "input", tmp_path / "src"
    su.write_inputs(input_dir, 0, FIRST_RUN_FILES)
    assert _run_on_35("scenarios_upgrade", su.NAME, input_dir, src, "rocksdb")["rows"]
    before = tree_digest(src)
    last_batch = sc.batch_ids_in_commits(src)[-1]
    control35, control4 = tmp_path / "control-35", tmp_path / "control-4"
    shutil.copytree(src, control35)
    shutil.copytree(src, control4)

    converted, archive, imported = tmp_path / "converted", tmp_path / "archive", tmp_path / "imported"
    report = _cli("convert", str(src), str(converted), "--to", "hdfs", "--engine-version", "4.x")
    stores = sorted(d.name for d in (src / "state" / "0" / "0").iterdir() if d.is_dir() and d.name[:5] in ("left-", "right"))
    joins = [f"state/0/0/{n}/_metadata/schema" for n in stores]
    assert len(joins) == 4 and report["target_engine"] == "4.x" and report["schema_rewrites"] == joins, report
    _cli("export", str(src), str(archive))
    assert _cli("import", str(archive), str(imported), "--to", "rocksdb", "--engine-version", "4.x")["schema_rewrites"] == joins
    assert tree_digest(src) == before

    su.write_inputs(input_dir, FIRST_RUN_FILES, TOTAL_FILES)
    # the engine that wrote it continues it: the expected output
    expected = _as_text(_run_on_35("scenarios_upgrade", su.NAME, input_dir, control35, None)["rows"])
    assert expected and min(expected) > last_batch
    # b-5's reading after the move matches its ping from before it: the join state is used
    assert any(row[0] == "b-5" and "06:46" in row[3] for rows in expected.values() for row in rows), expected
    # 4.x refuses the untouched 3.5 checkpoint (why the schema files are rewritten)
    with pytest.raises(sc.QueryFailed, match="STATE_STORE_VALUE_SCHEMA_NOT_COMPATIBLE"):
        su.run_named(spark, su.NAME, input_dir, control4, None)
    for rebuilt in (converted, imported):
        out = _as_text(su.run_named(spark, su.NAME, input_dir, rebuilt, None))
        assert out == expected, f"{rebuilt.name}: continued output on 4.x differs from 3.5's own continuation"
        assert "spark.sql.streaming.stateStore.encodingFormat" in offsets_entries(rebuilt)[max(out)]["conf"]


# case -> (scenario module, scenario name, provider the 3.5 engine writes, provider of the convert)
OTHER_OPERATORS = {
    "dedup": ("scenarios", "ping_dedup", "hdfs", "rocksdb"),
    "dedup-within-watermark": ("scenarios", "ping_dedup_within_watermark", "rocksdb", "hdfs"),
    "windows": ("scenarios_more", "wave_windows", "rocksdb", "hdfs"),
    "session-windows": ("test_session_window_engine", "bay_sessions", "hdfs", "rocksdb"),
    "dedup-then-windows": ("scenarios_more", "ping_dedup_then_windows", "hdfs", "rocksdb"),
    "per-group-state": ("scenarios_more", "buoy_pandas_event_timeout_v2", "rocksdb", "hdfs"),
    "per-group-state-jvm": ("scenarios_more", "buoy_jvm_event_timeout_v1", "hdfs", "rocksdb"),
}


@pytest.fixture(scope="module")
def java_functions(spark, tmp_path_factory):
    """The Java group functions of the JVM flatMapGroupsWithState scenario, added as a jar."""
    return sm.install_java_functions(spark, tmp_path_factory.mktemp("java"))


@pytest.mark.parametrize("case", list(OTHER_OPERATORS))
def test_3_5_operator_moved_for_4_continues_on_4_as_3_5_continues_it(spark, request, tmp_path: Path, case: str) -> None:
    module, name, source, target = OTHER_OPERATORS[case]
    if name.startswith("buoy_jvm"):
        request.getfixturevalue("java_functions")
    mod = importlib.import_module(module)
    scenario = mod.SCENARIOS[name]
    run_on_4 = getattr(mod, "run", None) or sc.run_query
    input_dir, src = tmp_path / "input", tmp_path / "src"
    sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
    assert _run_on_35(module, name, input_dir, src, source)["rows"], "the 3.5 run produced no output"
    before = tree_digest(src)
    last_batch = sc.batch_ids_in_commits(src)[-1]
    control35 = tmp_path / "control-35"
    shutil.copytree(src, control35)

    converted, archive, imported = tmp_path / "converted", tmp_path / "archive", tmp_path / "imported"
    report = _cli("convert", str(src), str(converted), "--to", target, "--engine-version", "4.x")
    assert (report["source_engine"]["family"], report["target_engine"]) == ("3.5", "4.x"), report
    _cli("export", str(src), str(archive))
    assert _cli("import", str(archive), str(imported), "--to", source, "--engine-version", "4.x")["target_engine"] == "4.x"
    assert tree_digest(src) == before

    sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)
    expected = _as_text(_run_on_35(module, name, input_dir, control35, None)["rows"])
    assert expected and min(expected) > last_batch, "the 3.5 engine continued with nothing new"
    if name in sm.CARRIED:  # a row only the state from before the move explains
        carried = [None if v is None else str(v) for v in sm.CARRIED[name]]
        assert any(row == carried for rows in expected.values() for row in rows), (carried, expected)
    for rebuilt in (converted, imported):
        out = _as_text(run_on_4(spark, scenario, input_dir, rebuilt, None))
        assert out == expected, f"{rebuilt.name}: continued output on 4.x differs from 3.5's own continuation"
        conf = offsets_entries(rebuilt)[max(out)]["conf"]
        assert "spark.sql.streaming.stateStore.encodingFormat" in conf, "the new batches were not run by 4.x"
        assert conf[sc.PROVIDER_CONF] == sc.PROVIDERS[target if rebuilt is converted else source]
