"""The workers' fork server skips its interpreter's teardown when it stops.

Imported first of every preload list of the fork server (``migrate.workers.preload``), in the
fork server only, this registers an exit handler that flushes the standard streams and ends the process at once (``os._exit``). The
server only forks workers: it holds no file, database or buffer of ours, and its workers end with
``os._exit`` themselves (``multiprocessing.forkserver``), so they never run it. Its teardown of
pyarrow, numpy and rocksdict took 0.13-0.17 s of wall clock, and the command waits for the server
before it ends (``workers.stop``); exit handlers run last in, first out, so those registered after
this one (by the modules preloaded after it) still run first. The server's exit status was never
read (``ForkServer._stop`` waits for it and drops it).

Imported anywhere else (a test, a tool that imports every module), it does nothing: the handler is
registered only when the import runs inside ``multiprocessing.forkserver.main``.
"""

from __future__ import annotations

import atexit
import os
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


if in_fork_server():
    atexit.register(exit_now)
