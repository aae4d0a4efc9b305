"""Shared helpers for the command-line tests: run the tool as a user would, snapshot trees.

``stateshift(...)`` runs the command line in this process (``migrate.cli.main`` with its own
stdout, stderr and environment) because a fresh interpreter per call dominated the suite's run
time. Calls that must be real processes (a crash point that SIGKILLs the process) still get one.
"""

from __future__ import annotations

import contextlib
import hashlib
import io
import os
import shutil
import subprocess
import sys
import tempfile
import warnings
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
DEMO = REPO / "demo_checkpoints"


@contextlib.contextmanager
def _environment(env: dict[str, str]):
    saved = dict(os.environ)
    os.environ.update(env)
    os.environ.pop("STATESHIFT_CRASH_AT", None) if "STATESHIFT_CRASH_AT" not in env else None
    cwd = os.getcwd()
    os.chdir(REPO)
    try:
        yield
    finally:
        os.chdir(cwd)
        os.environ.clear()
        os.environ.update(saved)


def stateshift(*args: str, env: dict[str, str] | None = None, timeout: float = 300) -> subprocess.CompletedProcess:
    env = dict(env or {})
    if "STATESHIFT_CRASH_AT" in env or os.environ.get("STATESHIFT_TEST_SUBPROCESS") == "1":
        full_env = {**os.environ, **env}
        if "STATESHIFT_CRASH_AT" not in env:
            full_env.pop("STATESHIFT_CRASH_AT", None)
        # a killed run cannot remove its scratch folder: give it one of ours (not /dev/shm) and remove it
        scratch = None if "STATESHIFT_SCRATCH" in env else tempfile.mkdtemp(prefix="stateshift-test-scratch-")
        if scratch:
            full_env["STATESHIFT_SCRATCH"] = scratch
        try:
            return subprocess.run(
                [sys.executable, "-m", "migrate", *args], capture_output=True, text=True, env=full_env, timeout=timeout, cwd=REPO
            )
        finally:
            if scratch:
                shutil.rmtree(scratch, ignore_errors=True)
    from migrate.cli import main

    out, err = io.StringIO(), io.StringIO()
    with _environment(env), contextlib.redirect_stdout(out), contextlib.redirect_stderr(err), warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.showwarning = lambda message, category, *_a, **_k: print(f"{category.__name__}: {message}", file=sys.stderr)
        code = main(list(args))
    return subprocess.CompletedProcess(["stateshift", *args], code, out.getvalue(), err.getvalue())


def tree_digest(root: Path) -> dict[str, str]:
    """Relative path -> SHA-256 of every file under root (crc sidecars included)."""
    out = {}
    for p in sorted(root.rglob("*")):
        if p.is_file():
            out[str(p.relative_to(root))] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def demo_copy(name: str, tmp: Path) -> Path:
    """A private copy of one bundled demo checkpoint."""
    dst = tmp / name
    shutil.copytree(DEMO / name, dst)
    return dst
