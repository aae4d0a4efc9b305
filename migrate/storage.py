"""Where bytes live: fsspec URLs, storage options, listing, atomic writes, credential masking.

This module knows nothing about checkpoints. A :class:`Location` is a root URL on one filesystem;
every path the rest of the tool passes in is relative to that root and uses ``/``.

What the format layers need, and nothing more:

* ``list_dir(rel)``: one listing request per directory (object stores charge per request). The
  result is a dict ``name -> Entry`` so callers never probe files one by one.
* ``read_bytes(rel)`` / ``open_read(rel)``: whole-file and streaming reads.
* ``write_bytes(rel, data)``: write a whole file. On local disk it is written to a temporary name
  and renamed, so a reader never sees half a file; on object stores a PUT is atomic already.
* ``put_file(local, rel)``: upload a local file (RocksDB SST files are built on local disk).

A Location opened with ``readonly=True`` refuses every write: the source is never written.
"""

from __future__ import annotations

import os
import re
import uuid
from dataclasses import dataclass, field
from typing import IO, Any
from urllib.parse import urlsplit, urlunsplit

import fsspec

from . import faults
from .errors import CorruptInput, StateshiftError, UsageError

_SECRET_KEYS = re.compile(r"(secret|password|token|key|credential|signature|sas|sig)", re.IGNORECASE)
_QUERY_SECRET = re.compile(
    r"((?:[A-Za-z0-9_.-]*(?:secret|password|token|key|credential|signature|sig|sas)[A-Za-z0-9_.-]*)=)[^&\s]+",
    re.IGNORECASE,
)
MASK = "***"


def mask_url(url: str) -> str:
    """Remove user info (``user:pass@``) and secret-looking query parameters from a URL."""
    if "://" not in url:
        return url
    try:
        parts = urlsplit(url)
    except ValueError:
        return MASK
    netloc = parts.netloc
    if "@" in netloc:
        netloc = MASK + "@" + netloc.rsplit("@", 1)[1]
    query = _QUERY_SECRET.sub(lambda m: m.group(1) + MASK, parts.query)
    return urlunsplit((parts.scheme, netloc, parts.path, query, parts.fragment))


def mask_options(options: dict[str, Any]) -> dict[str, Any]:
    """Storage options with the values of secret-looking keys replaced by ``***``."""
    out: dict[str, Any] = {}
    for k, v in options.items():
        if isinstance(v, dict):
            out[k] = mask_options(v)
        elif _SECRET_KEYS.search(k) and k.lower() not in {"key_prefix"}:
            out[k] = MASK
        else:
            out[k] = v
    return out


def mask_text(text: str, secrets: list[str]) -> str:
    """Replace every literal secret value in free text (error messages, logs)."""
    for s in sorted((s for s in secrets if s and len(s) >= 4), key=len, reverse=True):
        text = text.replace(s, MASK)
    return text


def secret_values(options: dict[str, Any]) -> list[str]:
    """The values of secret-looking storage options, for :func:`mask_text`."""
    found: list[str] = []
    for k, v in options.items():
        if isinstance(v, dict):
            found += secret_values(v)
        elif _SECRET_KEYS.search(k) and isinstance(v, str):
            found.append(v)
    return found


def parse_storage_options(pairs: list[str]) -> dict[str, Any]:
    """``KEY=VALUE`` strings from the command line into fsspec storage options.

    ``a.b=c`` nests (``{"a": {"b": "c"}}``, for ``client_kwargs.endpoint_url=...``); the values
    ``true``/``false`` and integers are converted.
    """
    options: dict[str, Any] = {}
    for pair in pairs:
        if "=" not in pair:
            raise UsageError(f"--storage-option {pair!r} is not KEY=VALUE")
        key, value = pair.split("=", 1)
        typed: Any = value
        if value.lower() in ("true", "false"):
            typed = value.lower() == "true"
        elif re.fullmatch(r"-?\d+", value):
            typed = int(value)
        target = options
        *parents, leaf = key.split(".")
        for p in parents:
            target = target.setdefault(p, {})
        target[leaf] = typed
    return options


@dataclass(frozen=True)
class Entry:
    """One listed child of a directory."""

    name: str
    size: int
    is_dir: bool
    mtime: float | None = None


def _mtime(info: dict[str, Any]) -> float | None:
    for k in ("mtime", "LastModified", "last_modified", "updated", "created"):
        v = info.get(k)
        if v is None:
            continue
        if hasattr(v, "timestamp"):
            return float(v.timestamp())
        try:
            return float(v)
        except (TypeError, ValueError):
            continue
    return None


@dataclass(frozen=True)
class Location:
    """A root URL on one fsspec filesystem."""

    fs: Any
    root: str
    url: str
    readonly: bool = True
    options: dict[str, Any] = field(default_factory=dict, compare=False, repr=False)

    @property
    def display(self) -> str:
        return mask_url(self.url)

    @property
    def is_local(self) -> bool:
        protocol = self.fs.protocol
        names = protocol if isinstance(protocol, (tuple, list)) else (protocol,)
        return "file" in names or "local" in names

    def path(self, rel: str = "") -> str:
        rel = rel.strip("/")
        return f"{self.root}/{rel}" if rel else self.root

    def describe(self, rel: str = "") -> str:
        """A user-facing, credential-free name for a file under this location."""
        base = self.display.rstrip("/")
        return f"{base}/{rel.strip('/')}" if rel else base

    def child(self, rel: str, readonly: bool | None = None) -> "Location":
        ro = self.readonly if readonly is None else readonly
        return Location(self.fs, self.path(rel), self.describe(rel), ro, self.options)

    # ---------------------------------------------------------------- reading
    def list_dir(self, rel: str = "") -> dict[str, Entry]:
        """Children of a directory in one request; an absent directory lists as empty."""
        try:
            infos = self.fs.ls(self.path(rel), detail=True)
        except FileNotFoundError:
            return {}
        except NotADirectoryError:
            return {}
        out: dict[str, Entry] = {}
        base = self.path(rel).rstrip("/")
        for info in infos:
            full = info["name"].rstrip("/")
            name = full.rsplit("/", 1)[-1]
            if full == base or not name:
                continue
            out[name] = Entry(
                name=name,
                size=int(info.get("size") or 0),
                is_dir=info.get("type") == "directory",
                mtime=_mtime(info),
            )
        return out

    def exists(self, rel: str = "") -> bool:
        return bool(self.fs.exists(self.path(rel)))

    def read_bytes(self, rel: str) -> bytes:
        try:
            with self.fs.open(self.path(rel), "rb") as f:
                return f.read()
        except FileNotFoundError as exc:
            raise CorruptInput("file is missing", self.describe(rel)) from exc
        except IsADirectoryError as exc:
            raise CorruptInput("expected a file, found a directory", self.describe(rel)) from exc

    def read_text(self, rel: str) -> str:
        data = self.read_bytes(rel)
        try:
            return data.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise CorruptInput("is not UTF-8 text", self.describe(rel)) from exc

    def open_read(self, rel: str) -> IO[bytes]:
        try:
            return self.fs.open(self.path(rel), "rb")
        except FileNotFoundError as exc:
            raise CorruptInput("file is missing", self.describe(rel)) from exc

    def get_file(self, rel: str, local_path: str) -> None:
        """Download one file to local disk."""
        try:
            self.fs.get_file(self.path(rel), local_path)
        except FileNotFoundError as exc:
            raise CorruptInput("file is missing", self.describe(rel)) from exc

    # ---------------------------------------------------------------- writing
    def _check_writable(self) -> None:
        if self.readonly:
            raise StateshiftError(f"internal error: refusing to write to read-only {self.display}")

    def makedirs(self, rel: str = "") -> None:
        self._check_writable()
        if self.is_local:
            os.makedirs(self.path(rel), exist_ok=True)

    def write_bytes(self, rel: str, data: bytes) -> None:
        """Write a whole file; on local disk through a temporary name and a rename."""
        self._check_writable()
        target = self.path(rel)
        if self.is_local:
            directory = os.path.dirname(target)
            os.makedirs(directory, exist_ok=True)
            tmp = os.path.join(directory, f".stateshift-{uuid.uuid4().hex}.tmp")
            with open(tmp, "wb") as f:
                half = len(data) // 2
                f.write(data[:half])
                faults.reached("mid-file")
                f.write(data[half:])
                f.flush()
                os.fsync(f.fileno())
            os.replace(tmp, target)
        else:
            with self.fs.open(target, "wb") as f:
                f.write(data)
        faults.reached("file-written")

    def put_file(self, local_path: str, rel: str) -> None:
        self._check_writable()
        target = self.path(rel)
        if self.is_local:
            directory = os.path.dirname(target)
            os.makedirs(directory, exist_ok=True)
            tmp = os.path.join(directory, f".stateshift-{uuid.uuid4().hex}.tmp")
            with open(local_path, "rb") as src, open(tmp, "wb") as dst:
                while chunk := src.read(1 << 20):
                    dst.write(chunk)
                dst.flush()
                os.fsync(dst.fileno())
            os.replace(tmp, target)
        else:
            self.fs.put_file(local_path, target)

    def remove(self, rel: str, recursive: bool = False) -> None:
        self._check_writable()
        try:
            self.fs.rm(self.path(rel), recursive=recursive)
        except FileNotFoundError:
            pass


def open_location(url: str, storage_options: dict[str, Any] | None = None, readonly: bool = True) -> Location:
    """Open a local path or fsspec URL as a :class:`Location`."""
    options = dict(storage_options or {})
    try:
        fs, root = fsspec.core.url_to_fs(url, **options)
    except ImportError as exc:
        scheme = url.split("://", 1)[0]
        raise UsageError(
            f"{mask_url(url)}: no filesystem driver for '{scheme}://' is installed "
            f"(install the matching extra, for example: pip install 'stateshift[s3]')"
        ) from exc
    except (ValueError, TypeError) as exc:
        raise UsageError(f"{mask_url(url)}: cannot open this location: {exc}") from exc
    root = root.rstrip("/") or "/"
    if "://" not in url:
        url = os.path.abspath(url)
        root = os.path.abspath(root)
    return Location(fs=fs, root=root, url=url.rstrip("/"), readonly=readonly, options=options)
