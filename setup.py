"""Build hook for the compiled helpers; everything else about the package is in pyproject.toml.

The extension is optional: when it cannot be compiled (no C compiler, no Python headers) the
install still succeeds and the tool uses the Python walk in migrate/providers/hdfs.py.
"""

from setuptools import Extension, setup

setup(ext_modules=[Extension("migrate.providers._framing", ["migrate/providers/_framing.c"], optional=True)])
