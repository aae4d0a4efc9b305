"""Deterministic crash points for the crash-safety tests (inactive unless the variable is set).

``STATESHIFT_CRASH_AT=<event>:<n>`` makes the process SIGKILL itself the n-th time it reaches
``<event>`` (events: ``partition-written``, ``file-written``, ``mid-file``, ``before-logs``,
``before-metadata``, and ``worker-task``: a worker process starting a store partition, counted
per worker). ``<event>:<n>:stall`` makes it sleep there instead (for an hour), for tests that
signal a command while its workers are busy. Nothing happens when the variable is unset. This is
how the tests prove that a process killed at any of these points leaves no usable-looking target
and that ``--resume`` finishes the job.
"""

from __future__ import annotations

import os
import signal
import time

_ENV = "STATESHIFT_CRASH_AT"
_counts: dict[str, int] = {}  # per-process event counts; only touched when the variable is set


def reached(event: str) -> None:
    spec = os.environ.get(_ENV)
    if not spec:
        return
    name, _, rest = spec.partition(":")
    if name != event:
        return
    nth, _, action = rest.partition(":")
    _counts[event] = _counts.get(event, 0) + 1
    if _counts[event] == int(nth or 1):
        if action == "stall":
            time.sleep(3600)
        else:
            os.kill(os.getpid(), signal.SIGKILL)
