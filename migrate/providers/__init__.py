"""Registry of state-store provider layouts: short name or engine class name -> Provider."""

from __future__ import annotations

from ..errors import Unsupported, UsageError
from .base import Provider
from .hdfs import HDFSProvider


def _rocksdb() -> Provider:
    from .rocksdb import RocksDBProvider

    return RocksDBProvider()


_FACTORIES = {"hdfs": HDFSProvider, "rocksdb": _rocksdb}
_CLASSES = {
    "org.apache.spark.sql.execution.streaming.state.HDFSBackedStateStoreProvider": "hdfs",
    "org.apache.spark.sql.execution.streaming.state.RocksDBStateStoreProvider": "rocksdb",
}
PROVIDER_NAMES = tuple(_FACTORIES)
DEFAULT_CLASS = {v: k for k, v in _CLASSES.items()}


def provider_for(name_or_class: str, where: str = "") -> Provider:
    """The layout for ``hdfs``/``rocksdb`` or an engine provider class name."""
    key = name_or_class.strip()
    short = key.lower() if key.lower() in _FACTORIES else _CLASSES.get(key)
    if short is None:
        known = ", ".join(list(_FACTORIES) + list(_CLASSES))
        raise Unsupported(f"unknown state-store provider {key!r}; known: {known}", where or None)
    return _FACTORIES[short]()


def class_name_for(name_or_class: str) -> str:
    """The engine class name to pin in the offsets log for a ``--to`` value."""
    key = name_or_class.strip()
    if key.lower() in DEFAULT_CLASS:
        return DEFAULT_CLASS[key.lower()]
    if "." not in key:  # neither a short name nor a class name: a typo, not unsupported input
        names = ", ".join(sorted(DEFAULT_CLASS))
        raise UsageError(f"--to {key!r}: not a provider name ({names}) or a provider class name")
    provider_for(key)
    return key
