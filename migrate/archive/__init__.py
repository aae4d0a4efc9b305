"""The portable state archive: Parquet per operator/store/partition plus a sealed manifest.

Layout (all paths relative to the archive root)::

    manifest.json                                   sealed description of everything below
    checkpoint/...                                  the checkpoint's own metadata files, verbatim
                                                    (metadata, offsets/, commits/, sources/,
                                                    state/<op>/_metadata/..., schema files)
    state/operator=<id>/store=<name>/partition=<n>/part-0.parquet
                                                    raw ``key``/``value`` row bytes (the source
                                                    of truth) + typed ``key_*``/``value_*`` columns

Modules: ``manifest`` (model, JSON, seal), ``columns`` (schema files -> typed columns),
``writer`` (streamed Parquet, verbatim copies), ``reader`` (integrity check, raw rows).
Provider specifics live in ``migrate.providers``; the commands wire the two together.
"""

from .manifest import (
    CHECKPOINT_DIR,
    DATA_DIR,
    FORMAT_VERSION,
    MANIFEST_NAME,
    DataFile,
    Manifest,
    parse_manifest,
)
from .reader import check_archive, load_manifest, read_rows

__all__ = [
    "CHECKPOINT_DIR",
    "DATA_DIR",
    "FORMAT_VERSION",
    "MANIFEST_NAME",
    "DataFile",
    "Manifest",
    "check_archive",
    "load_manifest",
    "parse_manifest",
    "read_rows",
]
