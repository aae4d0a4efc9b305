"""Build hook for the compiled helpers; everything else about the package is in pyproject.toml.

The extensions are optional: when they cannot be compiled (no C compiler, no Python headers) the
install still succeeds and the tool uses the Python (numpy, Arrow) reference of each: the walk,
gather and framing in migrate/providers/hdfs.py, Arrow's sort in migrate/providers/rocksdb_db.py,
the dictionary-encoding replay in hdfs.py, the Python lists of a RocksDB scan and put loop in
rocksdb_db.py (_collect_py, _put_py), the numpy digest in migrate/digest.py, the numpy decode of
flat rows in migrate/rows/unsafe_row.py and the Python per-chunk CRC loop in
migrate/codecs/hadoop_crc.py (whose helper also needs zlib's headers).
"""

from setuptools import Extension, setup

BINARY_H = "migrate/providers/_binary.h"  # shared by the extensions; `depends` also puts it in the sdist

setup(
    ext_modules=[
        Extension("migrate.providers._framing", ["migrate/providers/_framing.c"], depends=[BINARY_H], optional=True),
        Extension("migrate.providers._keysort", ["migrate/providers/_keysort.c"], depends=[BINARY_H], libraries=["dl"], optional=True),
        Extension("migrate.providers._rowpairs", ["migrate/providers/_rowpairs.c"], depends=[BINARY_H], optional=True),
        Extension("migrate._digest", ["migrate/_digest.c"], depends=[BINARY_H], optional=True),
        Extension("migrate.rows._flatrows", ["migrate/rows/_flatrows.c"], depends=[BINARY_H], optional=True),
        Extension("migrate.codecs._chunkcrc", ["migrate/codecs/_chunkcrc.c"], libraries=["z", "dl"], optional=True),
        Extension("migrate.codecs._lz4stream", ["migrate/codecs/_lz4stream.c"], libraries=["dl"], optional=True),
    ]
)
