"""Command line: argument parsing, progress bars, exit codes, human and JSON output.

Exit codes (documented in the README):

  0  success (verify: identical)
  1  unexpected internal error
  2  usage error
  3  corrupt or inconsistent input (the message names the file)
  4  unsupported input (valid, but not something this version can move safely)
  5  verification failed (read-back mismatch, or verify found differences)
  6  unsafe target refused (not empty, inside the source, the source itself)
  7  the source looks like a running query
  8  the machine or the storage failed the run (a full or read-only disk, an I/O or network error,
     access denied, a worker process killed); a target is left marked incomplete
  130 interrupted (Ctrl-C)
  143 terminated (SIGTERM)
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
from collections.abc import MutableMapping
from typing import Any

# tqdm and .storage (fsspec) are imported where they are used, not here: ``main`` starts the
# workers' fork server first, and these imports took 0.17 s of the 0.26 s before it could
# (measured with ``python -X importtime``).
from . import __version__, workers
from .errors import StateshiftError, SystemFailure, os_failure


def _parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument(
        "--storage-option", "-o", action="append", default=[], metavar="KEY=VALUE",
        help="filesystem option for every location (repeatable; a.b=c nests)",
    )
    common.add_argument("--quiet", "-q", action="store_true", help="no progress bars, only errors and the result")
    common.add_argument("--json", action="store_true", help="print the result as one JSON document on stdout")

    p = argparse.ArgumentParser(
        prog="stateshift",
        description="Move the state of a stopped streaming query between state-store providers, offline.",
    )
    p.add_argument("--version", action="version", version=f"stateshift {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    for module in _command_modules():
        module.add_parser(sub, common)
    return p


class _Progress:
    def __init__(self, enabled: bool, unit: str = "partition") -> None:
        self.enabled = enabled
        self.unit = unit
        self.bar: Any = None
        self.rows = 0

    def start(self, total: int) -> None:
        if self.enabled:
            from tqdm import tqdm

            self.bar = tqdm(total=total, unit=self.unit, file=sys.stderr, dynamic_ncols=True, leave=False)

    def step(self, result: Any = None) -> None:
        if result is not None and hasattr(result, "moved_rows"):
            self.rows += result.moved_rows
        if self.bar is not None:
            self.bar.update(1)
            self.bar.set_postfix(rows=self.rows, refresh=False)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _emit(args: argparse.Namespace, payload: dict[str, Any], text: str) -> None:
    if args.json:
        print(json.dumps(payload, indent=2, sort_keys=False))
    else:
        print(text)


def _command_modules() -> list[Any]:
    """Each command module has ``add_parser(subparsers, common)`` and ``run(args, ctx) -> int``."""
    from .commands import convert, inspect, verify

    modules = [convert, inspect, verify]
    try:  # the archive commands (export / import) register themselves when present
        from .commands import export, import_archive

        modules += [export, import_archive]
    except ImportError:
        pass
    return modules


class RunContext:
    """What a command's ``run`` gets besides its arguments: storage options, progress, output."""

    def __init__(self, args: argparse.Namespace) -> None:
        from .storage import parse_storage_options

        self.args = args
        self.options = parse_storage_options(args.storage_option)
        self.progress = _Progress(enabled=not args.quiet and not args.json and sys.stderr.isatty())

    def open(self, url: str, readonly: bool = True, extra: list[str] | None = None) -> Any:
        from .storage import open_location, parse_storage_options

        options = {**self.options, **parse_storage_options(extra or [])}
        return open_location(url, options, readonly=readonly)

    def emit(self, payload: dict[str, Any], text: str) -> None:
        _emit(self.args, payload, text)


def _run(args: argparse.Namespace) -> int:
    ctx = RunContext(args)
    try:
        from .scratch import check_choice, sweep

        check_choice()  # a bad STATESHIFT_SCRATCH stops the command before it writes anything
        sweep()  # scratch folders of killed runs (on a tmpfs they hold memory until reboot)
        return int(args.run(args, ctx))
    finally:
        ctx.progress.close()


#: Arrow's memory pool for the tool's processes, unless the user's environment names one
ARROW_POOL = "system"


def prefer_arrow_pool(environ: MutableMapping[str, str] = os.environ) -> None:
    """Name :data:`ARROW_POOL` in ``ARROW_DEFAULT_MEMORY_POOL`` unless it is set already. Arrow reads
    that variable once, when pyarrow is imported, so this runs before any import of pyarrow, and
    the fork server and its workers inherit it. Arrow's own default, mimalloc, keeps the memory a
    store partition freed for the next one. Measured at 10M keys over 64 partitions, alternating
    pairs of whole commands with --jobs 2 (``benchmarks/results/2026-12-03-ab-arrow-pool.md``):
    the process tree's PSS 343-349 -> 295-296 MB (convert heap map -> RocksDB) and 374-389 ->
    302-316 MB (export), the largest process 176-181 -> 132-144 MB; the convert's CPU within the
    noise (2 % more in an in-process A/B of its stages), export about 6 % more CPU (17.5 / 17.7 ->
    18.6 / 18.7 s). Our buffers are few and large; the C library's allocator hands freed ones back."""
    environ.setdefault("ARROW_DEFAULT_MEMORY_POOL", ARROW_POOL)


#: OpenBLAS threads for the tool's processes, unless the user's environment names a count
BLAS_THREADS = "1"


def no_blas_pool(environ: MutableMapping[str, str] = os.environ) -> None:
    """Name :data:`BLAS_THREADS` in ``OPENBLAS_NUM_THREADS`` unless it is set already. numpy, which
    the tool and pyarrow import, starts OpenBLAS's thread pool on import (one thread per core beyond
    the first), and that thread spins before it sleeps. The tool makes no BLAS call. Observed with
    this project's numpy wheel on 2 cores: ``import numpy`` and a one-second sleep cost 0.29-0.33
    user CPU s, 0.18-0.20 with the variable at 1; in a 64-partition convert the spinning threads of
    the command and of the fork server took 4.5 % of all CPU samples (``perf``), while both
    processes were starting and competing for the cores. Read when numpy is imported, so this runs
    before that, and the fork server inherits it."""
    environ.setdefault("OPENBLAS_NUM_THREADS", BLAS_THREADS)


#: glibc's malloc thresholds for the tool's processes (bytes), unless the user's environment sets
#: any: requests below MMAP come from the heap, and the heap keeps up to TRIM of free memory at its
#: top instead of handing it back to the kernel
MALLOC_MMAP_THRESHOLD = 32 << 20
MALLOC_TRIM_THRESHOLD = 1 << 30
_MALLOC_VARIABLES = ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_")


def keep_freed_memory(environ: MutableMapping[str, str] = os.environ, this_process: bool = True) -> bool:
    """Fixed glibc malloc thresholds (:data:`MALLOC_MMAP_THRESHOLD`, :data:`MALLOC_TRIM_THRESHOLD`)
    in ``environ``, which glibc reads when a process starts (the fork server, whose workers inherit
    them; mallopt(3) documents the variables), and, with ``this_process``, by ``mallopt`` for this
    already running process. Unless the environment sets either variable or a glibc malloc tunable
    (``GLIBC_TUNABLES``): the user's choice stands. Returns whether it set them.

    glibc's own thresholds move with the blocks it sees freed, and a store partition's decompressed
    files and record arrays (tens of MB at 10M keys) went back to the kernel after each partition:
    the next one touched fresh pages, each a page fault (here about 1.5 us of system time for 4
    KiB). Measured at 10M keys over 64 partitions, two runs each, alternating: 0.54-0.63M -> 0.05M
    page faults for a convert to RocksDB; CPU s 13.3 / 13.1 -> 12.3 / 12.3 (heap map -> RocksDB),
    9.4 / 8.4 -> 7.7 / 7.6 (RocksDB -> heap map), 9.5 / 8.8 -> 9.0 / 8.5 (export), 11.7 / 11.6 ->
    11.0 / 10.8 (import); the process tree's PSS + scratch 213-250 -> 226-256 MB (import: 217 /
    221 -> 242 / 238); the largest process unchanged, 108-114 MB
    (``benchmarks/results/2026-12-04-ab-malloc3-base.md`` against ``...-env.md``). Thresholds of
    16 / 32 MB changed nothing; the trim threshold alone (which fixes the other at 128 KiB) tripled
    the faults.

    The trim threshold was 64 MiB, enough for those rows (about 40 bytes of value) but not for
    values of about 150 bytes (the benchmark's wide shape), whose partitions free more than that
    at once: at 64 MiB a 10M convert of wide rows took 0.82M-1.78M page faults, at 1 GiB 0.07M;
    CPU s 18.2 / 19.0 -> 14.7 / 14.9 (heap map -> RocksDB), 17.1 / 17.2 -> 12.1 / 12.0 (RocksDB
    -> heap map), narrow rows unchanged (``benchmarks/results/2026-12-05-ab-trim-threshold.md``). Keeping freed
    memory does not raise a process's peak (what is kept was in use at the peak); a worker's
    resident memory stays near its peak between partitions instead of falling, so the tree's sum
    comes nearer the sum of its processes' peaks."""
    if any(name in environ for name in _MALLOC_VARIABLES) or "glibc.malloc." in environ.get("GLIBC_TUNABLES", ""):
        return False
    environ["MALLOC_MMAP_THRESHOLD_"] = str(MALLOC_MMAP_THRESHOLD)
    environ["MALLOC_TRIM_THRESHOLD_"] = str(MALLOC_TRIM_THRESHOLD)
    if this_process:
        _mallopt_thresholds()
    return True


def _mallopt_thresholds() -> None:
    """The same thresholds for this process, by glibc's ``mallopt`` (M_TRIM_THRESHOLD -1,
    M_MMAP_THRESHOLD -3: malloc.h); nothing where the C library is not glibc."""
    try:
        if not os.confstr("CS_GNU_LIBC_VERSION"):
            return
    except (AttributeError, ValueError, OSError):  # no confstr, or no such name here
        return
    import ctypes

    libc = ctypes.CDLL(None)
    libc.mallopt(-3, MALLOC_MMAP_THRESHOLD)
    libc.mallopt(-1, MALLOC_TRIM_THRESHOLD)


#: the least address space (``RLIMIT_AS``, ``ulimit -v``) a command starts with: every process
#: of the tool maps 0.52-0.55 GB before its rows grow it (VmPeak of the command, its fork server
#: and workers, 10M-key convert both ways, export and import, measured here; most of it thread
#: stacks and allocator arenas reserved by RocksDB, Arrow and glibc, not memory in use), and
#: under a smaller limit the libraries fail in ways no message can name: observed, a thread that
#: cannot start left the pool waiting forever, RocksDB's Rust binding deadlocked dropping an
#: iterator (deaf to SIGTERM and Ctrl-C) or aborted the process. The same commands ran at 0.7 GB.
MIN_ADDRESS_SPACE = 1 << 30


def address_space_refusal() -> str | None:
    """Why this process's address-space limit is too small to start (None: no limit, or enough)."""
    try:
        import resource
    except ImportError:  # not on a POSIX system
        return None
    soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    if soft == resource.RLIM_INFINITY or soft >= MIN_ADDRESS_SPACE:
        return None
    return (
        f"this process may map only {soft / (1 << 20):.0f} MiB of address space (ulimit -v); the libraries "
        f"stateshift uses reserve about 550 MiB per process before any row, and under such a limit they hang or "
        f"abort instead of failing cleanly: raise it to at least {MIN_ADDRESS_SPACE >> 20} MiB or unlimited "
        "(to cap memory, use a container's memory limit, which limits memory in use, not address space)"
    )


class Terminated(KeyboardInterrupt):
    """SIGTERM (``kill PID``, a container or job runner stopping the command), raised where the
    command is, so it stops as on Ctrl-C: its workers are ended and the target stays marked
    incomplete. Python's default would end this process alone, its workers left behind."""


def _on_sigterm(signum: int, frame: Any) -> None:
    raise Terminated


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    try:
        previous = signal.signal(signal.SIGTERM, _on_sigterm)
    except ValueError:  # not the main thread (the command run inside another program): its own handling stands
        previous = None
    try:
        return _command_line(argv)
    except Terminated:  # wherever it was raised: in the command, or starting or stopping the workers
        print("stateshift: terminated (SIGTERM); the target (if any) is left marked incomplete", file=sys.stderr)
        return 128 + signal.SIGTERM
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _command_line(argv: list[str]) -> int:
    refusal = address_space_refusal()  # before anything starts a thread or maps a library
    if refusal is not None:
        print(f"stateshift: error: {refusal}", file=sys.stderr)
        return SystemFailure.exit_code
    prefer_arrow_pool()  # before the fork server starts and before pyarrow is imported
    no_blas_pool()  # likewise, before numpy is imported
    fixed_malloc = keep_freed_memory(this_process=False)  # before the fork server starts
    workers.for_command(argv[0] if argv else None)  # what its fork server imports
    if workers.likely_parallel(argv):  # before the imports of the parser, which take as long
        workers.start()
    if fixed_malloc:
        _mallopt_thresholds()  # this process's own (ctypes), once the server is on its way
    try:
        return _main(argv)
    finally:
        workers.for_command(None)
        # a server started early, on any way out (an error before the pool, a usage error), and
        # the one the last pool left stopping in a thread (workers.stop_soon)
        try:
            workers.stop()
        except Exception as exc:  # noqa: BLE001 - the command's own outcome stands; say what went wrong
            print(f"stateshift: warning: the workers' fork server did not stop cleanly: {type(exc).__name__}: "
                  f"{' '.join(str(exc).split())}", file=sys.stderr)


def _main(argv: list[str]) -> int:
    from .storage import mask_text, parse_storage_options, secret_values

    parser = _parser()
    args = parser.parse_args(argv)
    secrets: list[str] = []
    try:
        for name in ("storage_option", "target_storage_option"):
            secrets += secret_values(parse_storage_options(getattr(args, name, []) or []))
        return _run(args)
    except StateshiftError as exc:
        return _failed(args, exc.exit_code, "error", mask_text(str(exc), secrets))
    except BrokenPipeError:
        # the reader of our output went away (e.g. `| head`); the work itself is complete
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return 0
    except KeyboardInterrupt as exc:
        if isinstance(exc, Terminated):
            raise  # main says so, wherever it was raised
        print("stateshift: interrupted; the target (if any) is left marked incomplete", file=sys.stderr)
        return 130
    except OSError as exc:  # the machine failed a step that names no file of its own
        failure = os_failure(exc, "go on")
        return _failed(args, failure.exit_code, "error", mask_text(str(failure), secrets))
    except Exception as exc:  # noqa: BLE001 - the one place that turns crashes into an exit code
        text = mask_text(f"{type(exc).__name__}: {exc}", secrets)
        return _failed(args, 1, "internal error", " ".join(text.split()))


def _failed(args: argparse.Namespace, code: int, kind: str, message: str) -> int:
    """The one error line on stderr; with ``--json`` also one JSON document on stdout, so a script
    that reads stdout gets an answer on failure too."""
    print(f"stateshift: {kind}: {message}", file=sys.stderr)
    if getattr(args, "json", False):
        print(json.dumps({"command": getattr(args, "command", None), "error": {"exit_code": code, "kind": kind, "message": message}}))
    return code
