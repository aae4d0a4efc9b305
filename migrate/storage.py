"""Where bytes live: fsspec URLs, storage options, listing, atomic writes, credential masking.

This module knows nothing about checkpoints. A :class:`Location` is a root URL on one filesystem;
every path the rest of the tool passes in is relative to that root and uses ``/``.

What the format layers need, and nothing more:

* ``list_dir(rel)``: the children of one directory from one listing request (object stores charge
  per request; on S3 a "directory" is a key prefix, listed with a delimiter). The result is a dict
  ``name -> Entry`` so callers never probe files one by one. Listings are kept by the filesystem
  from the last :func:`open_location` on (which empties the cache) and dropped by the
  filesystem itself when this process writes below them; ``refresh=True`` asks the store again,
  for callers that watch for changes made by someone else (the running-query guard).
* ``read_bytes(rel)`` / ``open_read(rel)``: whole-file (one GET on object stores) and streaming
  reads.
* ``write_bytes(rel, data)``: write a whole file. On local disk it is written to a temporary name
  and renamed, so a reader never sees half a file; on object stores it is one PUT, atomic already.
* ``put_file(local, rel)`` / ``get_file(rel, local)``: upload and download one file (RocksDB SST
  files are built and read on local disk).
* ``remove(rel)``: one delete request; a missing file is not an error.

A Location opened with ``readonly=True`` refuses every write: the source is never written.

Credentials: storage options and URLs can carry secrets. ``Location.display`` / ``describe`` are
the only names shown to people; every error raised here is one line, names the masked path and has
the location's secrets replaced by ``***`` (see :func:`mask_text`). A secret in a URL that the
filesystem would not consume (``s3://KEY:SECRET@bucket/...``) is refused rather than sent on as part
of a bucket name.
"""

from __future__ import annotations

import contextlib
import errno
import os
import re
import shutil
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import IO, Any, NoReturn
from urllib.parse import parse_qsl, unquote, urlsplit, urlunsplit

from . import faults
from .errors import CorruptInput, StateshiftError, SystemFailure, UsageError, os_failure

# The error for a storage request that failed for a reason other than a missing file (unreachable
# endpoint, access denied, throttling, a full or read-only local disk): the machine or the storage
# failed the run (exit 8), which a wrong option value can cause too.
StorageFailure = SystemFailure
#: the name every temporary file of ours starts with (renamed into place once complete)
TEMP_PREFIX = ".stateshift-"
#: errors only writing a file gives: a copy that fails with one failed on the side it writes
_WRITE_SIDE = frozenset((errno.ENOSPC, errno.EDQUOT, errno.EFBIG, errno.EROFS))

_SECRET_WORDS = "secret|password|passwd|token|key|credential|signature|sas|sig"
_SECRET_KEYS = re.compile(rf"({_SECRET_WORDS})", re.IGNORECASE)
_NOT_SECRET_KEYS = {"key_prefix"}
_QUERY_SECRET = re.compile(
    rf"((?:[A-Za-z0-9_.-]*(?:{_SECRET_WORDS})[A-Za-z0-9_.-]*)=)[^&\s]+",
    re.IGNORECASE,
)
# ``scheme://user[:password]@`` anywhere in free text (error messages quote endpoint URLs)
_URL_USERINFO = re.compile(r"\b([A-Za-z][A-Za-z0-9+.-]*://)([^/\s@'\"<>]+)@")
MASK = "***"

# Object stores: no real directories (a write needs no parent; "making" one would cost a request,
# or on s3fs create a bucket), and a tree is every key below a prefix. Local disk is handled apart;
# any other filesystem gets the generic fsspec calls.
_OBJECT_STORES = {"s3", "s3a", "gs", "gcs", "abfs", "abfss", "az"}


def _is_secret_key(key: str) -> bool:
    return bool(_SECRET_KEYS.search(key)) and key.lower() not in _NOT_SECRET_KEYS


#: Azure's URLs name the container before the ``@`` (``abfs://<container>@<account>.dfs...``)
_CONTAINER_SCHEMES = {"abfs", "abfss", "az", "wasb", "wasbs"}


def _names_a_container(parts: Any) -> bool:
    """Whether the part before ``@`` is an Azure container name, not user info: an Azure scheme and
    no password (a ``user:password@`` there is masked like anywhere else)."""
    try:
        return parts.scheme.lower() in _CONTAINER_SCHEMES and parts.password is None
    except ValueError:
        return False


def mask_url(url: str) -> str:
    """Remove user info (``user:pass@``) and secret-looking query parameters from a URL."""
    if "://" not in url:
        return url
    try:
        parts = urlsplit(url)
    except ValueError:
        return MASK
    netloc = parts.netloc
    if "@" in netloc and not _names_a_container(parts):
        netloc = MASK + "@" + netloc.rsplit("@", 1)[1]
    query = _QUERY_SECRET.sub(lambda m: m.group(1) + MASK, parts.query)
    return urlunsplit((parts.scheme, netloc, parts.path, query, parts.fragment))


def url_secrets(url: str) -> list[str]:
    """The secret parts of a URL: the user info and secret-looking query values (raw and decoded)."""
    if "://" not in url:
        return []
    try:
        parts = urlsplit(url)
        user, password = parts.username, parts.password
    except ValueError:
        return []
    found: list[str] = []
    if password:
        found += [password, unquote(password)]
        if user:  # with a password, the user part is an access key id: keep it private too
            found += [user, unquote(user)]
    for k, v in parse_qsl(parts.query, keep_blank_values=False):
        if _is_secret_key(k):
            found.append(v)
    for m in _QUERY_SECRET.finditer(parts.query):  # the raw (still percent-encoded) form
        found.append(m.group(0)[len(m.group(1)) :])
    return [s for s in dict.fromkeys(found) if s]


def mask_options(options: dict[str, Any]) -> dict[str, Any]:
    """Storage options with the values of secret-looking keys replaced by ``***``."""
    out: dict[str, Any] = {}
    for k, v in options.items():
        if isinstance(v, dict):
            out[k] = mask_options(v)
        elif _is_secret_key(k):
            out[k] = MASK
        elif isinstance(v, str) and "://" in v:
            out[k] = mask_url(v)  # an endpoint URL with user info
        else:
            out[k] = v
    return out


def mask_text(text: str, secrets: list[str]) -> str:
    """Replace every literal secret value in free text (error messages, logs), and the user info of
    every URL in it."""
    for s in sorted((s for s in secrets if s and len(s) >= 4), key=len, reverse=True):
        text = text.replace(s, MASK)
    return _URL_USERINFO.sub(_masked_userinfo, text)


def _masked_userinfo(m: re.Match[str]) -> str:
    scheme = m.group(1)[: -len("://")].lower()
    if scheme in _CONTAINER_SCHEMES and ":" not in m.group(2):  # an Azure container name
        return m.group(0)
    return m.group(1) + MASK + "@"


def secret_values(options: dict[str, Any]) -> list[str]:
    """The values of secret-looking storage options (and secrets inside URL values), for :func:`mask_text`."""
    found: list[str] = []
    for k, v in options.items():
        if isinstance(v, dict):
            found += secret_values(v)
        elif isinstance(v, str) and _is_secret_key(k):
            found.append(v)
        elif isinstance(v, str) and "://" in v:
            found += url_secrets(v)
    return found


def parse_storage_options(pairs: list[str]) -> dict[str, Any]:
    """``KEY=VALUE`` strings from the command line into fsspec storage options.

    ``a.b=c`` nests (``{"a": {"b": "c"}}``, for ``client_kwargs.endpoint_url=...``); the values
    ``true``/``false`` and integers are converted. Error messages never repeat a value.
    """
    options: dict[str, Any] = {}
    for number, pair in enumerate(pairs, start=1):
        if "=" not in pair:
            # the text may be a secret with its '=' forgotten: show it only when it cannot be one
            shown = repr(pair) if re.fullmatch(r"[A-Za-z0-9_.-]{1,32}", pair) and not _is_secret_key(pair) else "(text not shown)"
            raise UsageError(f"storage option #{number} {shown} is not KEY=VALUE (a.b=c nests)")
        key, value = pair.split("=", 1)
        typed: Any = value
        if value.lower() in ("true", "false"):
            typed = value.lower() == "true"
        elif re.fullmatch(r"-?\d+", value):
            typed = int(value)
        target = options
        *parents, leaf = key.split(".")
        for p in parents:
            nxt = target.setdefault(p, {})
            if not isinstance(nxt, dict):
                raise UsageError(f"storage option {key}=...: {p} is already set to a plain value")
            target = nxt
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


def _protocols(fs: Any) -> tuple[str, ...]:
    protocol = fs.protocol
    return tuple(protocol) if isinstance(protocol, (tuple, list)) else (protocol,)


# fsspec's local filesystem names itself so (``LocalFileSystem.protocol``)
LOCAL_PROTOCOLS = ("file", "local")


def _local_fs() -> Any:
    """fsspec's local filesystem, imported on first use (fsspec and the asyncio it imports took
    about 50 ms of each process's start; on local disk most calls go to ``os`` directly)."""
    import fsspec

    return fsspec.filesystem("file")


@contextlib.contextmanager
def _removed_on_error(path: str) -> Iterator[None]:
    """Remove the temporary file ``path`` when the block fails (a full disk keeps no half-written
    file taking its space); a process killed in the block leaves it to ``--resume``, which clears
    the folders it rewrites. A failure to remove it does not hide the error that got here."""
    try:
        yield
    except BaseException:
        try:
            os.remove(path)
        except OSError:
            pass
        raise


@dataclass(frozen=True)
class Location:
    """A root URL on one fsspec filesystem. On local disk (``driver`` None, opened without storage
    options) the fsspec filesystem is made only when a call needs one (:attr:`fs`): listing,
    reading, writing, copying, deleting and probing go to ``os`` and ``shutil`` there, so a
    process that only works on local disk, such as a worker, never imports fsspec."""

    driver: Any  # the fsspec filesystem; None for local disk
    root: str
    url: str
    readonly: bool = True
    options: dict[str, Any] = field(default_factory=dict, compare=False, repr=False)
    protocols: tuple[str, ...] = LOCAL_PROTOCOLS

    def __repr__(self) -> str:  # never the raw URL: it may carry credentials
        return f"Location({self.display!r}, readonly={self.readonly})"

    @property
    def fs(self) -> Any:
        """The fsspec filesystem (for local disk made on first use)."""
        return self.driver if self.driver is not None else _local_fs()

    @property
    def display(self) -> str:
        return mask_url(self.url)

    @property
    def is_local(self) -> bool:
        return any(p in LOCAL_PROTOCOLS for p in self.protocols)

    @property
    def _object_store(self) -> bool:
        return any(p in _OBJECT_STORES for p in self.protocols)

    def secrets(self) -> list[str]:
        """Literal secret values this location was opened with (for masking free text)."""
        return secret_values(self.options) + url_secrets(self.url)

    def path(self, rel: str = "") -> str:
        rel = rel.strip("/")
        return f"{self.root}/{rel}" if rel else self.root

    def describe(self, rel: str = "") -> str:
        """A user-facing, credential-free name for a file under this location."""
        base = self.display.rstrip("/")
        return f"{base}/{rel.strip('/')}" if rel else base

    def child(self, rel: str, readonly: bool | None = None) -> Location:
        ro = self.readonly if readonly is None else readonly
        return Location(self.driver, self.path(rel), self.describe(rel), ro, self.options, self.protocols)

    def raise_failure(self, exc: BaseException, rel: str, action: str) -> NoReturn:
        """Raise the one-line error for a request on the file ``rel`` that failed with ``exc``
        outside this class (a writer streaming into a file this location opened)."""
        self._fail(exc, rel, action)

    def _fail(self, exc: BaseException, rel: str, action: str) -> NoReturn:
        """Raise the one-line, credential-free error for a failed storage request."""
        where = self.describe(rel)
        if self.is_local and isinstance(exc, OSError):
            # the local disk, not a storage service: its own words, no endpoint to check
            raise os_failure(exc, action, where) from exc
        if isinstance(exc, PermissionError):
            raise StorageFailure(f"access denied while trying to {action} (check the credentials and permissions)", where) from exc
        detail = mask_text(" ".join(str(exc).split()), self.secrets())[:300]
        raise StorageFailure(
            f"storage request failed while trying to {action}: {type(exc).__name__}: {detail or 'no details'} "
            "(check the endpoint, network and storage options)",
            where,
        ) from exc

    # ---------------------------------------------------------------- reading
    def list_dir(self, rel: str = "", refresh: bool = False) -> dict[str, Entry]:
        """Children of a directory in one request; an absent directory lists as empty.

        ``refresh=True`` ignores the filesystem's listing cache (to see changes made by others).
        """
        target = self.path(rel)
        if self.is_local:
            return self._list_local(rel, target)
        return self._list_fs(rel, target, refresh)

    def _list_fs(self, rel: str, target: str, refresh: bool = False) -> dict[str, Entry]:
        """:meth:`list_dir` through the fsspec filesystem (every location but local disk)."""
        try:
            if refresh:
                self.fs.invalidate_cache(target)
            infos = self.fs.ls(target, detail=True)
        except (FileNotFoundError, NotADirectoryError):
            return {}
        except Exception as exc:  # noqa: BLE001 - any driver error becomes one masked line
            self._fail(exc, rel, "list this directory")
        out: dict[str, Entry] = {}
        base = target.rstrip("/")
        for info in infos:
            full = info["name"].rstrip("/")
            name = full.rsplit("/", 1)[-1]
            if full == base or not name:  # the directory itself, or an S3 "dir/" marker object
                continue
            is_dir = info.get("type") == "directory"
            if name in out and out[name].is_dir != is_dir:
                is_dir = True  # a key "x" and a prefix "x/" side by side: it is a directory
            out[name] = Entry(name=name, size=int(info.get("size") or 0), is_dir=is_dir, mtime=_mtime(info))
        return out

    def _list_local(self, rel: str, target: str) -> dict[str, Entry]:
        """:meth:`list_dir` on local disk, by ``os.scandir``: what :meth:`_list_fs` gives through
        fsspec's local ``ls`` (its entries from ``lstat``: a symbolic link is never a directory
        and has the size of what it points at, 0 when that is gone; an entry removed while
        listing is left out), at about a quarter of its CPU (measured on a 12-file partition
        directory: 212 -> 58 us per listing; a convert lists each partition directory about
        three times). The directory itself is followed when it is a link, as fsspec does."""
        out: dict[str, Entry] = {}
        try:
            with os.scandir(target) as it:
                for e in it:
                    try:
                        st = e.stat(follow_symlinks=False)
                        size = st.st_size
                        if e.is_symlink():
                            try:
                                size = e.stat().st_size
                            except OSError:
                                size = 0
                        out[e.name] = Entry(e.name, size, e.is_dir(follow_symlinks=False), float(st.st_mtime))
                    except FileNotFoundError:
                        continue
        except (FileNotFoundError, NotADirectoryError):
            return {}
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "list this directory")
        return out

    def exists(self, rel: str = "") -> bool:
        try:
            if self.is_local:  # what fsspec's local exists does
                return os.path.exists(self.path(rel))
            return bool(self.fs.exists(self.path(rel)))
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "check that it exists")

    def read_bytes(self, rel: str) -> bytes:
        """The whole file, from one request (``cat_file``: no size probe first)."""
        try:
            if self.is_local:  # fsspec's local cat_file, at a third of its CPU (31 -> 11 us per small file)
                with open(self.path(rel), "rb") as f:
                    return f.read()
            # s3fs asks for the size first (a HEAD) unless it reads with one connection
            kwargs = {"max_concurrency": 1} if "s3" in self.protocols else {}
            return self.fs.cat_file(self.path(rel), **kwargs)
        except FileNotFoundError as exc:
            raise CorruptInput("file is missing", self.describe(rel)) from exc
        except IsADirectoryError as exc:
            raise CorruptInput("expected a file, found a directory", self.describe(rel)) from exc
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "read this file")

    def read_text(self, rel: str) -> str:
        data = self.read_bytes(rel)
        try:
            return data.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise CorruptInput("is not UTF-8 text", self.describe(rel)) from exc

    def open_read(self, rel: str) -> IO[bytes]:
        try:
            if self.is_local:
                return open(self.path(rel), "rb")
            return self.fs.open(self.path(rel), "rb")
        except FileNotFoundError as exc:
            raise CorruptInput("file is missing", self.describe(rel)) from exc
        except IsADirectoryError as exc:
            raise CorruptInput("expected a file, found a directory", self.describe(rel)) from exc
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "open this file")

    def link_file(self, rel: str, local_path: str) -> bool:
        """On local disk, make ``local_path`` a symbolic link to the file (no copy) and return
        True; False on other storage, or when the link cannot be made (the caller copies then).
        The caller must only read through the link: a write would change this location's file."""
        if not self.is_local:
            return False
        try:
            os.symlink(os.path.abspath(self.path(rel)), local_path)
        except OSError:
            return False
        return True

    def get_file(self, rel: str, local_path: str) -> None:
        """Download one file to local disk (one GET on object stores)."""
        try:
            if self.is_local:  # fsspec's local get_file is this copy
                shutil.copyfile(self.path(rel), local_path)
                return
            self.fs.get_file(self.path(rel), local_path)
        except FileNotFoundError as exc:
            raise CorruptInput("file is missing", self.describe(rel)) from exc
        except OSError as exc:
            if exc.errno in _WRITE_SIDE:  # the copy's own disk failed it, not this file
                raise os_failure(exc, f"copy {self.describe(rel)} here", local_path) from exc
            self._fail(exc, rel, "download this file")
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "download this file")

    # ---------------------------------------------------------------- writing
    def _check_writable(self) -> None:
        if self.readonly:
            raise StateshiftError(f"internal error: refusing to write to read-only {self.display}")

    def makedirs(self, rel: str = "") -> None:
        """Make a directory where directories exist (local disk); nothing on object stores."""
        self._check_writable()
        try:
            if self.is_local:
                os.makedirs(self.path(rel), exist_ok=True)
            elif not self._object_store:
                self.fs.makedirs(self.path(rel), exist_ok=True)
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "create this directory")

    def _parent_for_write(self, rel: str) -> None:
        if not self.is_local and not self._object_store:
            self.fs.makedirs(os.path.dirname(self.path(rel)), exist_ok=True)

    def write_bytes(self, rel: str, data: bytes) -> None:
        """Write a whole file; on local disk through a temporary name and a rename, else one PUT."""
        self._check_writable()
        target = self.path(rel)
        try:
            if self.is_local:
                directory = os.path.dirname(target)
                os.makedirs(directory, exist_ok=True)
                tmp = os.path.join(directory, f"{TEMP_PREFIX}{uuid.uuid4().hex}.tmp")
                with _removed_on_error(tmp):
                    with open(tmp, "wb") as f:
                        half = len(data) // 2
                        view = memoryview(data)  # halves without copies of the data
                        f.write(view[:half])
                        faults.reached("mid-file")
                        f.write(view[half:])
                        f.flush()
                        os.fsync(f.fileno())
                    os.replace(tmp, target)
            else:
                # one request; a PUT is all-or-nothing, so "mid-file" means "before the PUT" here
                faults.reached("mid-file")
                self._parent_for_write(rel)
                self.fs.pipe_file(target, data)
        except StateshiftError:
            raise
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "write this file")
        faults.reached("file-written")

    def put_file(self, local_path: str, rel: str) -> None:
        """Upload one local file (one PUT up to the driver's multipart threshold)."""
        self._check_writable()
        target = self.path(rel)
        try:
            if self.is_local:
                directory = os.path.dirname(target)
                os.makedirs(directory, exist_ok=True)
                tmp = os.path.join(directory, f"{TEMP_PREFIX}{uuid.uuid4().hex}.tmp")
                with _removed_on_error(tmp):
                    with open(local_path, "rb") as src, open(tmp, "wb") as dst:
                        while chunk := src.read(1 << 20):
                            dst.write(chunk)
                        dst.flush()
                        os.fsync(dst.fileno())
                    os.replace(tmp, target)
            else:
                self._parent_for_write(rel)
                self.fs.put_file(local_path, target)
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "write this file" if self.is_local else "upload this file")

    def temp_in(self, rel_dir: str) -> str | None:
        """On local disk, a new temporary file name in the directory ``rel_dir`` (made now), for a
        library that writes and syncs a file itself; :meth:`commit_temp` gives it its name there.
        None on other storage (the caller writes elsewhere and uses :meth:`put_file`)."""
        if not self.is_local:
            return None
        self._check_writable()
        directory = self.path(rel_dir)
        try:
            os.makedirs(directory, exist_ok=True)
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel_dir, "make this directory")
        return os.path.join(directory, f"{TEMP_PREFIX}{uuid.uuid4().hex}.tmp")

    def commit_temp(self, tmp: str, rel: str) -> None:
        """Sync a file written at a name from :meth:`temp_in` and give it the name ``rel`` (one
        rename in the same directory: the file appears whole or not at all, its bytes on disk
        first, as :meth:`write_bytes` and :meth:`put_file` do). A writer that synced the file
        already (RocksDB's) costs little more: its pages are clean."""
        self._check_writable()
        try:
            fd = os.open(tmp, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
            os.replace(tmp, self.path(rel))
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "rename this file into place")

    def remove(self, rel: str, recursive: bool = False) -> None:
        """Delete a file (one request, no existence probe), or a whole tree with ``recursive``."""
        self._check_writable()
        target = self.path(rel)
        try:
            if recursive and self._object_store:
                self._remove_tree(target)
            elif self.is_local:
                if recursive and os.path.isdir(target) and not os.path.islink(target):
                    shutil.rmtree(target)
                else:
                    os.remove(target)  # fsspec's local rm_file; a link is removed, not followed
            elif recursive:
                self.fs.rm(target, recursive=True)
            else:
                self.fs.rm_file(target)
        except FileNotFoundError:
            pass
        except Exception as exc:  # noqa: BLE001
            self._fail(exc, rel, "delete this")

    def _remove_tree(self, target: str) -> None:
        """Object stores: the key ``target`` and every key below ``target/`` from ONE listing (of
        the parent, with the name as stem; the generic recursive rm probes with HEAD requests
        first), then bulk deletes of up to 1000 keys per request."""
        parent, _, stem = target.rpartition("/")
        found = self.fs.find(parent, prefix=stem) if parent else self.fs.find(target)
        doomed = sorted({p for p in found if p.rstrip("/") == target or p.startswith(target + "/")})
        if doomed and "s3" in self.protocols:
            self._s3_bulk_delete(doomed)
        elif doomed:
            self.fs.rm(doomed)
        for p in doomed:  # drop cached listings of every directory that lost a child
            self.fs.invalidate_cache(p.rstrip("/").rpartition("/")[0])
        self.fs.invalidate_cache(target)

    def _s3_bulk_delete(self, paths: list[str]) -> None:
        """Delete exact keys, "dir/" marker objects included (s3fs strips their trailing slash)."""
        by_bucket: dict[str, list[str]] = {}
        for p in paths:
            bucket, _, key = p.partition("/")
            by_bucket.setdefault(bucket, []).append(key)
        for bucket, keys in by_bucket.items():
            for i in range(0, len(keys), 1000):
                batch = {"Objects": [{"Key": k} for k in keys[i : i + 1000]], "Quiet": True}
                out = self.fs.call_s3("delete_objects", Bucket=bucket, Delete=batch)
                errors = out.get("Errors") or []
                if errors:
                    first = errors[0]
                    kind = PermissionError if first.get("Code") == "AccessDenied" else OSError
                    raise kind(f"{first.get('Code')}: {first.get('Message')} ({len(errors)} keys not deleted)")


#: the package extra (pyproject.toml) that installs each scheme's fsspec driver
_EXTRAS = {"s3": "s3", "s3a": "s3", "gs": "gcs", "gcs": "gcs", "abfs": "azure", "abfss": "azure", "az": "azure"}


def open_location(url: str, storage_options: dict[str, Any] | None = None, readonly: bool = True) -> Location:
    """Open a local path or fsspec URL as a :class:`Location`.

    The filesystem's listing cache starts empty at every open: a listing made before (by an earlier
    command in the same process) is never reused.
    """
    options = dict(storage_options or {})
    shown = mask_url(url)
    secrets = secret_values(options) + url_secrets(url)
    if not options and _plain_local(url):  # the root and URL fsspec's local filesystem gives; no fsspec needed (see Location)
        if url.startswith("file://"):
            return Location(None, url[len("file://"):].rstrip("/") or "/", url.rstrip("/"), readonly, options)
        return Location(None, os.path.abspath(url), os.path.abspath(url).rstrip("/"), readonly, options)
    try:
        import fsspec

        fs, root = fsspec.core.url_to_fs(url, **options)
        # fsspec shares one instance per (protocol, options) in a process; drop what it has listed
        # so far, so that no listing made before this open is trusted by this command
        fs.invalidate_cache()
    except ImportError as exc:
        scheme = url.split("://", 1)[0]
        extra = _EXTRAS.get(scheme.lower())
        how = f"pip install 'stateshift[{extra}]'" if extra else "install the fsspec driver for it"
        raise UsageError(f"{shown}: no filesystem driver for '{scheme}://' is installed ({how})") from exc
    except Exception as exc:  # bad options, a server unreachable at connect time (ftp, sftp), ...
        detail = mask_text(" ".join(f"{type(exc).__name__}: {exc}".split()), secrets)[:300]
        raise UsageError(f"{shown}: cannot open this location: {detail}") from exc
    leaked = [s for s in url_secrets(url) if s in root]
    if leaked:
        scheme = url.split("://", 1)[0]
        raise UsageError(
            f"{shown}: the '{scheme}://' filesystem does not take credentials in the URL (they would be sent "
            "as part of the path); pass them as storage options, for example -o key=... -o secret=..., "
            "or through the environment"
        )
    root = root.rstrip("/") or "/"
    if "://" not in url:
        url = os.path.abspath(url)
        root = os.path.abspath(root)
    return Location(fs, root, url.rstrip("/"), readonly, options, _protocols(fs))


def _plain_local(url: str) -> bool:
    """A local path, or a ``file://`` URL with an absolute path, that fsspec would open as it is
    (no chained ``::`` URL, no ``~`` to expand)."""
    if "::" in url or url.startswith("~"):
        return False
    if url.startswith("file://"):
        return url[len("file://"):].startswith("/")
    return "://" not in url
