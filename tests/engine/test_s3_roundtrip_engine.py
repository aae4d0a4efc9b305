"""An engine checkpoint converted ON OBJECT STORAGE continues exactly like the original.

For each source provider: the engine writes three input files' worth of batches into a local
checkpoint; the tree is copied to a local control and uploaded to a bucket on the loopback S3
server (moto). ``stateshift convert`` rebuilds it there for the other provider (s3 -> s3, through
``-o key=... -o secret=... -o client_kwargs.endpoint_url=...``) and ``stateshift verify`` compares
the two on the server. The converted checkpoint is downloaded to local disk (the engine here has
no S3 connector) and the engine restarts it and the control on two more input files, with no
provider set in the session, so each runs on the provider its checkpoint names. The proof:

1. the continued outputs are equal, batch by batch, and not empty;
2. the engine wrote the new provider's files for the new versions in the converted checkpoint,
   and every offsets entry of it names the new provider class;
3. the uploaded source objects are unchanged (keys, ETags, sizes; no write request under the
   source prefix) and so is the local original.

Nothing here reads state through the engine; the engine only runs queries.
"""

from __future__ import annotations

import json
import shutil
import subprocess

import pytest
import scenarios as sc
from test_convert_roundtrip_engine import (
    assert_new_versions_written_by,
    describe,
    offsets_entries,
    run_cli,
    tree_digest,
)

OTHER = {"hdfs": "rocksdb", "rocksdb": "hdfs"}
FIRST_RUN_FILES = 3
TOTAL_FILES = 5


def _cli(*args: str) -> subprocess.CompletedProcess:
    proc = run_cli(*args)
    assert proc.returncode == 0, describe(proc)
    return proc


@pytest.mark.parametrize("source", ["hdfs", "rocksdb"], ids=lambda s: f"{s}-to-{OTHER[s]}")
def test_checkpoint_converted_on_s3_continues_like_the_original(spark, s3_server, tmp_path, source):
    scenario = sc.BAY_TOTALS
    target = OTHER[source]
    s3 = s3_server

    input_dir, local_src = tmp_path / "input", tmp_path / "src"
    sc.write_input_files(input_dir, scenario, 0, FIRST_RUN_FILES)
    first = sc.run_query(spark, scenario, input_dir, local_src, source)
    assert first, "the first run produced no output rows"
    last_batch = sc.batch_ids_in_commits(local_src)[-1]
    converted_version = last_batch + 1  # state version n is written by batch n - 1
    local_before = tree_digest(local_src)
    control = tmp_path / "control"
    shutil.copytree(local_src, control)

    bucket = s3.new_bucket("engine")
    s3.upload_tree(local_src, bucket, "prod/stream/src")
    src_url, dst_url = f"s3://{bucket}/prod/stream/src", f"s3://{bucket}/prod/stream/converted"
    objects_before = s3.objects(bucket, "prod/stream/src")
    s3.requests.clear()

    report = json.loads(_cli("convert", src_url, dst_url, "--to", target, "-j", "1", "--json", *s3.cli_options()).stdout)
    assert report["verified"] is True and report["rows"] > 0
    same = json.loads(_cli("verify", src_url, dst_url, "--json", *s3.cli_options()).stdout)
    assert same["identical"] is True

    writes_to_source = [f"{r.method} {r.key}" for r in s3.requests.all() if r.is_write and r.key.startswith("prod/stream/src/")]
    assert writes_to_source == [], "the tool wrote under the source prefix"
    assert s3.objects(bucket, "prod/stream/src") == objects_before, "source objects changed"

    converted = tmp_path / "converted"
    assert s3.download_tree(bucket, "prod/stream/converted", converted) > 0
    assert not (converted / "_stateshift").exists()

    sc.write_input_files(input_dir, scenario, FIRST_RUN_FILES, TOTAL_FILES)
    control_out = scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, control, None))
    converted_out = scenario.sorted_batches(sc.run_query(spark, scenario, input_dir, converted, None))

    # (1) the same continued output
    assert control_out, "the control restart produced no output; the test proves nothing"
    assert min(control_out) > last_batch, "the control restart re-ran old batches"
    assert converted_out == control_out

    # (2) the engine ran the converted checkpoint on the new provider
    new_last = sc.batch_ids_in_commits(converted)[-1]
    assert new_last == sc.batch_ids_in_commits(control)[-1] > last_batch
    new_versions = range(converted_version + 1, new_last + 2)
    assert_new_versions_written_by(converted, target, new_versions)
    assert_new_versions_written_by(control, source, new_versions)  # the harness itself
    classes = {b: m["conf"].get(sc.PROVIDER_CONF) for b, m in offsets_entries(converted).items()}
    assert classes and set(classes.values()) == {sc.PROVIDERS[target]}, classes

    # (3) the local original is untouched too
    assert tree_digest(local_src) == local_before
