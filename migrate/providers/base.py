"""The one small interface every state-store provider layout implements.

A provider knows how one store partition directory is laid out on disk (which files make up a
version, how they are framed) and nothing about what to migrate. The unit it reads and writes is
a ``pyarrow.RecordBatch`` with two non-null binary columns, ``key`` and ``value``: the engine's
canonical row bytes, exactly as the engine holds them in its in-memory map (for RocksDB: with the
one-byte encoding-version prefix removed; see ``rocksdb.py``).

* ``versions(listing)``: which versions the directory listing shows files for.
* ``read(store, version, ctx)``: the rows of one version of one store partition, as batches.
  Must raise :class:`~migrate.errors.CorruptInput` naming the file for anything inconsistent.
  Never writes to the source location.
* ``write(store, version, batches, ctx)``: write that version from batches; returns the relative
  paths it created (so the caller can publish / clean up / verify).
* ``store_properties(store, version, ctx)``: facts about one store version that its rows cannot
  carry but a writer needs (string keys and values; ``{}`` for most stores): the key schema of a
  prefix-key store (:data:`KEY_SCHEMA`), the column-family table of a RocksDB store that uses
  column families (:data:`COLUMN_FAMILIES`). Callers pass them to the writer and to the reader
  of the written target as ``ctx.extra``; ``check_writable`` refuses, before anything is
  written, a store the layout cannot hold.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa

from ..errors import Unsupported
from ..storage import Entry, Location

ROW_SCHEMA = pa.schema([pa.field("key", pa.binary(), nullable=False), pa.field("value", pa.binary(), nullable=False)])
BATCH_ROWS = 65536
#: store property: the key schema (engine JSON) of a store with a prefix key (numColsPrefixKey > 0)
KEY_SCHEMA = "key_schema"
#: store property: the column-family table (JSON) of a RocksDB store that uses column families
COLUMN_FAMILIES = "rocksdb.column_families"


@dataclass(frozen=True)
class StoreDir:
    """One store partition directory: ``state/<operator>/<partition>[/<store name>]``."""

    location: Location
    rel: str  # relative to location root, e.g. "state/0/3" or "state/0/3/left-keyToNumValues"
    operator_id: int
    partition: int
    store_name: str = "default"

    def describe(self, name: str = "") -> str:
        return self.location.describe(f"{self.rel}/{name}" if name else self.rel)


@dataclass(frozen=True)
class ReadContext:
    """What a reader needs beyond the files: the conf pinned in the offsets log."""

    conf: dict[str, str] = field(default_factory=dict)
    num_cols_prefix_key: int = 0
    listing: dict[str, Entry] | None = None  # the store dir listing if the caller has it
    extra: dict[str, str] = field(default_factory=dict)  # store properties, when the files cannot tell
    #: unique id of the version to read (state checkpoint format 2: the commit log names it); None: format 1
    checkpoint_id: str | None = None
    #: a hint: the caller writes to a layout that keeps rows sorted (``Provider.wants_key_order``),
    #: so a reader that can give them in byte-wise key order for little cost should; never a promise
    key_order: bool = False

    @property
    def codec(self) -> str:
        return self.conf.get("spark.sql.streaming.stateStore.compression.codec", "lz4")


@dataclass(frozen=True)
class WriteContext:
    """What a writer needs: the target conf (codec, RocksDB format version) and the engine."""

    conf: dict[str, str] = field(default_factory=dict)
    num_cols_prefix_key: int = 0
    write_crc: bool = True
    extra: dict[str, Any] = field(default_factory=dict)
    #: engine family the target is written for (``checkpoint.engine``: "3.5" or "4.x")
    engine: str = "4.x"
    #: unique id to give the written version (state checkpoint format 2); None: format 1 names
    checkpoint_id: str | None = None

    @property
    def codec(self) -> str:
        return self.conf.get("spark.sql.streaming.stateStore.compression.codec", "lz4")


@dataclass(frozen=True)
class WrittenFile:
    rel: str
    size: int


class Provider(ABC):
    """One state-store provider's on-disk layout."""

    #: short name used on the command line (``--to hdfs``)
    name: str = ""
    #: fully qualified engine class names that mean this layout
    class_names: tuple[str, ...] = ()

    @abstractmethod
    def versions(self, listing: dict[str, Entry]) -> list[int]:
        """Versions that have a complete file of their own in this listing (sorted)."""

    @abstractmethod
    def read(self, store: StoreDir, version: int, ctx: ReadContext) -> Iterator[pa.RecordBatch]:
        """Rows of ``version``: batches of :data:`ROW_SCHEMA`."""

    @abstractmethod
    def write(
        self, store: StoreDir, version: int, batches: Iterable[pa.RecordBatch], ctx: WriteContext
    ) -> list[WrittenFile]:
        """Write ``version`` from batches; return the files created (relative to the location)."""

    def source_files(self, store: StoreDir, version: int, ctx: ReadContext) -> list[WrittenFile]:
        """The files that ``read`` would read for ``version`` (for the dry-run plan)."""
        return []

    #: whether this layout can hold a store whose rows live in several column families
    supports_column_families: bool = False
    #: whether the writer sorts the rows by key (and so saves that work when they come sorted): a
    #: reader feeding it is asked for key order (``ReadContext.key_order``)
    wants_key_order: bool = False

    def store_properties(self, store: StoreDir, version: int, ctx: ReadContext) -> dict[str, str]:
        """Facts about ``version`` of ``store`` that a writer needs besides the rows (see above)."""
        from .facts import key_schema_property

        return key_schema_property(store, ctx, version)

    def check_writable(self, props: dict[str, str], where: str) -> None:
        """Refuse (:class:`~migrate.errors.Unsupported`) a store this layout cannot hold."""
        if props.get(COLUMN_FAMILIES) and not self.supports_column_families:
            raise Unsupported(
                "this store keeps its state in RocksDB column families (the engine's per-key state API, "
                "transformWithState: value, list and map state, timers, TTL); the "
                f"{self.name or type(self).__name__} provider keeps one plain key-value map per store and cannot "
                "hold column families, and the engine refuses transformWithState on it "
                "(STORE_BACKEND_NOT_SUPPORTED_FOR_TWS); convert it to rocksdb instead",
                where,
            )
