"""The command line fixes glibc's malloc thresholds (``cli.keep_freed_memory``) before the fork
server starts, unless the user's environment sets them: glibc reads the variables when a process
starts (mallopt(3)), so the fork server and its workers get them, and ``mallopt`` sets them in the
command's own process.

Checked by what glibc does, not only by the variables: a 24 MiB request below the fixed 32 MiB
threshold comes from the heap (its address lies in ``[heap]`` of ``/proc/self/maps``), where
glibc's default threshold (128 KiB at start, common practice: mallopt(3)) maps it on its own.
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from migrate import cli

def _glibc() -> bool:
    try:
        return bool(os.confstr("CS_GNU_LIBC_VERSION"))
    except (AttributeError, ValueError, OSError):  # no confstr, or no such name here
        return False


glibc_only = pytest.mark.skipif(not (_glibc() and os.path.exists("/proc/self/maps")), reason="glibc and /proc only")

IN_HEAP = """
def in_heap():
    import ctypes

    block = bytearray(24 << 20)
    at = ctypes.addressof(ctypes.c_char.from_buffer(block))
    with open("/proc/self/maps") as f:
        for line in f:
            if line.rstrip().endswith("[heap]"):
                start, end = (int(x, 16) for x in line.split()[0].split("-"))
                return start <= at < end
    return False
"""


def python(code: str, *args: str) -> str:
    """Run ``code`` in a fresh interpreter whose environment sets no malloc variable."""
    environ = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_") and k != "GLIBC_TUNABLES"}
    done = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True, env=environ, timeout=300)
    assert done.returncode == 0, done.stderr
    return done.stdout.strip()


def test_the_default_and_the_users_choice() -> None:
    environ: dict[str, str] = {}
    assert cli.keep_freed_memory(environ, this_process=False)
    assert environ == {"MALLOC_MMAP_THRESHOLD_": str(32 << 20), "MALLOC_TRIM_THRESHOLD_": str(1 << 30)}
    for users in ({"MALLOC_TRIM_THRESHOLD_": "0"}, {"MALLOC_MMAP_THRESHOLD_": "65536"},
                  {"GLIBC_TUNABLES": "glibc.malloc.trim_threshold=0"}):
        environ = dict(users)
        assert not cli.keep_freed_memory(environ, this_process=False)
        assert environ == users
    environ = {"GLIBC_TUNABLES": "glibc.rtld.optional_static_tls=512"}  # no malloc tunable: ours are added
    assert cli.keep_freed_memory(environ, this_process=False)
    assert environ["MALLOC_MMAP_THRESHOLD_"] == str(32 << 20)


@glibc_only
def test_glibc_serves_the_command_and_its_workers_from_the_heap() -> None:
    script = (
        # the worker runs the probe from a module of its own (a `-c` script's functions do not travel)
        f"PROBE = {IN_HEAP!r}\n"
        "import os, sys, tempfile\n"
        "folder = tempfile.mkdtemp()\n"
        "with open(os.path.join(folder, '_probe.py'), 'w') as f:\n"
        "    f.write(PROBE)\n"
        "sys.path.insert(0, folder)\n"
        "import _probe\n"
        "from concurrent.futures import ProcessPoolExecutor\n"
        "from migrate import cli, workers\n"
        "if sys.argv[1] == 'set':\n"
        "    cli.keep_freed_memory()\n"
        "here = _probe.in_heap()\n"
        "workers.start()\n"
        "with ProcessPoolExecutor(1, mp_context=workers.context()) as pool:\n"
        "    there = pool.submit(_probe.in_heap).result(timeout=120)\n"
        "workers.stop()\n"
        "print(here, there)\n"
    )
    assert python(script, "set") == "True True"  # the command by mallopt, the worker by the variables
    assert python(script, "unset") == "False False"  # the control: glibc maps the block on its own


def test_main_sets_them(monkeypatch: pytest.MonkeyPatch) -> None:
    for name in ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_", "GLIBC_TUNABLES"):
        monkeypatch.setenv(name, "placeholder")  # so the teardown restores what was there
        monkeypatch.delenv(name)
    try:
        cli.main(["--version"])
    except SystemExit:
        pass
    assert os.environ.get("MALLOC_MMAP_THRESHOLD_") == str(32 << 20)
    assert os.environ.get("MALLOC_TRIM_THRESHOLD_") == str(1 << 30)


GIVEN_BACK = """
import os, sys
from migrate import cli
if sys.argv[1] == "set":
    cli.keep_freed_memory()
page = os.sysconf("SC_PAGE_SIZE")
fd = os.open("/proc/self/statm", os.O_RDONLY)  # opened first: reading it later allocates nothing on the heap
def rss():
    return int(os.pread(fd, 100, 0).split()[1]) * page
blocks = [bytearray(24 << 20) for _ in range(12)]  # 288 MiB from the heap, every page touched
high = rss()
blocks.clear()
print((high - rss()) >> 20)
"""


@glibc_only
def test_freed_memory_is_kept_for_the_next_partition() -> None:
    """288 MiB freed at the top of the heap stay with the process under the tool's trim threshold
    (1 GiB); under the 64 MiB it had before, all but 64 MiB went back to the kernel, to be faulted
    in again by the next partition (the wide-row benchmark's partitions free more than 64 MiB)."""
    assert int(python(GIVEN_BACK, "set")) < 16
    old = {"MALLOC_MMAP_THRESHOLD_": str(32 << 20), "MALLOC_TRIM_THRESHOLD_": str(64 << 20)}
    environ = {**{k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}, **old}
    done = subprocess.run([sys.executable, "-c", GIVEN_BACK, "unset"], capture_output=True, text=True, env=environ, timeout=300)
    assert done.returncode == 0, done.stderr
    assert int(done.stdout) > 200
