"""Fixtures for the real-engine tests: one small local SparkSession for the whole session.

Every test under tests/engine gets the ``engine`` marker. When pyspark or a Java runtime is
missing the tests are skipped on a developer machine and fail under CI (``CI=true``), so a CI
image without the engine cannot pass by skipping everything.
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
from pathlib import Path

import pytest

_ENGINE_DIR = Path(__file__).resolve().parent
_REPO = _ENGINE_DIR.parents[1]
# Test modules here `import scenarios`, and import `migrate` from this checkout even when the
# package is not installed in the interpreter running pytest.
for _path in (str(_ENGINE_DIR), str(_REPO)):
    if _path not in sys.path:
        sys.path.insert(0, _path)


def _missing_engine() -> str | None:
    """Why the engine cannot run here, or None when it can."""
    try:
        import pyspark  # noqa: F401
    except Exception as exc:  # ImportError, or a broken install
        return f"pyspark cannot be imported ({exc.__class__.__name__}: {exc})"
    java_home = os.environ.get("JAVA_HOME")
    java_in_home = java_home and (Path(java_home) / "bin" / "java").exists()
    if not java_in_home and shutil.which("java") is None:
        return "no Java runtime: `java` is not on PATH and JAVA_HOME/bin/java does not exist"
    return None


def engine_required() -> None:
    """Skip (developer machine) or fail (CI=true) when the real engine is unavailable."""
    reason = _missing_engine()
    if reason is None:
        return
    if os.environ.get("CI") == "true":
        pytest.fail(f"engine tests need pyspark and Java, and CI=true: {reason}", pytrace=False)
    pytest.skip(f"engine unavailable: {reason}")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    for item in items:
        if _ENGINE_DIR in Path(str(item.fspath)).resolve().parents:
            item.add_marker(pytest.mark.engine)


@pytest.fixture(scope="session")
def spark():
    """A local[2] SparkSession shared by all engine tests, stopped at the end of the session."""
    engine_required()
    import scenarios

    scratch = tempfile.mkdtemp(prefix="stateshift-spark-")
    session = scenarios.local_session("stateshift-engine-tests", scratch)
    try:
        yield session
    finally:
        session.stop()
        shutil.rmtree(scratch, ignore_errors=True)
