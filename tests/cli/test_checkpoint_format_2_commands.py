"""convert / export / import / inspect on checkpoints in state checkpoint format 2 (unique ids).

What each direction writes (see README "State checkpoint format 2"): to the heap map, format 1
(plain names, every commit ``v1`` without ids); to RocksDB, the source's format unless
``--checkpoint-format`` says otherwise (format 2: ``<v>_<id>.zip`` with a fresh id, its visible
``.crc`` JSON, the latest commit ``v2`` naming those ids, older commits as they were). The
engine restarts on each of these in tests/engine/test_checkpoint_format_2_engine.py.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from helpers import DEMO, stateshift, tree_digest

from migrate.checkpoint.uids import verify_checksum_file
from migrate.codecs.hadoop_crc import verify_crc

V43 = Path(__file__).resolve().parents[1] / "fixtures" / "engine_versions" / "spark-4.3.0"


def _src(tmp_path: Path, case: str) -> Path:
    dst = tmp_path / "src"
    shutil.copytree(V43 / case / "checkpoint", dst)
    return dst


def _run(*args: str) -> dict:
    proc = stateshift(*args, "--json")
    assert proc.returncode == 0, proc.stdout + proc.stderr
    return json.loads(proc.stdout)


def _commit(root: Path, batch: int) -> tuple[str, dict]:
    head, body = (root / "commits" / str(batch)).read_text().split("\n", 1)
    return head, json.loads(body)


def _assert_sidecar(path: Path) -> None:
    verify_crc(path.read_bytes(), (path.parent / f".{path.name}.crc").read_bytes(), str(path))


@pytest.mark.parametrize("case", ["agg_rocksdb_changelog_ckptv2", "join_rocksdb_ckptv2"])
def test_convert_to_heap_map_writes_format_1(tmp_path: Path, case: str) -> None:
    src = _src(tmp_path, case)
    before = tree_digest(src)
    report = _run("convert", str(src), str(tmp_path / "out"), "--to", "hdfs", "--force")
    assert report["checkpoint_format"] == {"source": 2, "target": 1}
    out = tmp_path / "out"
    for entry in sorted((out / "commits").iterdir()):
        if entry.name.isdigit():
            head, body = _commit(out, int(entry.name))
            assert head == "v1" and "stateUniqueIds" not in body
            _assert_sidecar(entry)
    assert _run("inspect", str(out))["checkpoint_format"] == 1
    assert stateshift("verify", str(src), str(out)).returncode == 0
    assert tree_digest(src) == before


@pytest.mark.parametrize("case", ["agg_rocksdb_ckptv2", "agg_rocksdb_changelog_ckptv2", "join_rocksdb_ckptv2"])
def test_convert_to_rocksdb_keeps_format_2_with_new_ids(tmp_path: Path, case: str) -> None:
    src = _src(tmp_path, case)
    out = tmp_path / "out"
    report = _run("convert", str(src), str(out), "--to", "rocksdb", "--force")
    assert report["checkpoint_format"] == {"source": 2, "target": 2}
    latest = report["batch"]
    head, body = _commit(out, latest)
    _, old = _commit(src, latest)
    assert head == "v2" and body["nextBatchWatermarkMs"] == old["nextBatchWatermarkMs"]
    new_ids = [u for part in body["stateUniqueIds"]["0"] for u in part]
    old_ids = [u for part in old["stateUniqueIds"]["0"] for u in part]
    assert len(new_ids) == len(old_ids) and not set(new_ids) & set(old_ids)
    _assert_sidecar(out / "commits" / str(latest))
    for b in range(latest):  # older entries as the engine wrote them
        assert (out / "commits" / str(b)).read_bytes() == (src / "commits" / str(b)).read_bytes()
    zips = sorted(out.glob("state/0/**/*.zip"))
    assert len(zips) == len(new_ids)
    for z in zips:
        version, uid = z.stem.split("_")
        assert int(version) == latest + 1 and uid in new_ids
        verify_checksum_file(z.read_bytes(), (z.parent / f"{z.name}.crc").read_bytes(), str(z))
        _assert_sidecar(z.parent / f"{z.name}.crc")
    shown = _run("inspect", str(out), "--rows")
    assert shown["checkpoint_format"] == 2
    assert sorted(p["checkpoint_id"] for op in shown["operators"] for st in op["stores"] for p in st["partitions"]) == sorted(new_ids)
    assert stateshift("verify", str(src), str(out)).returncode == 0


def test_checkpoint_format_option(tmp_path: Path) -> None:
    src = _src(tmp_path, "agg_rocksdb_ckptv2")
    refused = stateshift("convert", str(src), str(tmp_path / "bad"), "--to", "hdfs", "--checkpoint-format", "2", "--force")
    assert refused.returncode == 4 and "only state checkpoint format 1" in refused.stderr
    assert not (tmp_path / "bad").exists()
    plain = tmp_path / "plain"
    assert _run("convert", str(src), str(plain), "--to", "rocksdb", "--checkpoint-format", "1", "--force")["checkpoint_format"]["target"] == 1
    assert sorted(p.name for p in plain.glob("state/0/0/*.zip")) == ["4.zip"]
    assert _commit(plain, 3)[0] == "v1"
    assert stateshift("verify", str(src), str(plain)).returncode == 0
    heap = tmp_path / "heap"
    shutil.copytree(DEMO / "greenhouse_totals_hdfs", heap)
    up = tmp_path / "up"
    report = _run("convert", str(heap), str(up), "--to", "rocksdb", "--checkpoint-format", "2", "--force")
    assert report["checkpoint_format"] == {"source": 1, "target": 2}
    assert _run("inspect", str(up))["checkpoint_format"] == 2
    assert stateshift("verify", str(heap), str(up)).returncode == 0


def test_dry_run_lists_the_commits_it_rewrites(tmp_path: Path) -> None:
    src = _src(tmp_path, "agg_rocksdb_ckptv2")
    plan = _run("convert", str(src), str(tmp_path / "out"), "--to", "hdfs", "--dry-run", "--force")
    actions = {f["path"]: f["action"] for f in plan["files"]}
    assert all(actions[f"commits/{b}"] == "rewrite" for b in range(4))
    assert not (tmp_path / "out").exists()


def test_export_records_the_format_and_import_restores_it(tmp_path: Path) -> None:
    src = _src(tmp_path, "join_rocksdb_ckptv2")
    archive = tmp_path / "archive"
    exported = _run("export", str(src), str(archive), "--force")
    assert exported["checkpoint_format"] == 2
    assert json.loads((archive / "manifest.json").read_text())["checkpoint_format"] == 2
    rocks = tmp_path / "rocks"
    assert _run("import", str(archive), str(rocks), "--to", "rocksdb")["checkpoint_format"] == {"source": 2, "target": 2}
    assert _run("inspect", str(rocks), "--rows")["checkpoint_format"] == 2
    head, body = _commit(rocks, 4)
    assert head == "v2" and len(body["stateUniqueIds"]["0"]) == 2 and all(len(p) == 4 for p in body["stateUniqueIds"]["0"])
    heap = tmp_path / "heap"
    assert _run("import", str(archive), str(heap), "--to", "hdfs")["checkpoint_format"] == {"source": 2, "target": 1}
    assert _commit(heap, 4)[0] == "v1"
    for target in (rocks, heap):
        assert stateshift("verify", str(src), str(target)).returncode == 0


def test_killed_convert_to_format_2_resumes_with_the_same_ids(tmp_path: Path) -> None:
    src = _src(tmp_path, "join_rocksdb_ckptv2")
    dst = tmp_path / "out"
    crashed = stateshift("convert", str(src), str(dst), "--to", "rocksdb", "-j", "1", "--force",
                         env={"STATESHIFT_CRASH_AT": "partition-written:3"})
    assert crashed.returncode == -9, crashed.stderr
    first = sorted(p.name for p in dst.glob("state/0/**/*.zip"))
    assert first, "nothing was written before the crash; the test proves nothing"
    resumed = _run("convert", str(src), str(dst), "--to", "rocksdb", "-j", "1", "--force", "--resume")
    final = sorted(p.name for p in dst.glob("state/0/**/*.zip"))
    assert set(first) <= set(final) and len(final) == 8  # reused partitions keep their ids, no stray files
    reused = [p for p in resumed["partitions"] if not p["written"]]
    assert reused, "no partition was reused on resume"
    ids = {u for part in _commit(dst, 4)[1]["stateUniqueIds"]["0"] for u in part}
    assert {n.split("_")[1][: -len(".zip")] for n in final} == ids
    assert stateshift("verify", str(src), str(dst)).returncode == 0


@pytest.mark.parametrize("command", ["convert", "export"])
def test_lineage_that_disagrees_with_the_commit_log_is_refused(tmp_path: Path, command: str) -> None:
    src = _src(tmp_path, "agg_rocksdb_changelog_ckptv2")
    head, body = _commit(src, 1)  # names the id of version 2 of each partition
    real = body["stateUniqueIds"]["0"][0][0]
    body["stateUniqueIds"]["0"][0][0] = "feedface-0000-4000-8000-000000000000"
    (src / "commits" / "1").write_text(head + "\n" + json.dumps(body, separators=(",", ":")))
    (src / "commits" / ".1.crc").unlink()
    before = tree_digest(src)
    args = ["--to", "hdfs"] if command == "convert" else []
    proc = stateshift(command, str(src), str(tmp_path / "out"), *args, "--force")
    assert proc.returncode == 3, proc.stdout + proc.stderr
    assert f"state/0/0/2_{real}.changelog: the lineage of version 4 builds on 2_{real}.changelog" in proc.stderr
    assert "commits/1 names id feedface-0000-4000-8000-000000000000" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1
    assert tree_digest(src) == before
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


@pytest.mark.parametrize("to", ["rocksdb", "hdfs"])
def test_format_2_source_is_refused_for_an_engine_35_target(tmp_path: Path, to: str) -> None:
    src = _src(tmp_path, "agg_rocksdb_ckptv2")
    proc = stateshift("convert", str(src), str(tmp_path / "out"), "--to", to, "--engine-version", "3.5", "--force")
    assert proc.returncode == 4, proc.stdout + proc.stderr
    assert "engine 3.5" in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()
