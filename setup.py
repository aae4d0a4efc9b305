"""Build hook for the compiled helpers; everything else about the package is in pyproject.toml.

The extensions are optional: when they cannot be compiled (no C compiler, no Python headers) the
install still succeeds and the tool uses the Python walk in migrate/providers/hdfs.py and Arrow's
sort in migrate/providers/rocksdb_db.py.
"""

from setuptools import Extension, setup

setup(
    ext_modules=[
        Extension("migrate.providers._framing", ["migrate/providers/_framing.c"], optional=True),
        Extension("migrate.providers._keysort", ["migrate/providers/_keysort.c"], optional=True),
    ]
)
