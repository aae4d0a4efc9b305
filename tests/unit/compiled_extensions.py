"""The compiled helpers (setup.py), loaded for their tests: a skip on a developer machine
without them, a failure under ``CI=true``, since CI installs the project with a C compiler and
must not pass by skipping (the same rule the engine and S3 tests follow in the conftest files)."""

from __future__ import annotations

import importlib
import os
from types import ModuleType

import pytest


def load(name: str, what: str) -> ModuleType:
    """The extension module ``name`` (``what`` it is, for the message)."""
    try:
        return importlib.import_module(name)
    except ImportError as exc:
        reason = f"{what} {name} is not built ({exc}); `pip install -e .` builds it when a C compiler and the Python headers are there"
        if os.environ.get("CI") == "true":
            pytest.fail(f"{reason}, and CI=true", pytrace=False)
        pytest.skip(reason)
