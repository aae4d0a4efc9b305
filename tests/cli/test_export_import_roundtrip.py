"""export -> import on the demo checkpoints: the restored checkpoint holds the same state (verify
says IDENTICAL) in the requested provider layout, the source and the archive are never written,
and --dry-run, --new-query-id, --version and the target guards behave as documented."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from helpers import DEMO, demo_copy, stateshift, tree_digest

PROVIDER_CONF = "spark.sql.streaming.stateStore.providerClass"
CLASSES = {
    "hdfs": "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider",
    "rocksdb": "org.apache.spark.sql.execution.streaming.state.RocksDBStateStoreProvider",
}
DEMOS = ["greenhouse_totals_hdfs", "greenhouse_totals_rocksdb", "sensor_pings_dedup_hdfs"]


def ok(proc):
    assert proc.returncode == 0, f"exit {proc.returncode}\n{proc.stdout}\n{proc.stderr}"
    return proc


def offsets_conf(ckpt: Path) -> dict[int, str]:
    out = {}
    for p in (ckpt / "offsets").iterdir():
        if p.name.isdigit():
            out[int(p.name)] = json.loads(p.read_text().splitlines()[1])["conf"][PROVIDER_CONF]
    return out


def state_files(ckpt: Path) -> list[str]:
    return sorted(str(p.relative_to(ckpt)) for p in (ckpt / "state").rglob("*") if p.is_file() and not p.name.startswith("."))


@pytest.mark.parametrize("to", ["hdfs", "rocksdb"])
@pytest.mark.parametrize("name", DEMOS)
def test_export_then_import_restores_the_same_state(tmp_path, name, to):
    src = demo_copy(name, tmp_path)
    before = tree_digest(src)
    archive, dst = tmp_path / "archive", tmp_path / "restored"

    exported = json.loads(ok(stateshift("export", str(src), str(archive), "--json")).stdout)
    assert tree_digest(src) == before, "export wrote to the source"
    archived = tree_digest(archive)
    imported = json.loads(ok(stateshift("import", str(archive), str(dst), "--to", to, "--json")).stdout)
    assert tree_digest(archive) == archived, "import wrote to the archive"

    assert imported["verified"] is True and imported["rows"] == exported["rows"]
    assert all(p["archive_digest"] == p["target_digest"] for p in imported["partitions"])
    # a target that matches the archive proves the Parquet read too: the read is not digested
    assert all(p["read_digest"] is None and p["verified"] is True for p in imported["partitions"])
    verdict = ok(stateshift("verify", str(src), str(dst), "--json"))
    assert json.loads(verdict.stdout)["identical"] is True
    # the restored checkpoint is in the requested layout and names its provider everywhere
    assert set(offsets_conf(dst).values()) == {CLASSES[to]}
    files = state_files(dst)
    version = exported["state_version"]
    if to == "hdfs":
        assert any(f.endswith(f"/{version}.snapshot") for f in files), files
        assert not any(f.endswith(".zip") for f in files)
    else:
        assert any(f.endswith(f"/{version}.zip") for f in files), files
        assert not any(f.endswith((".delta", ".snapshot")) for f in files)
    # the checkpoint's own files come back byte for byte: query id, commits, sources, operator metadata
    for rel in ("metadata", f"commits/{exported['batch']}", "state/0/_metadata/metadata"):
        assert (dst / rel).read_bytes() == (src / rel).read_bytes(), rel
    assert sorted(p.name for p in (dst / "sources" / "0").iterdir()) == sorted(p.name for p in (src / "sources" / "0").iterdir())


def test_manifest_describes_the_source(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    archive = tmp_path / "archive"
    ok(stateshift("export", str(src), str(archive)))
    m = json.loads((archive / "manifest.json").read_text())
    query_id = json.loads((src / "metadata").read_text())["id"]
    commits = sorted(int(p.name) for p in (src / "commits").iterdir() if p.name.isdigit())
    assert m["format"] == "stateshift-state-archive" and m["format_version"] == 1
    assert m["query_id"] == query_id
    assert m["batch_id"] == commits[-1] and m["state_version"] == commits[-1] + 1
    assert m["provider_class"] == CLASSES["hdfs"] and m["codec"] == "lz4" and m["partitions"] == 2
    assert [o["batch"] for o in m["offsets"]] == commits and [c["batch"] for c in m["commits"]] == commits
    assert m["created_utc"].endswith("Z")
    assert {(d["operator"], d["store"], d["partition"]) for d in m["data_files"]} == {(0, "default", 0), (0, "default", 1)}
    assert sum(d["rows"] for d in m["data_files"]) == m["rows"] > 0
    store = m["operators"][0]["stores"][0]
    assert store["decoded"] is True and [f["name"] for f in store["key_schema"]["fields"]] == ["bay", "rack"]
    listed = {f["path"] for f in m["checkpoint_files"]} | {d["path"] for d in m["data_files"]}
    on_disk = {str(p.relative_to(archive)) for p in archive.rglob("*") if p.is_file()} - {"manifest.json"}
    assert listed == on_disk
    # the checkpoint's metadata files are kept verbatim
    for rel in ("metadata", "offsets/0", "commits/0", "sources/0/0", "state/0/_metadata/metadata", "state/0/0/_metadata/schema"):
        assert (archive / "checkpoint" / rel).read_bytes() == (src / rel).read_bytes(), rel


def test_credentials_never_reach_the_manifest(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    archive = tmp_path / "archive"
    url = f"file://{src}?token=hunter2hunter2"
    proc = stateshift("export", url, str(archive))
    # the local filesystem may or may not accept a query string; either way no secret is printed or kept
    assert "hunter2hunter2" not in proc.stdout + proc.stderr
    if proc.returncode == 0:
        assert "hunter2hunter2" not in (archive / "manifest.json").read_text()


def test_dry_run_checks_the_archive_and_writes_nothing(tmp_path):
    src = demo_copy("greenhouse_totals_rocksdb", tmp_path)
    archive, dst = tmp_path / "archive", tmp_path / "restored"
    ok(stateshift("export", str(src), str(archive)))
    proc = ok(stateshift("import", str(archive), str(dst), "--to", "hdfs", "--dry-run"))
    assert not dst.exists()
    assert "nothing written" in proc.stdout and "rewrite offsets/" in proc.stdout and "snapshot" in proc.stdout
    plan = json.loads(ok(stateshift("import", str(archive), str(dst), "--to", "hdfs", "--dry-run", "--json")).stdout)
    assert plan["dry_run"] is True and plan["conf_changes"][PROVIDER_CONF]["new"] == CLASSES["hdfs"]
    assert not dst.exists()


def test_new_query_id_changes_only_the_id(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    archive, dst = tmp_path / "archive", tmp_path / "clone"
    ok(stateshift("export", str(src), str(archive)))
    report = json.loads(ok(stateshift("import", str(archive), str(dst), "--to", "rocksdb", "--new-query-id", "--json")).stdout)
    old = json.loads((src / "metadata").read_text())
    new = json.loads((dst / "metadata").read_text())
    assert new["id"] != old["id"] and new["id"] == report["new_query_id"]
    assert {k: v for k, v in new.items() if k != "id"} == {k: v for k, v in old.items() if k != "id"}
    assert len(new["id"]) == 36 and new["id"][14] == "4"  # a version-4 (random) UUID
    assert json.loads(ok(stateshift("verify", str(src), str(dst), "--json")).stdout)["identical"] is True


def test_older_version_keeps_only_its_log_entries(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    archive, dst = tmp_path / "archive", tmp_path / "restored"
    latest = max(int(p.name) for p in (src / "commits").iterdir() if p.name.isdigit())
    version = latest  # state version `latest` is written by batch latest - 1
    m = json.loads(ok(stateshift("export", str(src), str(archive), "--version", str(version), "--json")).stdout)
    assert m["state_version"] == version and m["batch"] == version - 1 and m["notes"]
    kept = sorted(int(p.name) for p in (archive / "checkpoint" / "offsets").iterdir() if p.name.isdigit())
    assert kept == list(range(version))
    ok(stateshift("import", str(archive), str(dst), "--to", "rocksdb"))
    assert sorted(int(p.name) for p in (dst / "commits").iterdir() if p.name.isdigit()) == list(range(version))
    shown = json.loads(ok(stateshift("inspect", str(dst), "--json")).stdout)
    assert json.dumps(shown).count(str(version)) > 0
    # the restored rows equal the state the source had at that version (an export of the source at V)
    again = json.loads(ok(stateshift("export", str(dst), str(tmp_path / "again"), "--json")).stdout)
    assert [d["state_digest"] for d in again["data_files"]] == [d["state_digest"] for d in m["data_files"]]
    newest = json.loads(ok(stateshift("export", str(src), str(tmp_path / "newest"), "--json")).stdout)
    assert [d["state_digest"] for d in newest["data_files"]] != [d["state_digest"] for d in m["data_files"]]


def test_a_version_without_a_commit_is_refused(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    proc = stateshift("export", str(src), str(tmp_path / "archive"), "--version", "99")
    assert proc.returncode == 2 and "--version 99" in proc.stderr and len(proc.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "archive").exists()


def test_targets_are_guarded(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    archive = tmp_path / "archive"
    assert stateshift("export", str(src), str(src / "inside")).returncode == 6
    busy = tmp_path / "busy"
    busy.mkdir()
    (busy / "keep.txt").write_text("someone's files")
    proc = stateshift("export", str(src), str(busy))
    assert proc.returncode == 6 and "--overwrite" in proc.stderr and (busy / "keep.txt").exists()
    ok(stateshift("export", str(src), str(archive)))
    proc = stateshift("import", str(archive), str(busy), "--to", "hdfs")
    assert proc.returncode == 6 and (busy / "keep.txt").exists()
    assert stateshift("import", str(archive), str(archive / "inside"), "--to", "hdfs").returncode == 6
    # --overwrite replaces only what a checkpoint or an archive holds: someone's file is kept
    proc = stateshift("import", str(archive), str(busy), "--to", "hdfs", "--overwrite")
    assert proc.returncode == 6 and "--overwrite refused" in proc.stderr and (busy / "keep.txt").exists()
    (busy / "keep.txt").unlink()
    ok(stateshift("convert", str(src), str(busy), "--to", "rocksdb"))
    ok(stateshift("import", str(archive), str(busy), "--to", "hdfs", "--overwrite"))  # the old checkpoint goes


def test_demo_checkpoints_exist():
    for name in DEMOS:
        assert (DEMO / name / "metadata").is_file(), f"demo checkpoint {name} is missing"


def test_a_version_whose_state_files_are_gone_is_refused_before_writing(tmp_path):
    src = demo_copy("greenhouse_totals_hdfs", tmp_path)
    gone = src / "state" / "0" / "1" / "1.delta"
    gone.unlink()
    (gone.parent / ".1.delta.crc").unlink(missing_ok=True)
    proc = stateshift("export", str(src), str(tmp_path / "archive"), "-j", "1")
    assert proc.returncode == 3, proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "1.delta" in proc.stderr
    assert not (tmp_path / "archive").exists()


@pytest.mark.parametrize("name", ["greenhouse_totals_hdfs", "greenhouse_totals_rocksdb"])
def test_archives_hold_rows_in_key_order(tmp_path, name):
    """Export asks the source for key order (the heap map's files hold the rows in the engine's
    hash-map order: not sorted in this demo), so every data file lists its rows by strictly
    increasing key bytes, and both providers' exports of the same state list the same rows in
    the same order."""
    import pyarrow.parquet as pq

    archive = tmp_path / "archive"
    ok(stateshift("export", str(DEMO / name), str(archive), "--force", "-j", "1"))
    files = sorted(archive.rglob("*.parquet"))
    assert files
    for f in files:
        keys = pq.read_table(f, columns=["key"]).column("key").to_pylist()
        assert keys == sorted(set(keys)), f


def test_both_providers_export_the_same_rows_in_the_same_order(tmp_path):
    import pyarrow.parquet as pq

    tables = {}
    for name in ("greenhouse_totals_hdfs", "greenhouse_totals_rocksdb"):
        archive = tmp_path / name
        ok(stateshift("export", str(DEMO / name), str(archive), "--force", "-j", "1"))
        tables[name] = {
            str(f.relative_to(archive)): pq.read_table(f, columns=["key", "value"]).to_pylist() for f in sorted(archive.rglob("*.parquet"))
        }
    assert tables["greenhouse_totals_hdfs"] == tables["greenhouse_totals_rocksdb"]


def test_an_archive_given_where_a_checkpoint_belongs_is_named_as_one(tmp_path):
    archive = tmp_path / "archive"
    ok(stateshift("export", str(DEMO / "greenhouse_totals_hdfs"), str(archive)))
    before = tree_digest(archive)
    for args in (("inspect", str(archive)), ("verify", str(archive), str(DEMO / "greenhouse_totals_hdfs")),
                 ("convert", str(archive), str(tmp_path / "out"), "--to", "rocksdb")):
        r = stateshift(*args)
        assert r.returncode == 3, r.stderr
        assert "not a streaming checkpoint" in r.stderr and "looks like a stateshift archive" in r.stderr, r.stderr
        assert "stateshift import" in r.stderr and len(r.stderr.strip().splitlines()) == 1, r.stderr
    assert tree_digest(archive) == before and not (tmp_path / "out").exists()


def test_a_checkpoint_given_to_import_is_named_as_one(tmp_path):
    r = stateshift("import", str(DEMO / "greenhouse_totals_hdfs"), str(tmp_path / "out"), "--to", "rocksdb")
    assert r.returncode == 3, r.stderr
    assert "not a stateshift archive" in r.stderr and "looks like a streaming checkpoint" in r.stderr, r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and not (tmp_path / "out").exists()
