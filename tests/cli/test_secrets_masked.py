"""A secret given on the command line never appears in any output or in any file the run writes.

Every command (inspect, convert, verify; human and --json output; dry run) runs against the
loopback S3 server with a fake secret passed as ``-o secret=...`` (and a second one as
``--target-storage-option``), plus error cases: a missing key path, an unreachable endpoint, an
endpoint URL with ``user:password@``, credentials written into the s3 URL itself, a bucket that
does not exist as the target, and a malformed option. Then stdout, stderr and the bytes of every
file written (local targets and every object under the s3 targets, unfinished ones included) are
searched for the secret values and the access key id. URLs with user info are shown masked.
"""

from __future__ import annotations

import socket
from pathlib import Path

import pytest
from helpers import DEMO, stateshift

SECRET = "FAKESECRET-0123456789abcdef"
TARGET_SECRET = "FAKETARGETSECRET-fedcba9876543210"
KEY_ID = "AKIAFAKEKEYID0000042"
NEEDLES = (SECRET, TARGET_SECRET, KEY_ID)


def _closed_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _assert_clean(text: str, where: str) -> None:
    for needle in NEEDLES:
        assert needle not in text, f"{where} contains {needle!r}:\n{text[:4000]}"
    # partial leaks (a cut-off secret) count too
    assert SECRET[:16] not in text and TARGET_SECRET[:16] not in text, f"{where} contains part of a secret"


@pytest.fixture(scope="module")
def runs(s3_server, tmp_path_factory):
    """Run every command once; return (label, process) pairs and the places they wrote."""
    s3 = s3_server
    bucket = s3.new_bucket("secrets")
    s3.upload_tree(DEMO / "greenhouse_totals_rocksdb", bucket, "ckpt/src")
    local_out = tmp_path_factory.mktemp("secrets") / "local-target"
    src = f"s3://{bucket}/ckpt/src"
    opts = s3.cli_options(key=KEY_ID, secret=SECRET)
    target_opt = ["--target-storage-option", f"secret={TARGET_SECRET}", "--target-storage-option", f"key={KEY_ID}"]
    dead = f"http://127.0.0.1:{_closed_port()}"
    fast_fail = ["-o", "config_kwargs.retries.max_attempts=1", "-o", "config_kwargs.connect_timeout=2"]
    missing_bucket = f"nobucket-{bucket[-8:]}"

    commands = {
        "inspect": (["inspect", src, *opts], 0),
        "inspect --json --rows": (["inspect", src, "--json", "--rows", *opts], 0),
        "convert s3->s3": (["convert", src, f"s3://{bucket}/ckpt/hdfs", "--to", "hdfs", "-j", "1", *opts, *target_opt], 0),
        "convert --json s3->local": (["convert", src, str(local_out), "--to", "hdfs", "-j", "1", "--json", *opts], 0),
        "convert --dry-run --json": (["convert", src, f"s3://{bucket}/ckpt/plan", "--to", "hdfs", "--dry-run", "--json", *opts], 0),
        "verify": (["verify", src, f"s3://{bucket}/ckpt/hdfs", *opts], 0),
        "verify --json": (["verify", src, str(local_out), "--json", *opts], 0),
        # ---- errors
        "missing key path": (["inspect", f"s3://{bucket}/ckpt/no/such/checkpoint", *opts], 3),
        "missing key path --json": (["verify", src, f"s3://{bucket}/ckpt/nothing-here", "--json", *opts], 3),
        "unreachable endpoint": (
            ["inspect", src, "-o", f"key={KEY_ID}", "-o", f"secret={SECRET}", "-o", f"client_kwargs.endpoint_url={dead}", *fast_fail],
            8,  # the storage failed the run
        ),
        "endpoint with user:password@": (
            ["inspect", src, "-o", f"key={KEY_ID}", "-o", f"secret={SECRET}",
             "-o", f"client_kwargs.endpoint_url=http://{KEY_ID}:{SECRET}@{s3.url.split('://', 1)[1]}", *fast_fail],
            8,
        ),
        "credentials in the s3 URL": (["inspect", f"s3://{KEY_ID}:{SECRET}@{bucket}/ckpt/src", "-o", f"client_kwargs.endpoint_url={s3.url}"], 2),
        "credentials in the target URL": (
            ["convert", src, f"s3://{KEY_ID}:{TARGET_SECRET}@{bucket}/ckpt/x", "--to", "hdfs", *opts],
            2,
        ),
        "target bucket does not exist": (
            ["convert", src, f"s3://{missing_bucket}/ckpt", "--to", "hdfs", "-j", "1", *opts, *target_opt, *fast_fail],
            8,
        ),
    }
    results = []
    for label, (args, expected) in commands.items():
        proc = stateshift(*args)
        results.append((label, expected, proc))
    return {
        "results": results,
        "bucket": bucket,
        "local": Path(local_out),
        "s3_prefixes": ["ckpt/hdfs", "ckpt/plan", "ckpt/x"],
    }


def test_every_command_exits_as_documented(runs):
    for label, expected, proc in runs["results"]:
        assert proc.returncode == expected, f"{label}: exit {proc.returncode}, expected {expected}\n{proc.stdout}\n{proc.stderr}"
        if expected:
            lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
            assert lines and lines[-1].startswith("stateshift: error: "), f"{label}: not one clean error line:\n{proc.stderr}"
            assert "internal error" not in proc.stderr and "Traceback" not in proc.stderr, f"{label}:\n{proc.stderr}"


def test_no_output_contains_a_secret(runs):
    for label, _, proc in runs["results"]:
        _assert_clean(proc.stdout, f"stdout of {label}")
        _assert_clean(proc.stderr, f"stderr of {label}")


def test_urls_with_user_info_are_shown_masked(runs):
    by_label = {label: proc for label, _, proc in runs["results"]}
    for label in ("credentials in the s3 URL", "credentials in the target URL"):
        err = by_label[label].stderr
        assert f"s3://***@{runs['bucket']}/ckpt/" in err, f"{label}: the masked URL is not named:\n{err}"
    assert "storage options" in by_label["credentials in the s3 URL"].stderr
    assert "***@" in by_label["endpoint with user:password@"].stderr or "127.0.0.1" not in by_label["endpoint with user:password@"].stderr


def test_errors_name_the_location(runs):
    by_label = {label: proc for label, _, proc in runs["results"]}
    bucket = runs["bucket"]
    assert f"s3://{bucket}/ckpt/no/such/checkpoint" in by_label["missing key path"].stderr
    assert "does not exist" in by_label["missing key path"].stderr
    assert f"s3://{bucket}/ckpt/src" in by_label["unreachable endpoint"].stderr
    assert "storage request failed" in by_label["unreachable endpoint"].stderr
    assert "nobucket-" in by_label["target bucket does not exist"].stderr


def test_no_written_file_contains_a_secret(runs, s3_server):
    local = runs["local"]
    files = [p for p in local.rglob("*") if p.is_file()]
    assert files, "the local convert wrote nothing"
    for path in files:
        _assert_clean(path.read_bytes().decode("latin-1"), f"written file {path}")
    seen = 0
    for prefix in runs["s3_prefixes"]:
        for key in s3_server.objects(runs["bucket"], prefix):
            _assert_clean(s3_server.read(runs["bucket"], key).decode("latin-1"), f"object {key}")
            seen += 1
    assert seen > 0, "the s3 convert wrote nothing"


def test_a_malformed_option_is_one_clean_error_without_its_text(s3_server):
    proc = stateshift("inspect", "s3://some-bucket/ckpt", "-o", f"key={KEY_ID}", "-o", f"secret{SECRET}")
    _assert_clean(proc.stdout + proc.stderr, "output of a malformed option")
    assert "FAKESE" not in proc.stderr
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.startswith("stateshift: error: ") and "Traceback" not in proc.stderr, proc.stderr
    assert "#2" in proc.stderr and "KEY=VALUE" in proc.stderr
