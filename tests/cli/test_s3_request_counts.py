"""Object stores bill per request: inspect, convert and verify list each directory once, never probe.

The loopback S3 server records every request. For an engine-written checkpoint uploaded to a
bucket, each command must:

* send no HEAD request (no per-file existence or size probes: what exists is known from listings);
* list each directory (a key prefix, listed with the ``/`` delimiter) at most once;
* send no more listing requests in total than there are directories involved (source, target and
  the target's parent, which s3fs lists once to tell an absent target from a file);
* write each target object with exactly one PUT (the placeholder ``metadata`` and the resume
  journal are rewritten on purpose), and never write outside the target.
"""

from __future__ import annotations

from collections import Counter

import pytest
from helpers import DEMO, stateshift

DEMOS = {"hdfs": "greenhouse_totals_hdfs", "rocksdb": "greenhouse_totals_rocksdb"}
OTHER = {"hdfs": "rocksdb", "rocksdb": "hdfs"}
REWRITTEN_ON_PURPOSE = {"metadata", "_stateshift/journal.json"}


def _ok(proc):
    assert proc.returncode == 0, f"exit {proc.returncode}\n--- stdout\n{proc.stdout}\n--- stderr\n{proc.stderr}"
    return proc


def _directories(keys, prefix: str) -> set[str]:
    """Every directory (as a listing prefix ``.../``) that holds the objects under ``prefix``."""
    dirs = {f"{prefix}/"}
    for key in keys:
        rel = key[len(prefix) + 1 :].split("/")[:-1]
        for i in range(1, len(rel) + 1):
            dirs.add(f"{prefix}/{'/'.join(rel[:i])}/")
    return dirs


def _check_listing_discipline(s3, reqs, allowed_listings: int, what: str, rechecked: tuple[str, ...] = ()) -> Counter:
    summary = s3.requests.summary(reqs)
    heads = [r for r in reqs if r.method == "HEAD"]
    assert heads == [], f"{what}: existence/size probes sent:\n{summary}"
    by_dir = Counter(r.prefix for r in reqs if r.is_list and r.query.get("delimiter") == ["/"])
    # `rechecked`: directories the running-query guard lists a second time on purpose, once per
    # run, to see whether the query wrote new log entries while stateshift was reading
    twice = {p: n for p, n in by_dir.items() if n > (2 if p in rechecked else 1)}
    assert not twice, f"{what}: directories listed more than once: {twice}\n{summary}"
    listings = sum(1 for r in reqs if r.is_list)
    assert listings <= allowed_listings, f"{what}: {listings} listings for {allowed_listings} directories\n{summary}"
    return by_dir


@pytest.mark.parametrize("source", ["hdfs", "rocksdb"])
def test_inspect_convert_verify_list_each_directory_once_and_never_probe(s3_server, source):
    s3 = s3_server
    bucket = s3.new_bucket("bill")
    s3.upload_tree(DEMO / DEMOS[source], bucket, "q/src")
    src, dst = f"s3://{bucket}/q/src", f"s3://{bucket}/q/dst"
    src_keys = s3.objects(bucket, "q/src")
    src_dirs = _directories(src_keys, "q/src")

    # ---- inspect: only the source, each directory at most once, each object read at most once
    s3.requests.clear()
    _ok(stateshift("inspect", src, *s3.cli_options()))
    reqs = s3.requests.all()
    _check_listing_discipline(s3, reqs, len(src_dirs), "inspect")
    gets = Counter(r.key for r in reqs if r.method == "GET" and r.key)
    assert max(gets.values()) == 1, f"inspect read an object twice: {gets.most_common(3)}"
    assert not [r for r in reqs if r.is_write], "inspect wrote something"
    inspect_counts = (sum(r.is_list for r in reqs), sum(gets.values()))

    # ---- convert s3 -> s3 (one process, so every request is counted here)
    s3.requests.clear()
    _ok(stateshift("convert", src, dst, "--to", OTHER[source], "-j", "1", *s3.cli_options()))
    reqs = s3.requests.all()
    dst_keys = s3.objects(bucket, "q/dst")
    dst_dirs = _directories(dst_keys, "q/dst") | {"q/dst/_stateshift/"}  # the journal, removed at the end
    guard = tuple(p for p in src_dirs if p.endswith(("/offsets/", "/commits/")))
    _check_listing_discipline(s3, reqs, len(src_dirs) + len(dst_dirs) + 1 + len(guard), "convert", rechecked=guard)
    writes = [r for r in reqs if r.is_write]
    outside = [f"{r.method} {r.key}" for r in writes if r.method != "POST" and not r.key.startswith("q/dst/")]
    assert outside == [], f"convert wrote outside the target: {outside}"
    puts = Counter(r.key[len("q/dst/") :] for r in writes if r.method == "PUT")
    assert set(puts) >= {k[len("q/dst/") :] for k in dst_keys}, "an object of the target was not written by a PUT"
    again = {k: n for k, n in puts.items() if n > 1 and k not in REWRITTEN_ON_PURPOSE}
    assert not again, f"objects written more than once: {again}"
    assert s3.objects(bucket, "q/src") == src_keys
    convert_counts = Counter(r.method for r in reqs)
    convert_counts["LIST"] = sum(r.is_list for r in reqs)

    # ---- verify reads both, lists each directory at most once
    s3.requests.clear()
    _ok(stateshift("verify", src, dst, *s3.cli_options()))
    reqs = s3.requests.all()
    _check_listing_discipline(s3, reqs, len(src_dirs) + len(dst_dirs), "verify")
    assert not [r for r in reqs if r.is_write], "verify wrote something"

    print(
        f"\n[{source}] directories src={len(src_dirs)} dst={len(dst_dirs)}; inspect: {inspect_counts[0]} listings, "
        f"{inspect_counts[1]} GETs; convert: {dict(convert_counts)}; verify: {sum(r.is_list for r in reqs)} listings, "
        f"{sum(1 for r in reqs if r.method == 'GET' and r.key)} GETs"
    )
