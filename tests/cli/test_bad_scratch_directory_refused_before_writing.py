"""A ``STATESHIFT_SCRATCH`` that is not a directory is a usage error, refused before anything is
written to the target."""

from __future__ import annotations

from pathlib import Path

from helpers import DEMO, stateshift


def test_a_bad_scratch_directory_is_refused_before_the_target_is_touched(tmp_path: Path):
    target = tmp_path / "dst"
    r = stateshift("convert", str(DEMO / "greenhouse_totals_hdfs"), str(target), "--to", "rocksdb", "--force",
                   env={"STATESHIFT_SCRATCH": str(tmp_path / "missing")})
    assert r.returncode == 2
    assert "STATESHIFT_SCRATCH=" in r.stderr and "is not an existing directory" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert not target.exists()
