"""What the command line does before the fork server starts: its own import stays light (no fsspec,
no tqdm, no pyarrow, no numpy), and it keeps OpenBLAS from starting its thread pool (``cli.no_blas_pool``)
unless the user's environment names a thread count; the fork server and its workers inherit that."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from migrate import cli


def python(code: str, **env: str) -> str:
    # OpenBLAS also reads these two when OPENBLAS_NUM_THREADS is unset (from memory: its thread-count lookup)
    environ = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_NUM_THREADS", "GOTO_NUM_THREADS", "OMP_NUM_THREADS")}
    environ.update(env)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=environ, timeout=300)
    assert done.returncode == 0, done.stderr
    return done.stdout.strip()


def test_importing_the_cli_imports_nothing_heavy() -> None:
    # main starts the fork server first; every module imported before that delays the server
    heavy = ["fsspec", "tqdm", "pyarrow", "numpy", "rocksdict", "migrate.storage", "migrate.commands.common"]
    code = f"import sys, migrate.cli; print([m for m in {heavy!r} if m in sys.modules])"
    assert python(code) == "[]"


def test_the_default_and_the_users_choice() -> None:
    environ: dict[str, str] = {}
    cli.no_blas_pool(environ)
    assert environ == {"OPENBLAS_NUM_THREADS": "1"}
    environ = {"OPENBLAS_NUM_THREADS": "4"}
    cli.no_blas_pool(environ)
    assert environ == {"OPENBLAS_NUM_THREADS": "4"}


def _threads_after_numpy(prelude: str) -> int:
    code = prelude + "import os, numpy\nprint(len(os.listdir('/proc/self/task')))\n"
    return int(python(code))


def test_numpy_starts_no_thread_pool_after_the_cli_named_one_thread() -> None:
    if not os.path.isdir("/proc/self/task") or (os.cpu_count() or 1) < 2:
        pytest.skip("counts threads in /proc on a machine with at least two cores")
    without = _threads_after_numpy("")
    with_it = _threads_after_numpy("from migrate import cli\ncli.no_blas_pool()\n")
    # numpy's OpenBLAS starts one thread per core beyond the first (observed); with the variable, none
    assert with_it == 1
    assert without > with_it


def test_main_names_the_count_and_the_workers_inherit_it(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("OPENBLAS_NUM_THREADS", "placeholder")  # so the teardown restores what was there
    monkeypatch.delenv("OPENBLAS_NUM_THREADS")
    try:
        cli.main(["--version"])
    except SystemExit:
        pass
    assert os.environ.get("OPENBLAS_NUM_THREADS") == "1"
    code = (
        "from migrate import cli, workers\n"
        "cli.no_blas_pool()\n"
        "import os\n"
        "from concurrent.futures import ProcessPoolExecutor\n"
        "with ProcessPoolExecutor(1, mp_context=workers.context()) as pool:\n"
        "    print(pool.submit(os.getenv, 'OPENBLAS_NUM_THREADS').result(timeout=120))\n"
        "workers.stop()\n"
    )
    assert python(code) == "1"
