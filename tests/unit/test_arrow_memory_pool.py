"""The command line names the C library's allocator as Arrow's memory pool (``cli.prefer_arrow_pool``)
before pyarrow is imported, unless the user's environment names one: the CLI's own imports leave
pyarrow out, the variable set that way selects the pool, and the fork server's workers inherit it."""

from __future__ import annotations

import os
import subprocess
import sys

from migrate import cli


def python(code: str, **env: str) -> str:
    environ = {k: v for k, v in os.environ.items() if k != "ARROW_DEFAULT_MEMORY_POOL"}
    environ.update(env)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=environ, timeout=300)
    assert done.returncode == 0, done.stderr
    return done.stdout.strip()


def test_the_default_and_the_users_choice() -> None:
    environ: dict[str, str] = {}
    cli.prefer_arrow_pool(environ)
    assert environ == {"ARROW_DEFAULT_MEMORY_POOL": "system"}
    environ = {"ARROW_DEFAULT_MEMORY_POOL": "mimalloc"}
    cli.prefer_arrow_pool(environ)
    assert environ == {"ARROW_DEFAULT_MEMORY_POOL": "mimalloc"}


def test_the_cli_imports_no_pyarrow_before_main() -> None:
    # Arrow reads the variable when pyarrow is imported: main sets it first, so nothing before may import it
    assert python("import sys, migrate.cli; print('pyarrow' in sys.modules)") == "False"


def test_the_variable_selects_the_pool_in_the_process_and_its_workers() -> None:
    code = (
        "from migrate import cli, workers\n"
        "cli.prefer_arrow_pool()\n"
        "import os, pyarrow as pa\n"
        "from concurrent.futures import ProcessPoolExecutor\n"
        "workers.start()\n"
        "with ProcessPoolExecutor(1, mp_context=workers.context()) as pool:\n"
        "    inherited = pool.submit(os.getenv, 'ARROW_DEFAULT_MEMORY_POOL').result(timeout=120)\n"
        "workers.stop()\n"
        "print(pa.default_memory_pool().backend_name, inherited)\n"
    )
    assert python(code) == "system system"
    assert python(code, ARROW_DEFAULT_MEMORY_POOL="mimalloc") == "mimalloc mimalloc"


def test_main_names_the_pool(monkeypatch, capsys) -> None:
    monkeypatch.setenv("ARROW_DEFAULT_MEMORY_POOL", "placeholder")  # so the teardown restores what was there
    monkeypatch.delenv("ARROW_DEFAULT_MEMORY_POOL")
    try:
        cli.main(["--version"])
    except SystemExit:
        pass
    assert os.environ.get("ARROW_DEFAULT_MEMORY_POOL") == "system"
