"""Where per-partition scratch files go: the RocksDB build of a target partition and the restored
copy a RocksDB version is read from. Scratch files live for seconds and are deleted after use.

RocksDB syncs every file and directory it creates: about 20 fsync/fdatasync calls per store
partition here (DB creation, MANIFEST, OPTIONS, the ingested table, the checkpoint; counted with
strace on a 64-partition convert). On a disk each sync waits for the device, so the workers
spent about half of a convert blocked (10M keys, 64 partitions: 1.3 of 2 cores busy, 45.6 s);
on a tmpfs a sync returns at once (the same run: 1.9 of 2 cores, 28.1 s). So scratch goes to
``/dev/shm`` when that is a tmpfs with room to spare, and the caller says how many bytes it
will put there. Order of choice:

1. ``STATESHIFT_SCRATCH=DIR``: the user's choice, used as given (an existing directory, else a
   usage error);
2. ``TMPDIR`` when set: the user's choice for temporary files (``tempfile``'s rule);
3. ``/dev/shm`` when it is a tmpfs and, after ``need`` more bytes, both its free space and the
   machine's available memory (``MemAvailable``, proc(5)) stay above :data:`RESERVE`;
4. the system temporary directory.

Nothing here is durable state: target files are written and synced by :mod:`migrate.storage`
in the target location, never here. A folder is named ``<prefix><pid>-<random>``; a process that
is killed cannot remove its folder, and on a tmpfs that folder holds memory until reboot, so
:func:`sweep` (run at the start of every command) removes the folders of processes that no longer
exist, once they are :data:`STALE_AFTER` seconds old. tmpfs pages are memory that no process's RSS shows; the
benchmarks sample them (``benchmarks/measure.py``) so the memory figures include them.
"""

from __future__ import annotations

import os
import re
import shutil
import stat
import tempfile
import time
from collections.abc import Callable

from .errors import UsageError

SHM = "/dev/shm"
#: memory and tmpfs space left untouched when choosing tmpfs for scratch
RESERVE = 2 << 30
ENV = "STATESHIFT_SCRATCH"
#: a dead process's scratch folder is removed only once it has not changed for this long
#: (seconds), far longer than one partition takes: a live process in another PID namespace that
#: shares the folder would look dead from here
STALE_AFTER = 3600
_OURS = re.compile(r"^stateshift-[a-z]+(?:-[a-z]+)*-(\d+)-[A-Za-z0-9_]+$")


def _is_tmpfs(path: str, mounts: str = "/proc/mounts") -> bool:
    """Whether ``path`` is a mount point of a tmpfs (the last mount listed there is the one in
    effect: mounts stack)."""
    kind = None
    try:
        with open(mounts) as f:
            for line in f:
                fields = line.split()
                if len(fields) >= 3 and fields[1] == path:
                    kind = fields[2]
    except OSError:
        return False
    return kind == "tmpfs"


def _mem_available(meminfo: str = "/proc/meminfo") -> int:
    """Bytes of ``MemAvailable`` (0 when unknown: then tmpfs is not chosen)."""
    try:
        with open(meminfo) as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        return 0
    return 0


def _tmpfs_has_room(need: int) -> bool:
    shm = SHM
    if not (os.path.isdir(shm) and os.access(shm, os.W_OK | os.X_OK) and _is_tmpfs(shm)):
        return False
    try:
        st = os.statvfs(shm)
    except OSError:
        return False
    free = st.f_bavail * st.f_frsize
    return free - need >= RESERVE and _mem_available() - need >= RESERVE


def check_choice() -> None:
    """Refuse a ``STATESHIFT_SCRATCH`` that is not an existing directory before anything is written."""
    chosen = os.environ.get(ENV)
    if chosen and not os.path.isdir(chosen):
        raise UsageError(f"{ENV}={chosen} is not an existing directory")


def directory(need: int | None) -> str:
    """The directory to create a scratch folder in for about ``need`` bytes (see the module doc);
    ``None``: the size is not known, so never tmpfs."""
    chosen = os.environ.get(ENV)
    if chosen:
        check_choice()
        return chosen
    if os.environ.get("TMPDIR"):
        return tempfile.gettempdir()
    if need is not None and _tmpfs_has_room(max(need, 0)):
        return SHM
    return tempfile.gettempdir()


def make(prefix: str, need: int | None) -> str:
    """A new scratch folder (the caller removes it) for about ``need`` bytes, named with this
    process's id (see :func:`sweep`)."""
    return tempfile.mkdtemp(prefix=f"{prefix}{os.getpid()}-", dir=directory(need))


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)  # signal 0: only the existence and permission checks (kill(2))
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # exists, another user's
    except (OSError, OverflowError):
        return True  # unknown (or no possible process id): keep the folder
    return True


def sweep(now: float | None = None) -> list[str]:
    """Remove scratch folders left by killed stateshift processes in every place :func:`directory`
    may choose (the user's folder, ``TMPDIR`` or the system temporary directory, ``/dev/shm``):
    folders named by :func:`make`, owned by this user, not symbolic links, whose process no longer
    exists and which have not changed for :data:`STALE_AFTER` seconds. Returns the removed paths.
    Errors are ignored: this is housekeeping, never a reason to stop a command."""
    now = time.time() if now is None else now
    return _remove_ours(lambda pid, st: now - st.st_mtime >= STALE_AFTER and not _alive(pid))


def remove_left_by(pids: set[int]) -> list[str]:
    """Remove the scratch folders of these processes, which the caller saw die (a worker killed
    while it moved a partition cannot remove its own); returns the removed paths. Errors are
    ignored, as in :func:`sweep`."""
    return _remove_ours(lambda pid, st: pid in pids) if pids else []


def _remove_ours(remove: Callable[[int, os.stat_result], bool]) -> list[str]:
    """Remove the folders named by :func:`make` in every place :func:`directory` may choose that
    are directories (not symbolic links) owned by this user, made by another process than this
    one, and for which ``remove(pid, lstat)`` is true."""
    places = {os.environ.get(ENV) or "", tempfile.gettempdir(), SHM} - {""}
    removed = []
    for place in sorted(places):
        try:
            names = os.listdir(place)
        except OSError:
            continue
        for name in names:
            m = _OURS.match(name)
            pid = int(m.group(1)) if m else 0
            if pid in (0, os.getpid()):
                continue
            path = os.path.join(place, name)
            try:
                st = os.lstat(path)  # a symbolic link is not a directory here
            except OSError:
                continue
            if not stat.S_ISDIR(st.st_mode) or st.st_uid != os.getuid() or not remove(pid, st):
                continue
            shutil.rmtree(path, ignore_errors=True)
            removed.append(path)
    return removed
