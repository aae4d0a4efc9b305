"""Shared helpers for the command-line tests: run the tool as a user would, snapshot trees."""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
DEMO = REPO / "demo_checkpoints"


def stateshift(*args: str, env: dict[str, str] | None = None, timeout: float = 300) -> subprocess.CompletedProcess:
    full_env = {**os.environ, **(env or {})}
    full_env.pop("STATESHIFT_CRASH_AT", None) if env is None or "STATESHIFT_CRASH_AT" not in env else None
    return subprocess.run(
        [sys.executable, "-m", "migrate", *args],
        capture_output=True,
        text=True,
        env=full_env,
        timeout=timeout,
        cwd=REPO,
    )


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
