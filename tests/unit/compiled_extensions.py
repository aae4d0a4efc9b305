"""The compiled helpers (setup.py), loaded for their tests: a skip on a developer machine
without them, a failure under ``CI=true``, since CI installs the project with a C compiler and
must not pass by skipping (the same rule the engine and S3 tests follow in the conftest files)."""

from __future__ import annotations

import importlib
import os
from types import ModuleType

import numpy as np
import pytest

#: (offsets, data, offset, count, message) of an array that open_binary (_binary.h) refuses, for
#: every helper taking one (offsets, data, offset, count, large) array
REFUSED_ARRAYS = [
    (np.array([0, 4, 2], np.int32), b"abcd", 0, 2, "not those of a binary array"),  # decreasing
    (np.array([-1, 2], np.int32), b"abcd", 0, 1, "not those of a binary array"),  # negative
    (np.array([0, 2, 9], np.int32), b"abcd", 0, 2, "not those of a binary array"),  # past the end
    (np.array([0, 2], np.int32), b"abcd", 0, 2, "shorter"),  # too few offsets
    (np.array([0, 2], np.int32), b"abcd", -1, 1, "negative"),
]


def load(name: str, what: str) -> ModuleType:
    """The extension module ``name`` (``what`` it is, for the message)."""
    try:
        return importlib.import_module(name)
    except ImportError as exc:
        reason = f"{what} {name} is not built ({exc}); `pip install -e .` builds it when a C compiler and the Python headers are there"
        if os.environ.get("CI") == "true":
            pytest.fail(f"{reason}, and CI=true", pytrace=False)
        pytest.skip(reason)
