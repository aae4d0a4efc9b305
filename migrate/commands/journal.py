"""The resume journal a convert or import keeps in an unfinished target (``_stateshift/journal.json``).

It records who the target is being built from (identity) and, per finished store partition, the
source digest and the files written. ``--resume`` trusts nothing in it blindly: each recorded
partition is read back from the target and its digest compared with the recorded source digest
before it is skipped. The journal is deleted once the target is published.
"""

from __future__ import annotations

import json
from typing import Any

from ..checkpoint.model import INCOMPLETE_PREFIX, JOURNAL_DIR
from ..errors import CorruptInput, UnsafeTarget
from ..storage import Location

JOURNAL = f"{JOURNAL_DIR}/journal.json"


def key(operator_id: int, store: str, partition: int) -> str:
    return f"{operator_id}/{store}/{partition}"


def start(dst: Location, identity: dict[str, Any]) -> dict[str, Any]:
    journal = {"identity": identity, "partitions": {}}
    save(dst, journal)
    return journal


def save(dst: Location, journal: dict[str, Any]) -> None:
    dst.write_bytes(JOURNAL, json.dumps(journal, indent=1, sort_keys=True).encode())


def resume(dst: Location, identity: dict[str, Any]) -> dict[str, Any]:
    """The journal of an interrupted run into ``dst`` for the same source, or an error."""
    root = dst.list_dir("")
    if "metadata" not in root:
        raise UnsafeTarget("--resume needs a target left by an interrupted stateshift run; this one has no metadata", dst.display)
    if not dst.read_bytes("metadata").decode("utf-8", "replace").startswith(INCOMPLETE_PREFIX):
        raise UnsafeTarget("--resume refused: the target is a finished checkpoint, not an interrupted run", dst.display)
    if JOURNAL_DIR not in root:
        raise UnsafeTarget("--resume refused: the target has no stateshift journal; delete it and start again", dst.display)
    where = dst.describe(JOURNAL)
    try:
        journal = json.loads(dst.read_bytes(JOURNAL))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise CorruptInput(f"resume journal is not valid JSON ({exc})", where) from exc
    if not isinstance(journal, dict) or journal.get("identity") != identity:
        raise UnsafeTarget(
            "--resume refused: the interrupted run into this target was for a different source, batch or provider", where
        )
    journal.setdefault("partitions", {})
    return journal


def finish(dst: Location) -> None:
    dst.remove(JOURNAL_DIR, recursive=True)
