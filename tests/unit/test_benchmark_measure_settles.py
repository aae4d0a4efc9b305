"""benchmarks.measure.run(settle=True) waits for what the child left running (the engine's JVM
outlives its Python driver); without settle it returns when the child itself exits."""

from __future__ import annotations

import os
import sys

from benchmarks import measure

# the child starts a grandchild that sleeps, prints its pid and exits at once
CODE = (
    "import subprocess, sys\n"
    "p = subprocess.Popen([sys.executable, '-c', 'import time; time.sleep(1.0)'])\n"
    "print(p.pid)\n"
)


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


def test_settle_waits_for_the_childs_leftovers() -> None:
    m = measure.run([sys.executable, "-c", CODE], settle=True)
    assert m.returncode == 0
    grandchild = int(m.stdout.strip())
    assert 0.5 < m.settled_s < measure.SETTLE_TIMEOUT
    assert not _alive(grandchild) or open(f"/proc/{grandchild}/stat").read().split()[2] == "Z"


def test_without_settle_nothing_is_waited_for() -> None:
    m = measure.run([sys.executable, "-c", CODE])
    assert m.returncode == 0 and m.settled_s == 0.0
    grandchild = int(m.stdout.strip())
    assert _alive(grandchild)  # still sleeping: run() returned when the child exited
