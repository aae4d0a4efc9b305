"""The workers' fork server skips its interpreter's teardown when it stops.

Imported first of every preload list of the fork server (``migrate.workers.preload``), in the
fork server only, this registers an exit handler that flushes the standard streams and ends the process at once (``os._exit``). The
server only forks workers: it holds no file, database or buffer of ours, and its workers end with
``os._exit`` themselves (``multiprocessing.forkserver``), so they never run it. Its teardown of
pyarrow, numpy and rocksdict took 0.13-0.17 s of wall clock, and the command waits for the server
before it ends (``workers.stop``); exit handlers run last in, first out, so those registered after
this one (by the modules preloaded after it) still run first. The server's exit status was never
read (``ForkServer._stop`` waits for it and drops it).

It also ties the server and its workers to the command (Linux): the kernel sends the server
SIGKILL when the command that started it ends, and each worker SIGKILL when the server ends
(``prctl(PR_SET_PDEATHSIG)``). A worker holds the server's "a client is alive" pipe open (CPython
hands it to every process the server forks), so when the command was killed (``kill -9``, the
out-of-memory killer) the server and its workers waited for each other for ever, observed: two
workers blocked reading the task queue, the server in ``epoll_wait``, minutes later. A command
that stops normally stops its server first (``workers.stop``), so this fires only for one that
did not.

Imported anywhere else (a test, a tool that imports every module), it does nothing: the handler is
registered only when the import runs inside ``multiprocessing.forkserver.main``.
"""

from __future__ import annotations

import atexit
import os
import signal
import sys

_SERVER_FILE = os.path.join("multiprocessing", "forkserver.py")


def in_fork_server() -> bool:
    """Whether the caller runs inside ``multiprocessing.forkserver.main``."""
    f = sys._getframe(1)
    while f is not None:
        if f.f_code.co_name == "main" and f.f_code.co_filename.endswith(_SERVER_FILE):
            return True
        f = f.f_back
    return False


def exit_now() -> None:
    """Flush the standard streams and end the process with status 0, without the teardown."""
    for stream in (sys.stdout, sys.stderr):
        try:
            if stream is not None:
                stream.flush()
        except Exception:  # noqa: BLE001 - a closed or broken stream must not keep the server up
            pass
    os._exit(0)


def die_with_parent(parent: int | None = None) -> None:
    """Have the kernel SIGKILL this process when the thread that started it ends (Linux's
    ``prctl(PR_SET_PDEATHSIG)``; nothing elsewhere). With ``parent``, the process that should be
    the parent: one that ended before the setting took hold ends this process now."""
    if not sys.platform.startswith("linux"):
        return
    import ctypes

    try:
        libc = ctypes.CDLL(None, use_errno=True)
        pr_set_pdeathsig = 1  # <linux/prctl.h>
        if libc.prctl(pr_set_pdeathsig, int(signal.SIGKILL), 0, 0, 0) != 0:
            return
    except (OSError, AttributeError):  # no prctl here: the old behaviour stands
        return
    if parent is not None and os.getppid() != parent:
        os._exit(1)


if in_fork_server():
    atexit.register(exit_now)
    die_with_parent()  # the command; one already gone leaves no worker to wait for, and the server ends
    _server = os.getpid()
    os.register_at_fork(after_in_child=lambda: die_with_parent(_server))
