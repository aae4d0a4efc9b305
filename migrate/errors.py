"""The one error hierarchy. Only ``cli.py`` turns these into messages and exit codes.

Every error carries a one-line message that names the file (or URL) and what is wrong with it.
"""

from __future__ import annotations

import errno
import os
import re


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


class SystemFailure(StateshiftError):
    """The machine or the storage failed the run, not the input: a file could not be read or
    written (a full disk, a read-only file system, an I/O error, the network, credentials), or a
    worker process was killed. A target is left marked incomplete; fix the cause and rerun (a
    convert or an import with ``--resume``, an export with ``--overwrite``)."""

    exit_code = 8


#: what the errors a full, read-only or failing disk gives mean, in the words of the message
_OS_MEANING = {
    errno.ENOSPC: "no space left on the device",
    errno.EDQUOT: "the disk quota is exhausted",
    errno.EFBIG: "the file is larger than this process may write: a file size limit, see `ulimit -f`",
    errno.EROFS: "the file system is read-only",
    errno.EIO: "the device reported an input/output error",
    errno.EACCES: "access denied by the permissions",
    errno.EPERM: "operation not permitted",
}

#: a folder made by ``migrate.scratch.make``: ``stateshift-<purpose>-<pid>-<random>``
_SCRATCH_FOLDER = re.compile(r"(?:^|/)stateshift-[a-z]+(?:-[a-z]+)*-\d+-[A-Za-z0-9_]+(?:/|$)")


def os_failure(exc: OSError, action: str, where: str | None = None) -> SystemFailure:
    """The one-line :class:`SystemFailure` for an operating-system error met while trying to
    ``action`` (e.g. "write this file"), naming ``where`` (else the error's own file name). A file
    in one of the tool's scratch folders gets the hint where scratch space comes from."""
    where = where or (os.fsdecode(exc.filename) if exc.filename is not None else None)
    code = exc.errno if isinstance(exc.errno, int) else None
    meaning = _OS_MEANING.get(code) if code is not None else None
    detail = meaning or (exc.strerror or str(exc) or type(exc).__name__)
    name = f" ({errno.errorcode[code]})" if code in errno.errorcode else ""
    hint = _FILE_SIZE_HINT if code == errno.EFBIG else scratch_hint(where or "")
    return SystemFailure(f"could not {action}: {detail}{name}{hint}", where)


#: a file past the process's size limit is not a full disk: more room would not help
_FILE_SIZE_HINT = "; a file size limit is set for this process (ulimit -f): raise it or remove it"


#: words of RocksDB's ``IO error`` statuses (the ``strerror`` of the failed call) for a machine
#: that failed, not data that is wrong
_MACHINE_WORDS = ("No space left", "Read-only file system", "quota", "File too large", "Input/output error", "Permission denied")


def library_failure(exc: BaseException, action: str, where: str | None = None) -> SystemFailure | None:
    """The :class:`SystemFailure` for a library error whose text reports the machine failing (a
    RocksDB ``IO error`` status, as rocksdict raises it, for a full, read-only or quota-bound
    disk, a file size limit, a device error or a permission), else None: then the caller's own
    reading of the error stands."""
    text = " ".join(str(exc).split())
    if not (text.startswith("IO error") and any(w in text for w in _MACHINE_WORDS)):
        return None
    hint = _FILE_SIZE_HINT if "File too large" in text else scratch_hint(text)
    return SystemFailure(f"could not {action}: RocksDB: {text}{hint}", where)


def scratch_hint(text: str) -> str:
    """"; ..." naming where scratch space comes from, when ``text`` names a file in a scratch folder."""
    if _SCRATCH_FOLDER.search(text):
        return "; this is a scratch folder: free space there or set STATESHIFT_SCRATCH to a directory with more room"
    return ""
