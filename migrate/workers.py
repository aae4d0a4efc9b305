"""The workers' fork server: what it imports, its start and its stop, and the guess the command line
makes before its own imports. This module imports nothing heavy, so ``cli.main`` can start the
server first thing.

Workers are forked from a fork server: a clean single-threaded process that has the heavy modules
imported (spawned workers each paid about a CPU second importing pyarrow, numpy and rocksdict),
never the command's own process, which may hold threads or an open RocksDB. Its imports take
about half a second of wall clock, and so do the command's own (its parser imports every command
module). Started only once the command had loaded the checkpoint, the server was still importing
when the pool needed it (measured on a 64-partition convert of 1M keys: the pool waited 0.67 s
for it). :func:`likely_parallel` therefore guesses from the command line and the source's
directory layout, before those imports, whether the command will use workers; the command then
decides for certain (``commands.common.start_workers_early``) and stops a server it will not use.
"""

from __future__ import annotations

import math
import os
import threading
from multiprocessing import get_all_start_methods, get_context
from typing import Any

# Imported once by the fork server, so each worker starts as a fork of a process that has them.
# pandas is not ours: pyarrow imports it, when it is installed, on the first ``pa.array`` of a
# list or numpy array (observed: 0.35 CPU s, 53 MB), so the server does that once for all
# workers; the fork server skips a preload module that is not installed.
# The providers and numpy.ma (which numpy imports on first use in a partition) were each worker's
# own imports before (seen in a worker's modules after its first partition; that partition took
# about 0.13 CPU s against 0.06 for the next ones, 64-partition convert of 1M keys).
PRELOAD = [
    "migrate._server_exit",  # first: its exit handler then runs after those of the modules below
    "migrate.commands.convert", "migrate.commands.export", "migrate.commands.import_archive",
    "migrate.providers.hdfs", "migrate.providers.rocksdb", "numpy.ma",
    "pyarrow.compute", "pyarrow.parquet", "rocksdict", "pandas",
]
#: A command's own preload list where it needs less than :data:`PRELOAD`: a convert's workers
#: never read or write Parquet, so its server skips ``pyarrow.parquet`` and the export and import
#: commands (which import it). Measured on 64-partition converts of 1M keys, three series of
#: alternating pairs: the server's imports 0.26 -> 0.22 s, the command 1.89 / 1.94 / 2.09 ->
#: 1.83 / 1.89 / 2.07 CPU s and 1.13 / 1.15 / 1.25 -> 1.09 / 1.12 / 1.20 s (medians;
#: ``benchmarks/results/2026-12-04-ab-convert-preload.md``). Export and import need it all.
#: ``verify``, ``inspect --rows`` and a convert's dry run only read and digest checkpoints.
_READ_AND_MOVE = [
    "migrate._server_exit", "migrate.commands.convert", "migrate.providers.hdfs", "migrate.providers.rocksdb",
    "numpy.ma", "pyarrow.compute", "rocksdict", "pandas",
]
COMMAND_PRELOAD = {"convert": _READ_AND_MOVE, "verify": _READ_AND_MOVE, "inspect": _READ_AND_MOVE}

#: the commands whose store partitions run in workers (``inspect`` only with ``--rows``; a dry
#: run only for ``convert``, whose plan digests every partition)
PARALLEL_COMMANDS = ("convert", "export", "import", "verify", "inspect")
#: a command with at least this many store partitions (or bytes) uses workers
#: (``commands.common.uses_workers`` makes the decision; these are its thresholds)
MIN_TASKS = 8
MIN_BYTES = 16 << 20


#: the thread :func:`stop_soon` left waiting for a stopping server, until :func:`stop` joins it
_stopping: _Stopping | None = None
#: the command whose workers the next fork server serves (:func:`for_command`)
_command: str | None = None


def for_command(name: str | None) -> None:
    """Name the command whose workers the next fork server serves (None: any command), so it
    imports that command's preload list (:data:`COMMAND_PRELOAD`, else :data:`PRELOAD`)."""
    global _command
    _command = name


def preload() -> list[str]:
    """What the next fork server imports (see :func:`for_command`)."""
    return COMMAND_PRELOAD.get(_command or "", PRELOAD)


def context() -> Any:
    """The process start method for workers: the fork server with :func:`preload`, else spawn
    where fork servers do not exist. A server :func:`stop_soon` is stopping has stopped once this
    returns, so a pool made with this context starts a new one rather than sending work to it."""
    _join_stopping()
    if "forkserver" not in get_all_start_methods():
        return get_context("spawn")
    ctx = get_context("forkserver")
    ctx.set_forkserver_preload(preload())
    return ctx


def start() -> None:
    """Launch the fork server now (a no-op if it runs, or where there is none). Returns once the
    server process is launched, not once it has imported :data:`PRELOAD`."""
    if "forkserver" in get_all_start_methods():
        from multiprocessing import forkserver

        context()  # sets the preload list the server starts with
        forkserver.ensure_running()


def stop() -> None:
    """Stop the fork server this process started, if any, and wait for it (its workers' CPU time
    and memory are then accounted to this process, as spawned children's are), and for one
    :func:`stop_soon` is stopping."""
    _join_stopping()
    _stop_now()


def stop_soon() -> None:
    """Stop the fork server this process started, if any, in a thread, and return at once: the
    server's exit (its interpreter's teardown of pyarrow, numpy and rocksdict; measured 0.13-0.17
    s of wall clock after a pool of two workers) overlaps what the command does next. :func:`stop`,
    which the command line calls on every way out, waits for it, so the server is still waited
    for before the command ends."""
    global _stopping
    _join_stopping()
    if running():
        _stopping = _Stopping()
        _stopping.start()


class _Stopping(threading.Thread):
    """:func:`_stop_now` in a thread; an error it meets is raised again by :func:`_join_stopping`,
    in the thread that waits for it, as :func:`stop` would have raised it."""

    def __init__(self) -> None:
        super().__init__(name="stateshift-stop-fork-server")
        self.error: BaseException | None = None

    def run(self) -> None:
        try:
            _stop_now()
        except BaseException as exc:  # noqa: BLE001 - handed to the joining thread
            self.error = exc


def _join_stopping() -> None:
    global _stopping
    if _stopping is not None:
        waiting, _stopping = _stopping, None
        waiting.join()
        if waiting.error is not None:
            raise waiting.error


def _stop_now() -> None:
    from multiprocessing import forkserver

    stop_server = getattr(getattr(forkserver, "_forkserver", None), "_stop", None)  # CPython >= 3.9
    if stop_server is not None:
        stop_server()


def running() -> bool:
    """Whether a fork server this process started is up (one :func:`stop_soon` is stopping is not)."""
    from multiprocessing import forkserver

    return _stopping is None and getattr(getattr(forkserver, "_forkserver", None), "_forkserver_pid", None) is not None


def likely_parallel(argv: list[str]) -> bool:
    """Whether this command line will probably run store partitions in workers: one of
    :data:`PARALLEL_COMMANDS` (not help, not an import's dry run, an inspect only with
    ``--rows``) with more than one job, whose source is remote or a local checkpoint or archive
    with at least :data:`MIN_TASKS` store partitions or :data:`MIN_BYTES` of state. Every argument
    that names a local directory is looked at (no option table needed: a value such as
    ``rocksdb`` or ``KEY=VALUE`` is no directory); a wrong guess costs a server started and
    stopped again, or one started later."""
    if not argv or argv[0] not in PARALLEL_COMMANDS:
        return False
    if any(a in ("-h", "--help") for a in argv[1:]):
        return False
    if "--dry-run" in argv[1:] and argv[0] != "convert":
        return False
    if argv[0] == "inspect" and "--rows" not in argv[1:]:
        return False
    if _jobs(argv[1:]) <= 1:
        return False
    for arg in argv[1:]:
        if arg.startswith("-"):
            continue
        if "://" in arg and not arg.startswith("file://"):
            return True
        path = arg[len("file://"):] if arg.startswith("file://") else arg
        if os.path.isdir(path) and _looks_big(path):
            return True
    return False


CGROUP_ROOT = "/sys/fs/cgroup"


def default_jobs() -> int:
    """The ``--jobs`` default: the CPUs this process may run on (its affinity mask, which a
    cpuset or ``taskset`` narrows), no more than its cgroup's CPU quota allows, rounded up (a
    container started with ``--cpus 2`` on a 64-core host sees 64 cores in ``os.cpu_count()``,
    and 64 workers each holding a partition would overrun its memory)."""
    try:
        cpus = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # not on Linux
        cpus = os.cpu_count() or 1
    quota = cgroup_cpu_quota()
    if quota is not None:
        cpus = min(cpus, max(1, math.ceil(quota)))
    return max(1, cpus)


def cgroup_cpu_quota(root: str = CGROUP_ROOT, own: str = "/proc/self/cgroup") -> float | None:
    """CPUs' worth of time this process's cgroups let it use per period (None: no quota, or no
    cgroup file to say): the smallest quota on the way from its own cgroup (``/proc/self/cgroup``)
    up to the root (a parent's quota binds its children; a container usually sees its own cgroup
    as the root), in cgroup v2's ``cpu.max`` ("<quota> <period>", "max <period>" for none), else
    in v1's ``cpu.cfs_quota_us`` / ``cpu.cfs_period_us`` (-1 for none)."""
    v2 = v1 = "/"
    try:
        with open(own) as f:
            for line in f:
                hierarchy, _, rest = line.strip().partition(":")
                controllers, _, path = rest.partition(":")
                if hierarchy == "0" and controllers == "":
                    v2 = path or "/"
                elif "cpu" in controllers.split(","):
                    v1 = path or "/"
    except OSError:
        pass
    found = False
    quotas: list[float] = []
    for folder in _up_to_root(v2):
        text = _read_text(os.path.join(root, folder, "cpu.max"))
        if text:
            found = True
            quota, _, period = text.partition(" ")
            ratio = None if quota == "max" else _ratio(quota, period)
            if ratio is not None:
                quotas.append(ratio)
    if not found:
        for folder in _up_to_root(v1):
            base = os.path.join(root, "cpu", folder)
            quota = _read_text(os.path.join(base, "cpu.cfs_quota_us"))
            if quota and quota != "-1":
                ratio = _ratio(quota, _read_text(os.path.join(base, "cpu.cfs_period_us")) or "")
                if ratio is not None:
                    quotas.append(ratio)
    return min(quotas) if quotas else None


def _up_to_root(path: str) -> list[str]:
    """``a/b/c``, ``a/b``, ``a``, ``""`` for the cgroup path ``/a/b/c``."""
    parts = [p for p in path.split("/") if p]
    return ["/".join(parts[:i]) for i in range(len(parts), -1, -1)]


def _read_text(path: str) -> str | None:
    try:
        with open(path) as f:
            return f.read().strip()
    except OSError:
        return None


def _ratio(quota: str, period: str) -> float | None:
    try:
        q, p = int(quota), int(period)
    except ValueError:
        return None
    return q / p if q > 0 and p > 0 else None


def _jobs(args: list[str]) -> int:
    jobs = default_jobs()  # the --jobs default (commands.common.add_jobs_argument)
    for i, a in enumerate(args):
        value = None
        if a in ("-j", "--jobs") and i + 1 < len(args):
            value = args[i + 1]
        elif a.startswith("--jobs="):
            value = a[len("--jobs="):]
        elif a.startswith("-j") and len(a) > 2:
            value = a[2:]
        if value is not None:
            try:
                jobs = int(value)
            except ValueError:
                return 1  # argparse will refuse it
    return jobs


def _looks_big(root: str) -> bool:
    """At least MIN_TASKS store partitions (``state/<operator>/<partition>`` of a checkpoint,
    ``state/operator=*/store=*/partition=*`` of an archive) or MIN_BYTES of files in them."""
    partitions = _partition_dirs(root)
    if len(partitions) >= MIN_TASKS:
        return True
    total = 0
    for folder in partitions:
        for dirpath, _, names in os.walk(folder):
            for name in names:
                try:
                    total += os.path.getsize(os.path.join(dirpath, name))
                except OSError:
                    pass
                if total >= MIN_BYTES:
                    return True
    return False


def _partition_dirs(root: str) -> list[str]:
    operators = _subdirs(os.path.join(root, "state"))
    archive = any(e.name.startswith("operator=") for e in operators)  # else a checkpoint's operator ids
    level = [e.path for e in operators]
    for _ in range(2 if archive else 1):  # store=*/partition=* of an archive, <partition> of a checkpoint
        level = [e.path for d in level for e in _subdirs(d)]
    return level


def _subdirs(folder: str) -> list[os.DirEntry]:
    try:
        with os.scandir(folder) as entries:
            return [e for e in entries if e.is_dir(follow_symlinks=False) and not e.name.startswith((".", "_"))]
    except OSError:
        return []
