"""inspect, convert and verify on s3:// against a real S3-protocol server, on engine-written checkpoints.

The bundled demo checkpoints (written by the real engine, see demo_checkpoints/generate.py) are
uploaded to a bucket on the loopback server. Then, through the command line with
``-o key=... -o secret=... -o client_kwargs.endpoint_url=...``:

* ``inspect`` of the uploaded checkpoint says exactly what it says for the local original;
* ``convert`` works s3 -> s3, s3 -> local and local -> s3, in both provider directions, and the
  result verifies identical to the original (``verify`` across s3 and local);
* the source objects are unchanged (same keys, ETags and sizes, and the server received no
  write request under the source prefix);
* a non-empty s3 target is refused, and ``--overwrite`` replaces it without leftovers;
* ``--dry-run`` sends no write request at all.
"""

from __future__ import annotations

import json

import pytest
from helpers import DEMO, stateshift, tree_digest

HDFS_CLASS = "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider"
ROCKSDB_CLASS = "org.apache.spark.sql.execution.streaming.state.RocksDBStateStoreProvider"
CLASSES = {"hdfs": HDFS_CLASS, "rocksdb": ROCKSDB_CLASS}
DEMOS = {"hdfs": "greenhouse_totals_hdfs", "rocksdb": "greenhouse_totals_rocksdb"}
OTHER = {"hdfs": "rocksdb", "rocksdb": "hdfs"}


def _ok(proc):
    assert proc.returncode == 0, f"exit {proc.returncode}\n--- stdout\n{proc.stdout}\n--- stderr\n{proc.stderr}"
    return proc


def _uploaded(s3, provider: str) -> tuple[str, str]:
    bucket = s3.new_bucket()
    s3.upload_tree(DEMO / DEMOS[provider], bucket, "team/src")
    return bucket, f"s3://{bucket}/team/src"


def _writes_under(s3, bucket: str, prefix: str) -> list[str]:
    return [f"{r.method} {r.key}" for r in s3.requests.all() if r.bucket == bucket and r.is_write and r.key.startswith(prefix)]


def _without_location(info: dict) -> dict:
    return {k: v for k, v in info.items() if k != "checkpoint"}


@pytest.mark.parametrize("provider", ["hdfs", "rocksdb"])
def test_inspect_of_an_uploaded_checkpoint_matches_the_local_original(s3_server, provider):
    _, url = _uploaded(s3_server, provider)
    local = json.loads(_ok(stateshift("inspect", str(DEMO / DEMOS[provider]), "--json", "--rows")).stdout)
    remote = json.loads(_ok(stateshift("inspect", url, "--json", "--rows", *s3_server.cli_options())).stdout)
    assert remote["checkpoint"] == url
    assert _without_location(remote) == _without_location(local)
    rows = [p["rows"] for op in remote["operators"] for st in op["stores"] for p in st["partitions"]]
    assert rows and sum(rows) > 0, "the demo checkpoint should hold state rows"

    human = _ok(stateshift("inspect", url, *s3_server.cli_options())).stdout
    assert url in human and CLASSES[provider] in human


@pytest.mark.parametrize("source", ["hdfs", "rocksdb"])
def test_convert_s3_to_s3_verifies_and_leaves_the_source_objects_untouched(s3_server, source):
    target = OTHER[source]
    bucket, src = _uploaded(s3_server, source)
    dst = f"s3://{bucket}/team/converted"
    before = s3_server.objects(bucket, "team/src")
    s3_server.requests.clear()

    report = json.loads(
        _ok(stateshift("convert", src, dst, "--to", target, "-j", "1", "--json", *s3_server.cli_options())).stdout
    )

    assert report["verified"] is True and report["source"] == src and report["target"] == dst
    assert report["rows"] > 0
    assert _writes_under(s3_server, bucket, "team/src") == [], "convert sent a write request for a source key"
    assert s3_server.objects(bucket, "team/src") == before, "source objects changed (keys, ETags or sizes)"

    after = s3_server.objects(bucket, "team/converted")
    assert "team/converted/metadata" in after
    assert not any("/_stateshift/" in k or k.endswith(".tmp") for k in after), sorted(after)
    for key in (k for k in after if k.startswith("team/converted/offsets/") and k.rsplit("/", 1)[-1].isdigit()):
        meta = json.loads(s3_server.read(bucket, key).decode().splitlines()[1])
        assert meta["conf"]["spark.sql.streaming.stateStore.providerClass"] == CLASSES[target], key
    layout_files = [k for k in after if k.startswith("team/converted/state/")]
    if target == "rocksdb":
        assert any(k.endswith("/3.zip") for k in layout_files) and any("/SSTs/" in k for k in layout_files)
    else:
        assert any(k.endswith("/3.snapshot") for k in layout_files)

    same = json.loads(_ok(stateshift("verify", src, dst, "--json", *s3_server.cli_options())).stdout)
    assert same["identical"] is True and same["rows"]["a"] == same["rows"]["b"] == report["rows"]
    # and against the engine's own local original, across filesystems
    _ok(stateshift("verify", dst, str(DEMO / DEMOS[source]), *s3_server.cli_options()))
    shown = json.loads(_ok(stateshift("inspect", dst, "--json", *s3_server.cli_options())).stdout)
    assert shown["provider"] == CLASSES[target]


@pytest.mark.parametrize("source", ["hdfs"])  # rocksdb -> hdfs across filesystems: the next test
def test_convert_s3_to_local_disk(s3_server, tmp_path, source):
    bucket, src = _uploaded(s3_server, source)
    before = s3_server.objects(bucket, "team/src")
    dst = tmp_path / "downloaded-converted"
    _ok(stateshift("convert", src, str(dst), "--to", OTHER[source], "-j", "1", *s3_server.cli_options()))
    assert (dst / "metadata").is_file() and (dst / "offsets" / "2").is_file()
    assert not (dst / "_stateshift").exists()
    # a local target gets the checksum sidecars the local engine file system expects
    assert (dst / "offsets" / ".2.crc").is_file()
    _ok(stateshift("verify", str(dst), str(DEMO / DEMOS[source])))
    assert s3_server.objects(bucket, "team/src") == before


@pytest.mark.parametrize("source", ["rocksdb"])  # hdfs -> rocksdb across filesystems: the test above
def test_convert_local_disk_to_s3(s3_server, source):
    bucket = s3_server.new_bucket("target")
    local = DEMO / DEMOS[source]
    before = tree_digest(local)
    dst = f"s3://{bucket}/restored/ckpt"
    _ok(stateshift("convert", str(local), dst, "--to", OTHER[source], "-j", "1", *s3_server.cli_options()))
    assert tree_digest(local) == before, "the local source changed"
    keys = s3_server.objects(bucket, "restored/ckpt")
    assert "restored/ckpt/metadata" in keys
    # no checksum sidecar is written for rewritten files on an object store (nothing there reads them)
    assert not any(k.endswith((".3.snapshot.crc", ".3.zip.crc")) for k in keys), sorted(keys)
    _ok(stateshift("verify", str(local), dst, *s3_server.cli_options()))


def test_convert_with_worker_processes_on_s3(s3_server):
    bucket, src = _uploaded(s3_server, "rocksdb")
    dst = f"s3://{bucket}/team/parallel"
    report = json.loads(_ok(stateshift("convert", src, dst, "--to", "hdfs", "-j", "2", "--json", *s3_server.cli_options())).stdout)
    assert report["verified"] is True and len(report["partitions"]) == 2
    _ok(stateshift("verify", src, dst, *s3_server.cli_options()))


def test_a_non_empty_s3_target_is_refused_and_overwrite_leaves_no_leftovers(s3_server):
    bucket, src = _uploaded(s3_server, "hdfs")
    dst = f"s3://{bucket}/team/busy"
    s3_server.client().put_object(Bucket=bucket, Key="team/busy/state/0/0/9.delta", Body=b"stale")  # an old target's
    s3_server.client().put_object(Bucket=bucket, Key="team/busy-sibling/keep", Body=b"not part of the target")

    refused = stateshift("convert", src, dst, "--to", "rocksdb", "-j", "1", *s3_server.cli_options())
    assert refused.returncode == 6, refused.stderr
    assert "not empty" in refused.stderr and "team/busy/state/0/0/9.delta" in s3_server.objects(bucket, "team/busy")

    _ok(stateshift("convert", src, dst, "--to", "rocksdb", "-j", "1", "--overwrite", *s3_server.cli_options()))
    keys = s3_server.objects(bucket, "team/busy")
    assert "team/busy/state/0/0/9.delta" not in keys, "--overwrite left objects of the old target"
    assert "team/busy-sibling/keep" in s3_server.objects(bucket, "team/busy-sibling"), "a sibling prefix was deleted"
    _ok(stateshift("verify", src, dst, *s3_server.cli_options()))


def test_dry_run_on_s3_sends_no_write_request(s3_server):
    bucket, src = _uploaded(s3_server, "rocksdb")
    s3_server.requests.clear()
    plan = _ok(stateshift("convert", src, f"s3://{bucket}/team/planned", "--to", "hdfs", "--dry-run", *s3_server.cli_options()))
    assert "spark.sql.streaming.stateStore.providerClass" in plan.stdout
    writes = [f"{r.method} {r.key}" for r in s3_server.requests.all() if r.bucket == bucket and r.is_write]
    assert writes == []
    assert s3_server.objects(bucket, "team/planned") == {}
