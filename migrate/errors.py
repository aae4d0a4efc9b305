"""The one error hierarchy. Only ``cli.py`` turns these into messages and exit codes.

Every error carries a one-line message that names the file (or URL) and what is wrong with it.
"""

from __future__ import annotations


class StateshiftError(Exception):
    """Base class. ``exit_code`` is the documented process exit status for this kind of error."""

    exit_code = 1

    def __init__(self, message: str, path: str | None = None) -> None:
        self.path = path
        text = f"{path}: {message}" if path else message
        super().__init__(" ".join(text.split()))  # always one line


class UsageError(StateshiftError):
    """The command line itself is wrong (bad option value, missing argument)."""

    exit_code = 2


class CorruptInput(StateshiftError):
    """A source file is missing, truncated, fails a checksum or does not parse."""

    exit_code = 3


class IncompleteCheckpoint(CorruptInput):
    """The directory is a stateshift target whose conversion or import did not finish."""


class Unsupported(StateshiftError):
    """The input is valid but uses something this version cannot handle safely."""

    exit_code = 4


class VerificationFailed(StateshiftError):
    """What was written (or a second checkpoint) does not match the source digests."""

    exit_code = 5


class UnsafeTarget(StateshiftError):
    """The target is refused: non-empty, inside the source, equal to the source, ..."""

    exit_code = 6


class QueryMayBeRunning(StateshiftError):
    """The source looks like a query is still writing to it."""

    exit_code = 7
