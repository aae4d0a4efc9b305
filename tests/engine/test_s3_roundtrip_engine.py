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

import hashlib
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
import scenarios as sc

REPO = Path(__file__).resolve().parents[2]
OTHER = {"hdfs": "rocksdb", "rocksdb": "hdfs"}
FIRST_RUN_FILES = 3
TOTAL_FILES = 5


def _cli(*args: str) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env.get("PYTHONPATH")) if p)
    proc = subprocess.run(
        [sys.executable, "-m", "migrate", *args], cwd=REPO, env=env, capture_output=True, text=True, timeout=600, check=False
    )
    assert proc.returncode == 0, f"{args[:3]} exited {proc.returncode}\n--- stdout\n{proc.stdout}\n--- stderr\n{proc.stderr}"
    return proc


def _tree_digest(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(root.rglob("*")) if p.is_file()}


def _offsets_provider_classes(checkpoint: Path) -> dict[int, str | None]:
    out = {}
    for path in (checkpoint / "offsets").iterdir():
        if path.name.isdigit():
            out[int(path.name)] = json.loads(path.read_text().splitlines()[1])["conf"].get(sc.PROVIDER_CONF)
    return out


def _store_dirs(checkpoint: Path) -> list[Path]:
    state = checkpoint / "state"
    return sorted(part for op in state.iterdir() if op.name.isdigit() for part in op.iterdir() if part.name.isdigit())


def _assert_versions_written_by(checkpoint: Path, provider: str, versions: range) -> None:
    stores = _store_dirs(checkpoint)
    assert stores, f"{checkpoint}: no state/<op>/<partition> directories"
    for store in stores:
        names = {p.name for p in store.iterdir() if p.is_file()}
        for v in versions:
            # observed engine names: "<v>.zip" (RocksDB) and "<v>.delta" (heap map)
            has_zip = any(re.fullmatch(rf"{v}(_[0-9a-f-]+)?\.zip", n) for n in names)
            has_delta = f"{v}.delta" in names
            if provider == "rocksdb":
                assert has_zip and not has_delta, f"{store}: version {v} not written by RocksDB ({sorted(names)})"
            else:
                assert has_delta and not has_zip, f"{store}: version {v} not written by the heap map ({sorted(names)})"


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
    local_before = _tree_digest(local_src)
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
    _assert_versions_written_by(converted, target, new_versions)
    _assert_versions_written_by(control, source, new_versions)  # the harness itself
    classes = _offsets_provider_classes(converted)
    assert classes and set(classes.values()) == {sc.PROVIDERS[target]}, classes

    # (3) the local original is untouched too
    assert _tree_digest(local_src) == local_before
