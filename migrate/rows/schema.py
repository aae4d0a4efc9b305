"""State schema files, and the public home of the Spark type model.

``parse_state_schema_file`` reads the binary schema files the engine writes next to state
(``state/<op>/<part>/_metadata/schema``, and ``state/<op>/_stateSchema/<store>/<id>`` in newer
releases) into one ``StateSchema`` per store / column family. The type model, its JSON parser
and the Arrow mapping live in ``migrate.rows.types`` and are re-exported here, so callers import
everything schema-related from this module.

Schema file layouts (Java ``DataOutputStream``; ``writeUTF`` = 2-byte big-endian length then
modified UTF-8):

* ``v1`` (from memory): ``writeUTF("v1")``, ``writeUTF(keyJson)``, ``writeUTF(valueJson)``.
* ``v2`` (observed, Spark 4.3.0 streaming aggregation): ``writeUTF("v2")``, then for the key and
  then the value schema ``writeInt(numChunks)`` followed by ``numChunks`` ``writeUTF`` chunks
  whose concatenation is the schema JSON.
* ``v3`` (observed, Spark 4.3.0 transformWithState): ``writeUTF("v3")``, ``writeInt(count)``,
  then per column family its name, schema ids and chunked JSON documents (see
  ``_column_family_schema``).

No I/O here: callers hand in bytes and a ``where`` (path) for error messages.
"""

from __future__ import annotations

import json
import re
import struct
from dataclasses import dataclass, field
from typing import Any

from migrate.errors import CorruptInput, Unsupported
from migrate.rows.types import *  # noqa: F401,F403  (the re-exported type model)
from migrate.rows.types import StructType, spark_type_from_json
from migrate.rows.types import __all__ as _TYPE_NAMES

__all__ = [*_TYPE_NAMES, "StateSchema", "parse_state_schema_file"]


@dataclass(frozen=True)
class StateSchema:
    """Key and value schema of one state store / column family."""

    key_schema: StructType
    value_schema: StructType
    column_family: str = "default"
    key_state_encoder: dict | None = field(default=None, compare=False, hash=False)
    user_key_encoder_schema: StructType | None = None
    format_version: int = 2
    key_schema_id: int = 0
    value_schema_id: int = 0


class _Reader:
    def __init__(self, data: bytes, where: str) -> None:
        self.data, self.pos, self.where = data, 0, where

    def eof(self) -> bool:
        return self.pos >= len(self.data)

    def take(self, n: int, what: str) -> bytes:
        if self.pos + n > len(self.data):
            raise CorruptInput(f"state schema file truncated while reading {what} "
                               f"(need {n} bytes at offset {self.pos}, file has "
                               f"{len(self.data)})", self.where)
        out = self.data[self.pos:self.pos + n]
        self.pos += n
        return out

    def utf(self, what: str) -> str:
        (n,) = struct.unpack(">H", self.take(2, what))
        return _modified_utf8(self.take(n, what), self.where)

    def chunked(self, what: str) -> str:
        (count,) = struct.unpack(">i", self.take(4, what))
        if count < 0 or count > len(self.data):
            raise CorruptInput(f"state schema file has an impossible chunk count {count} "
                               f"for {what}", self.where)
        return "".join(self.utf(what) for _ in range(count))


def _modified_utf8(raw: bytes, where: str) -> str:
    """Java's modified UTF-8: NUL as C0 80, supplementary characters as surrogate pairs."""
    try:
        text = raw.replace(b"\xc0\x80", b"\x00").decode("utf-8", "surrogatepass")
        return text.encode("utf-16", "surrogatepass").decode("utf-16")
    except UnicodeError as exc:
        raise CorruptInput(f"state schema file holds text that is not modified UTF-8 ({exc})",
                           where) from None


def _struct_from_json_text(text: Any, where: str, what: str) -> StructType:
    try:
        t = spark_type_from_json(text)
    except (ValueError, TypeError, RecursionError) as exc:
        raise CorruptInput(f"{what} in state schema file is not a Spark schema: {exc}",
                           where) from None
    if not isinstance(t, StructType):
        raise CorruptInput(f"{what} in state schema file is {t.simple_string()}, not a struct",
                           where)
    return t


def parse_state_schema_file(data: bytes, where: str) -> list[StateSchema]:
    """Parse a state schema file; one ``StateSchema`` per column family (v1/v2: exactly one)."""
    reader = _Reader(bytes(data), where)
    version_text = reader.utf("the version")
    if not re.fullmatch(r"v\d+", version_text):
        raise CorruptInput(f"state schema file does not start with a version (found "
                           f"{version_text[:20]!r})", where)
    version = int(version_text[1:])
    if version == 1:
        key = _struct_from_json_text(reader.utf("the key schema"), where, "key schema")
        value = _struct_from_json_text(reader.utf("the value schema"), where, "value schema")
        out = [StateSchema(key, value, format_version=1)]
    elif version == 2:
        key = _struct_from_json_text(reader.chunked("the key schema"), where, "key schema")
        value = _struct_from_json_text(reader.chunked("the value schema"), where, "value schema")
        out = [StateSchema(key, value, format_version=2)]
    elif version == 3:
        (count,) = struct.unpack(">i", reader.take(4, "the column family count"))
        if count <= 0 or count > len(reader.data):
            raise CorruptInput(f"state schema file v3 has an impossible column family count "
                               f"{count}", where)
        out = [_column_family_schema(reader) for _ in range(count)]
    else:
        raise Unsupported(f"state schema file version {version} is not supported "
                          f"(known: v1, v2, v3)", where)
    if not reader.eof():
        raise CorruptInput(f"state schema file has {len(reader.data) - reader.pos} unexpected "
                           f"trailing bytes", where)
    return out


def _column_family_schema(reader: _Reader) -> StateSchema:
    """One v3 entry (observed, Spark 4.3.0): ``writeUTF(name)``, ``writeShort(keySchemaId)``,
    chunked key JSON, ``writeShort(valueSchemaId)``, chunked value JSON, chunked key state
    encoder spec JSON, chunked user-key schema JSON (``"{    }"`` when there is none)."""
    where = reader.where
    name = reader.utf("a column family name")
    (key_id,) = struct.unpack(">h", reader.take(2, f"the key schema id of {name!r}"))
    key = _struct_from_json_text(reader.chunked(f"the key schema of {name!r}"), where,
                                 f"key schema of {name!r}")
    (value_id,) = struct.unpack(">h", reader.take(2, f"the value schema id of {name!r}"))
    value = _struct_from_json_text(reader.chunked(f"the value schema of {name!r}"), where,
                                   f"value schema of {name!r}")
    encoder_text = reader.chunked(f"the key encoder of {name!r}")
    user_text = reader.chunked(f"the user key schema of {name!r}")
    try:
        encoder = json.loads(encoder_text)
        user = json.loads(user_text)
    except ValueError as exc:
        raise CorruptInput(f"column family {name!r}: encoder spec or user key schema is not "
                           f"JSON ({exc})", where) from None
    if not isinstance(encoder, dict):
        raise CorruptInput(f"column family {name!r}: encoder spec is not a JSON object", where)
    user_schema = None
    if isinstance(user, dict) and user.get("type") is not None:
        user_schema = _struct_from_json_text(user, where, f"user key schema of {name!r}")
    return StateSchema(key_schema=key, value_schema=value, column_family=name,
                       key_state_encoder=encoder, user_key_encoder_schema=user_schema,
                       format_version=3, key_schema_id=key_id, value_schema_id=value_id)
