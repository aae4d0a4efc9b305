"""The state schema files a checkpoint carries, found and parsed once so a bad one stops the run.

The files travel verbatim, but a schema file that does not parse means the checkpoint is damaged
(or written by an engine we do not know), and moving state we cannot describe is refused.
"""

from __future__ import annotations

from ..rows.schema import StateSchema, parse_state_schema_file
from .files import CopyFile
from .model import Checkpoint


def schema_files(files: list[CopyFile]) -> list[str]:
    """Relative paths of state schema files among the verbatim files."""
    out = []
    for f in files:
        parts = f.rel.split("/")
        if parts[0] != "state" or parts[-1].startswith("."):
            continue
        if (len(parts) >= 3 and parts[-2] == "_metadata" and parts[-1] == "schema") or "_stateSchema" in parts:
            out.append(f.rel)
    return out


def check_schemas(ckpt: Checkpoint, files: list[CopyFile]) -> dict[str, list[StateSchema]]:
    """Parse every schema file; CorruptInput / Unsupported name the file that is wrong."""
    loc = ckpt.location
    return {rel: parse_state_schema_file(loc.read_bytes(rel), loc.describe(rel)) for rel in schema_files(files)}
