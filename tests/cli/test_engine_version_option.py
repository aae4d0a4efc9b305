"""``--engine-version`` on convert and import, the inferred engine in inspect / dry-run / export,
and the refusal of a 4.x checkpoint for a 3.5 target, on the committed 3.5.9 and 4.3.0 fixtures."""

from __future__ import annotations

import json
import shutil
import zipfile
from pathlib import Path

import pytest

from helpers import stateshift, tree_digest
from migrate.archive.manifest import SEAL_KEY, seal

FIXTURES = Path(__file__).resolve().parents[1] / "fixtures" / "engine_versions"
AGG_35 = FIXTURES / "spark-3.5.9" / "agg_rocksdb" / "checkpoint"
SESSION_35 = FIXTURES / "spark-3.5.9" / "session_rocksdb" / "checkpoint"
AGG_43 = FIXTURES / "spark-4.3.0" / "agg_rocksdb" / "checkpoint"


def _copy(src: Path, tmp: Path, name: str = "src") -> Path:
    dst = tmp / name
    shutil.copytree(src, dst)
    return dst


def _json(*args: str) -> dict:
    proc = stateshift(*args, "--json", "--quiet")
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


def _zip_fields(path: Path) -> set[str]:
    with zipfile.ZipFile(path) as z:
        return set(json.loads(z.read("metadata").decode().split("\n", 1)[1]))


def test_inspect_names_the_engine_and_its_evidence(tmp_path: Path) -> None:
    src = _copy(AGG_35, tmp_path)
    info = _json("inspect", str(src))
    assert info["engine"]["family"] == "3.5" and info["engine"]["evidence_file"] == "offsets/3"
    assert info["engine"]["hints"] == []  # each object read once without --rows
    hints = _json("inspect", str(src), "--rows")["engine"]["hints"]
    assert any("rocksdb_version=8.3.2" in h for h in hints) and any("only the 3.5 fields" in h for h in hints)
    text = stateshift("inspect", str(src)).stdout
    assert "engine          3.5 wrote it last" in text
    assert _json("inspect", str(_copy(AGG_43, tmp_path, "four")))["engine"]["family"] == "4.x"


def test_4_checkpoint_for_a_3_5_target_is_refused_before_anything_is_written(tmp_path: Path) -> None:
    src = _copy(AGG_43, tmp_path)
    before = tree_digest(src)
    for extra in ([], ["--dry-run"]):
        proc = stateshift("convert", str(src), str(tmp_path / "dst"), "--to", "hdfs", "--engine-version", "3.5", *extra)
        assert proc.returncode == 4, proc.stderr
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1 and f"{src}/offsets/3" in lines[0] and "engine 4.x" in lines[0], lines
        assert not (tmp_path / "dst").exists()
    assert tree_digest(src) == before


def test_bad_engine_version_is_a_usage_error(tmp_path: Path) -> None:
    proc = stateshift("convert", str(_copy(AGG_35, tmp_path)), str(tmp_path / "dst"), "--to", "hdfs", "--engine-version", "3.4")
    assert proc.returncode == 2 and "--engine-version" in proc.stderr
    assert not (tmp_path / "dst").exists()


def test_default_target_is_the_source_engine_and_the_dry_run_says_so(tmp_path: Path) -> None:
    src = _copy(AGG_35, tmp_path)
    plan = _json("convert", str(src), str(tmp_path / "dst"), "--to", "hdfs", "--dry-run")
    assert plan["source_engine"]["family"] == "3.5" and plan["target_engine"] == "3.5"
    text = stateshift("convert", str(src), str(tmp_path / "dst"), "--to", "hdfs", "--dry-run").stdout
    assert "engine 3.5 -> 3.5" in text
    four = _json("convert", str(_copy(AGG_43, tmp_path, "four")), str(tmp_path / "dst"), "--to", "hdfs", "--dry-run")
    assert four["target_engine"] == "4.x"


@pytest.mark.parametrize("src_fixture", [AGG_35, SESSION_35], ids=["aggregation", "session"])
def test_3_5_rocksdb_target_gets_3_5_zips(tmp_path: Path, src_fixture: Path) -> None:
    """RocksDB -> heap map -> RocksDB for 3.5: the zips carry only 3.5's fields, tables format 5."""
    src = _copy(src_fixture, tmp_path)
    heap = tmp_path / "heap"
    assert _json("convert", str(src), str(heap), "--to", "hdfs")["target_engine"] == "3.5"
    back = tmp_path / "back"
    report = _json("convert", str(heap), str(back), "--to", "rocksdb")
    assert report["target_engine"] == "3.5" and report["verified"] is True
    zips = sorted(back.glob("state/0/*/*.zip"))
    assert zips
    for z in zips:
        assert _zip_fields(z) == {"sstFiles", "numKeys"}, z
        with zipfile.ZipFile(z) as archive:
            options = next(archive.read(n).decode() for n in archive.namelist() if n.startswith("OPTIONS-"))
        assert "format_version=5" in options
    assert _json("verify", str(src), str(back))["identical"] is True


def test_3_5_checkpoint_upgraded_to_4_gets_4_zips(tmp_path: Path) -> None:
    src = _copy(AGG_35, tmp_path)
    dst = tmp_path / "dst"
    report = _json("convert", str(src), str(dst), "--to", "rocksdb", "--engine-version", "4.3")
    assert report["source_engine"]["family"] == "3.5" and report["target_engine"] == "4.x"
    for z in sorted(dst.glob("state/0/*/4.zip")):
        assert {"numInternalKeys", "columnFamilyMapping"} <= _zip_fields(z), z


def test_export_records_the_engine_and_import_follows_it(tmp_path: Path) -> None:
    archive = tmp_path / "archive"
    exported = _json("export", str(_copy(AGG_43, tmp_path)), str(archive))
    assert exported["engine"]["family"] == "4.x"
    manifest = json.loads((archive / "manifest.json").read_text())
    assert manifest["engine"]["family"] == "4.x" and manifest["engine"]["evidence_file"] == "offsets/3"
    proc = stateshift("import", str(archive), str(tmp_path / "dst"), "--to", "hdfs", "--engine-version", "3.5")
    assert proc.returncode == 4 and "offsets/3" in proc.stderr and len(proc.stderr.strip().splitlines()) == 1, proc.stderr
    assert not (tmp_path / "dst").exists()
    plan = _json("import", str(archive), str(tmp_path / "dst"), "--to", "hdfs", "--dry-run")
    assert plan["target_engine"] == "4.x"


def test_import_of_an_old_manifest_infers_the_engine_from_the_archived_logs(tmp_path: Path) -> None:
    archive = tmp_path / "archive"
    _json("export", str(_copy(AGG_35, tmp_path)), str(archive))
    body = json.loads((archive / "manifest.json").read_text())
    del body["engine"], body[SEAL_KEY]  # what stateshift wrote before it recorded the engine
    body[SEAL_KEY] = seal(body)
    (archive / "manifest.json").write_text(json.dumps(body, indent=2))
    dst = tmp_path / "dst"
    report = _json("import", str(archive), str(dst), "--to", "rocksdb")
    assert report["source_engine"]["family"] == "3.5" and report["source_engine"]["evidence_file"] == "offsets/3"
    assert report["target_engine"] == "3.5" and report["verified"] is True
    for z in sorted(dst.glob("state/0/*/4.zip")):
        assert _zip_fields(z) == {"sstFiles", "numKeys"}, z
