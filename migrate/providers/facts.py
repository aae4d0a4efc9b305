"""Store facts the rows cannot carry: the key schema of a prefix-key store.

A store with a prefix key (``numColsPrefixKey > 0``, e.g. session windows) is laid out
differently by the two providers (see ``rocksdb_keys.py``); moving its rows between them needs
to know which key fields are variable-length, i.e. the key schema. Readers find it in the
store's schema file; writers (whose target has no schema file yet) and readers of a freshly
written target get it from the :data:`~migrate.providers.base.KEY_SCHEMA` store property.

Schema files, as the engine lays them out (observed on Spark 4.3.0 for session windows:
``state/<op>/<partition>/_metadata/schema``, v2), else ``state/<op>/_stateSchema/<store>/<batch>_<id>``
(v3, newer operators; the newest one written at or before the batch applies).
"""

from __future__ import annotations

import json
import re
from typing import Any

from ..errors import CorruptInput, StateshiftError, Unsupported
from ..rows.schema import StructType, parse_state_schema_file, spark_type_from_json
from ..rows.types import spark_type_to_json
from .base import KEY_SCHEMA, ReadContext, StoreDir

_LEADING_INT = re.compile(r"^(\d+)_")


def _op_rel(store: StoreDir) -> str | None:
    parts = store.rel.strip("/").split("/")
    for i in range(len(parts) - 2):
        if parts[i] == "state" and parts[i + 1].isdigit() and parts[i + 2].isdigit():
            return "/".join(parts[: i + 2])
    return None


def _partition_zero(store: StoreDir, op: str) -> str:
    return f"{op}/0" if store.store_name == "default" else f"{op}/0/{store.store_name}"


def find_schema_file(store: StoreDir, listing: dict[str, Any], version: int | None = None) -> str | None:
    """The location-relative path of the schema file describing ``store``, if there is one.

    Looked for in the store's own ``_metadata``, then in that of partition 0 of the same store
    (observed: the engine writes the v2 file for the whole operator under partition 0 only), then
    in the operator's ``_stateSchema``.
    """
    rel = store.rel.strip("/")
    op = _op_rel(store)
    candidates = [(rel, listing)]
    if op is not None and _partition_zero(store, op) != rel:
        candidates.append((_partition_zero(store, op), None))
    for folder, entries in candidates:
        entries = store.location.list_dir(folder) if entries is None else entries
        if "_metadata" in entries:
            meta = store.location.list_dir(f"{folder}/_metadata" if folder else "_metadata")
            if "schema" in meta and not meta["schema"].is_dir:
                return f"{folder}/_metadata/schema" if folder else "_metadata/schema"
    if op is None:
        return None
    ops = store.location.list_dir(op)
    if "_stateSchema" not in ops:
        return None
    folder = f"{op}/_stateSchema/{store.store_name}"
    found = []
    for name, entry in store.location.list_dir(folder).items():
        m = _LEADING_INT.match(name)
        if m and not entry.is_dir:
            found.append((int(m.group(1)), name))
    if version is not None:
        found = [f for f in found if f[0] <= version - 1] or found
    return f"{folder}/{max(found)[1]}" if found else None


def read_key_schema(store: StoreDir, ctx: ReadContext, version: int | None = None) -> StructType:
    """The key schema of a prefix-key store: from ``ctx.extra`` or from its schema file."""
    if KEY_SCHEMA in ctx.extra:
        return parse_key_schema(ctx.extra[KEY_SCHEMA], store.describe())
    listing = ctx.listing if ctx.listing is not None else store.location.list_dir(store.rel)
    rel = find_schema_file(store, listing, version)
    if rel is None:
        raise Unsupported(
            f"a store with a prefix key (numColsPrefixKey={ctx.num_cols_prefix_key}) needs its key schema, and no "
            "state schema file was found for it",
            store.describe(),
        )
    where = store.location.describe(rel)
    schemas = parse_state_schema_file(store.location.read_bytes(rel), where)
    chosen = [s for s in schemas if s.column_family == "default"] or schemas
    if len(chosen) != 1:
        raise Unsupported("the state schema file lists several column families; cannot tell the key schema", where)
    return chosen[0].key_schema


def parse_key_schema(text: str, where: str) -> StructType:
    try:
        t = spark_type_from_json(json.loads(text))
    except (ValueError, TypeError, StateshiftError) as exc:
        raise CorruptInput(f"the key schema property is not a Spark schema ({exc})", where) from None
    if not isinstance(t, StructType):
        raise CorruptInput(f"the key schema property is {t.simple_string()}, not a struct", where)
    return t


def render_key_schema(schema: StructType) -> str:
    return json.dumps(spark_type_to_json(schema), separators=(",", ":"))


def key_schema_property(store: StoreDir, ctx: ReadContext, version: int | None = None) -> dict[str, str]:
    """``{KEY_SCHEMA: json}`` for a prefix-key store, else ``{}``."""
    if ctx.num_cols_prefix_key <= 0:
        return {}
    return {KEY_SCHEMA: render_key_schema(read_key_schema(store, ctx, version))}
