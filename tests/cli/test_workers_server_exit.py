"""The workers' fork server ends without its interpreter's teardown (``migrate._server_exit``),
after the exit handlers of the modules it preloaded after that one, and the module does nothing
anywhere but in a fork server.

The witness is a probe module preloaded after it: its exit handler writes one file, and an object
held by the module writes another when the interpreter's teardown frees it. A fork server of
CPython's ``multiprocessing`` (the real one, in a child interpreter) is started with and without
``migrate._server_exit`` in front of the probe, runs one task and is stopped the way
``workers.stop`` stops it."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from migrate import _server_exit, workers

ROOT = Path(__file__).resolve().parents[2]

PROBE = textwrap.dedent(
    """
    import atexit, os
    OUT = os.environ["PROBE_OUT"]

    def _mark():
        with open(os.path.join(OUT, "exit-handler-ran"), "w") as f:
            f.write(str(os.getpid()))

    atexit.register(_mark)

    class _Witness:  # freed by the interpreter's teardown, when there is one
        def __del__(self, _open=open, _path=os.path.join(OUT, "teardown-ran")):
            with _open(_path, "w") as f:
                f.write("freed")

    WITNESS = _Witness()
    """
)

RUN = textwrap.dedent(
    """
    import multiprocessing as mp, sys
    from multiprocessing import forkserver

    def square(x):
        return x * x

    if __name__ == "__main__":
        ctx = mp.get_context("forkserver")
        ctx.set_forkserver_preload(sys.argv[1].split(","))
        with ctx.Pool(1) as pool:
            assert pool.map(square, [7]) == [49]
        forkserver._forkserver._stop()  # closes the server's pipe and waits for its process
    """
)


def run_server(tmp_path: Path, preload: str) -> list[str]:
    """Which witness files a fork server preloading ``preload`` left when it stopped."""
    tmp_path.mkdir()
    (tmp_path / "probe_mod.py").write_text(PROBE)
    (tmp_path / "run.py").write_text(RUN)
    out = tmp_path / "out"
    out.mkdir()
    env = dict(os.environ, PROBE_OUT=str(out), PYTHONPATH=os.pathsep.join([str(tmp_path), str(ROOT)]))
    done = subprocess.run([sys.executable, "run.py", preload], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    return sorted(os.listdir(out))


@pytest.mark.skipif("forkserver" not in __import__("multiprocessing").get_all_start_methods(), reason="no fork server here")
def test_the_server_skips_its_teardown_but_not_the_exit_handlers_after_it(tmp_path: Path) -> None:
    assert run_server(tmp_path / "plain", "probe_mod") == ["exit-handler-ran", "teardown-ran"]  # the control
    assert run_server(tmp_path / "with", "migrate._server_exit,probe_mod") == ["exit-handler-ran"]
    # placed after the probe, it would end the server before the probe's handler: hence first in PRELOAD
    assert run_server(tmp_path / "after", "probe_mod,migrate._server_exit") == []
    assert all(names[0] == "migrate._server_exit" for names in [workers.PRELOAD, *workers.COMMAND_PRELOAD.values()])


def test_imported_anywhere_else_it_registers_nothing() -> None:
    assert not _server_exit.in_fork_server()
    code = "import atexit; n = atexit._ncallbacks(); import migrate._server_exit; print(atexit._ncallbacks() - n)"
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=60, check=True)
    assert done.stdout.strip() == "0"


def test_the_check_finds_the_servers_main_on_the_stack() -> None:
    """A function named ``main`` in a file ``.../multiprocessing/forkserver.py`` that imports or calls
    the check is what the fork server runs; any other ``main`` is not."""
    for filename, expected in (
        (os.path.join("lib", "python3", "multiprocessing", "forkserver.py"), True),
        (os.path.join("lib", "python3", "multiprocessing", "spawn.py"), False),
        (os.path.join("elsewhere", "forkserver_tools.py"), False),
    ):
        scope: dict = {"check": _server_exit.in_fork_server}
        exec(compile("def main():\n    return check()\n", filename, "exec"), scope)
        assert scope["main"]() is expected, filename
