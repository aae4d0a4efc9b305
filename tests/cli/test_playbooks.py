"""Every ```bash block of every playbook runs, in order, against copies of the demo checkpoints.

Each playbook runs in its own temporary directory holding a copy of ``demo_checkpoints/`` (the
playbooks' default variables point there), with a ``stateshift`` command on PATH that runs this
repository's code. The blocks of one playbook share one ``bash -euo pipefail`` process (later
blocks use the variables set by the first), and a marker after each block shows how far it got:
the test names the first block that did not finish. The demo copies are checked unchanged after
each playbook, since no playbook may write to the checkpoint it starts from.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from helpers import DEMO, REPO, tree_digest

PLAYBOOKS = sorted((REPO / "playbooks").glob("*.md"))
BLOCK = re.compile(r"^```bash[ \t]*\n(.*?)^```[ \t]*$", re.MULTILINE | re.DOTALL)
SECTIONS = ("## When to use it", "## Cautions", "## Pre-checks", "## Verify", "## Roll back")
CAUTIONS = ("stop the query", "backup", "staging", "clock skew", "engine version", "change process")


def bash_blocks(path: Path) -> list[str]:
    return [m.group(1) for m in BLOCK.finditer(path.read_text(encoding="utf-8"))]


def marker(i: int) -> str:
    return f"__stateshift_playbook_block_{i}_done__"


def test_the_three_playbooks_exist():
    names = {p.stem for p in PLAYBOOKS}
    assert {"provider-change-in-a-maintenance-window", "clone-production-to-staging",
            "archive-before-destructive-redeploy"} <= names


@pytest.mark.parametrize("playbook", PLAYBOOKS, ids=[p.stem for p in PLAYBOOKS])
def test_playbook_has_the_required_sections(playbook):
    text = playbook.read_text(encoding="utf-8")
    for heading in SECTIONS:
        assert heading in text, f"{playbook.name}: no '{heading}' section"
    cautions = text.split("## Cautions", 1)[1].split("\n## ", 1)[0].lower()
    for topic in CAUTIONS:
        assert topic in cautions, f"{playbook.name}: the cautions do not mention {topic!r}"
    blocks = bash_blocks(playbook)
    assert len(blocks) >= 3, f"{playbook.name}: expected runnable command blocks"
    first = blocks[0]
    assert re.search(r"^\w+=\$\{\w+:-[^}]+\}", first, re.MULTILINE), "first block must set the placeholders"
    assert "stateshift" in "".join(blocks)


@pytest.mark.parametrize("playbook", PLAYBOOKS, ids=[p.stem for p in PLAYBOOKS])
def test_every_command_block_runs(tmp_path, playbook):
    blocks = bash_blocks(playbook)
    assert blocks
    work = tmp_path / "ops"
    work.mkdir()
    shutil.copytree(DEMO, work / "demo_checkpoints")  # copy2 keeps mtimes (the running-query guard reads them)
    before = tree_digest(work / "demo_checkpoints")

    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    shim = bin_dir / "stateshift"
    shim.write_text(f'#!/bin/sh\nexec "{sys.executable}" -m migrate "$@"\n')
    shim.chmod(0o755)
    env = {k: v for k, v in os.environ.items() if k not in ("SRC", "TO", "WORK", "PROD", "ARCHIVE", "STAGING", "NEW", "BACKUP")}
    env["PATH"] = os.pathsep.join([str(bin_dir), str(Path(sys.executable).parent), "/usr/bin", "/bin"])
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env.get("PYTHONPATH")) if p)

    script = "".join(f"{block}\nprintf '%s\\n' '{marker(i)}'\n" for i, block in enumerate(blocks))
    (tmp_path / "playbook.sh").write_text(script)
    proc = subprocess.run(
        ["bash", "-euo", "pipefail", str(tmp_path / "playbook.sh")],
        cwd=work, env=env, capture_output=True, text=True, timeout=1800, check=False,
    )
    done = [i for i in range(len(blocks)) if marker(i) in proc.stdout]
    failed = next((i for i in range(len(blocks)) if i not in done), None)
    assert proc.returncode == 0 and failed is None, (
        f"{playbook.name}: block {failed} of {len(blocks)} did not finish (exit {proc.returncode}):\n"
        f"{blocks[failed] if failed is not None else ''}\n--- stdout ---\n{proc.stdout[-4000:]}\n"
        f"--- stderr ---\n{proc.stderr[-4000:]}"
    )
    assert tree_digest(work / "demo_checkpoints") == before, f"{playbook.name} changed a demo checkpoint"
