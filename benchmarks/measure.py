"""Run one command as a child process and measure it: wall time, CPU time, peak memory.

* ``cpu_s``: user + system time of the child and every descendant it waited for (``wait4``);
* ``max_rss_mb``: the largest resident set of any one process of the tree (``ru_maxrss``);
* ``tree_rss_mb``: the largest sum of resident sets over the whole process tree, sampled from
  ``/proc`` every :data:`SAMPLE_INTERVAL` (worker processes of ``--jobs`` run at the same time, so this is what the
  machine must hold). Pages the workers share with the fork server they were forked from (the
  imported libraries) count once per process here;
* ``tree_pss_mb``: the same peak over the proportional set sizes (``Pss`` in
  ``/proc/<pid>/smaps_rollup``: a page shared by n processes counts 1/n in each; a Linux kernel
  fact, see proc(5)), i.e. the memory the tree really occupies;
* ``shm_mb``: the peak growth of the bytes used on ``/dev/shm`` during the run: scratch folders
  the tool puts on that tmpfs (``migrate/scratch.py``) are memory no process's RSS or PSS shows;
* ``tree_pss_shm_mb``: the peak of tree PSS plus that tmpfs growth, sampled together: what the
  run really takes from the machine's memory;
* ``load``: the 1-minute load average before and after (other work on the machine shows here).
"""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import threading
import time
from dataclasses import dataclass


@dataclass(frozen=True)
class Measured:
    argv: tuple[str, ...]
    returncode: int
    wall_s: float
    cpu_s: float
    max_rss_mb: float
    tree_rss_mb: float
    tree_pss_mb: float
    shm_mb: float
    tree_pss_shm_mb: float
    load_before: float
    load_after: float
    stdout: str
    stderr: str
    settled_s: float = 0.0  # seconds the child's process group outlived it (``run(settle=True)``)


def _children() -> dict[int, list[int]]:
    kids: dict[int, list[int]] = {}
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/stat", "rb") as f:
                stat = f.read()
        except OSError:
            continue
        ppid = int(stat[stat.rindex(b")") + 2 :].split()[1])
        kids.setdefault(ppid, []).append(int(name))
    return kids


def _rss_kb(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/statm") as f:
            return int(f.read().split()[1]) * (os.sysconf("SC_PAGE_SIZE") // 1024)
    except OSError:
        return 0


def _pss_kb(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/smaps_rollup") as f:
            for line in f:
                if line.startswith("Pss:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return 0


def _tree(root: int) -> list[int]:
    kids = _children()
    out, todo = [], [root]
    while todo:
        pid = todo.pop()
        out.append(pid)
        todo.extend(kids.get(pid, []))
    return out


def tree_rss_kb(root: int) -> int:
    return sum(_rss_kb(pid) for pid in _tree(root))


def tree_memory_kb(root: int) -> tuple[int, int]:
    """(sum of RSS, sum of PSS) over the process tree below ``root``, in KiB."""
    pids = _tree(root)
    return sum(_rss_kb(p) for p in pids), sum(_pss_kb(p) for p in pids)


def shm_used_kb(path: str = "/dev/shm") -> int:
    """KiB in use on the tmpfs at ``path`` (0 when there is none)."""
    try:
        st = os.statvfs(path)
    except OSError:
        return 0
    return (st.f_blocks - st.f_bfree) * st.f_frsize // 1024


#: seconds between samples of the process tree. Sampling is not free: every sample lists /proc and
#: reads each tool process's smaps_rollup (the kernel walks its page tables), on the same two cores
#: the tool runs on. Measured (convert 10M keys, 64 partitions): every 20 ms made the tool 10-20 %
#: slower in wall clock (30.4 / 29.6 s against 24.6 / 26.9 s at 250 ms) and found the same peaks
#: (tree PSS 535 / 538 MB against 540 / 525 MB); a partition holds its memory for about a second.
SAMPLE_INTERVAL = 0.2


#: the longest wait for what a child left running (see ``settle`` in :func:`run`)
SETTLE_TIMEOUT = 120.0


def _wait_for_group(pgid: int, timeout: float) -> float:
    """Seconds until no process of group ``pgid`` is left (at most ``timeout``; then the rest
    is killed)."""
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < timeout:
        try:
            os.killpg(pgid, 0)
        except ProcessLookupError:
            return time.perf_counter() - t0
        time.sleep(0.1)
    with contextlib.suppress(ProcessLookupError):
        os.killpg(pgid, signal.SIGKILL)
    return time.perf_counter() - t0


def run(
    argv: list[str], env: dict[str, str] | None = None, cwd: str | None = None, interval: float = SAMPLE_INTERVAL,
    settle: bool = False,
) -> Measured:
    """Run ``argv`` to its end, sampling its memory. With ``settle`` the child gets a process
    group of its own, and after it exits this waits until everything it started has exited too
    (``settled_s``): the engine's JVM outlives its Python driver by a few seconds, and a case
    measured while it shuts down runs on a busier machine (observed: the first case after an
    engine run took 41-43 instead of 33-34 CPU s)."""
    out_path = f"/tmp/stateshift-bench-{os.getpid()}-{time.monotonic_ns()}"
    load_before = os.getloadavg()[0]
    try:
        with open(out_path + ".out", "wb") as out, open(out_path + ".err", "wb") as err:
            t0 = time.perf_counter()
            proc = subprocess.Popen(argv, stdout=out, stderr=err, env=env, cwd=cwd, start_new_session=settle)
            peak = [0, 0, 0, 0]  # tree RSS, tree PSS, tmpfs growth, tree PSS + tmpfs growth
            shm_base = shm_used_kb()
            done = threading.Event()

            def sample() -> None:
                while not done.is_set():
                    rss, pss = tree_memory_kb(proc.pid)
                    shm = max(0, shm_used_kb() - shm_base)
                    peak[0], peak[1] = max(peak[0], rss), max(peak[1], pss)
                    peak[2], peak[3] = max(peak[2], shm), max(peak[3], pss + shm)
                    done.wait(interval)

            sampler = threading.Thread(target=sample, daemon=True)
            sampler.start()
            _, status, usage = os.wait4(proc.pid, 0)
            wall = time.perf_counter() - t0
            done.set()
            sampler.join()
            proc.returncode = os.waitstatus_to_exitcode(status)
            settled = _wait_for_group(proc.pid, SETTLE_TIMEOUT) if settle else 0.0
        with open(out_path + ".out", encoding="utf-8", errors="replace") as f:
            stdout = f.read()
        with open(out_path + ".err", encoding="utf-8", errors="replace") as f:
            stderr = f.read()
    finally:  # also when the child cannot start (a wrong --tool-python): no capture files left in /tmp
        for suffix in (".out", ".err"):
            with contextlib.suppress(FileNotFoundError):
                os.remove(out_path + suffix)
    return Measured(
        argv=tuple(argv),
        returncode=proc.returncode,
        wall_s=wall,
        cpu_s=usage.ru_utime + usage.ru_stime,
        max_rss_mb=usage.ru_maxrss / 1024,
        tree_rss_mb=peak[0] / 1024,
        tree_pss_mb=peak[1] / 1024,
        shm_mb=peak[2] / 1024,
        tree_pss_shm_mb=peak[3] / 1024,
        load_before=load_before,
        load_after=os.getloadavg()[0],
        stdout=stdout,
        stderr=stderr,
        settled_s=settled,
    )
