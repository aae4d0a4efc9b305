"""Session fixtures shared by every test directory: a real S3-protocol server on loopback.

``s3_server`` starts moto's standalone server (``ThreadedMotoServer``) on 127.0.0.1 with a free
port, for the whole session, and stops it at the end. It yields an :class:`S3Endpoint`: the
endpoint URL, fake credentials, the ``-o`` options a command line needs, small helpers to make
buckets and move trees in and out, and a recorder of every HTTP request the server received (so
tests can count listings, reads and writes as a store would bill them).

Fake AWS credentials and region are put in the environment only while the fixture is alive, so no
test (nor any subprocess it starts) can fall back to real credentials or an instance-metadata
lookup.

When moto, s3fs or boto3 is missing the S3 tests are skipped on a developer machine and FAIL under
CI (``CI=true``): a CI image without them cannot pass by skipping.
"""

from __future__ import annotations

import logging
import os
import socket
import threading
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import parse_qs, unquote

import pytest

FAKE_KEY_ID = "AKIAFIXTUREKEY000001"
FAKE_SECRET = "fixture-secret-not-real-0000"
REGION = "us-east-1"


def s3_required() -> None:
    """Skip (developer machine) or fail (CI=true) when the S3 test stack is not installed."""
    missing = []
    for module in ("moto.server", "s3fs", "boto3"):
        try:
            __import__(module)
        except Exception as exc:  # noqa: BLE001 - ImportError, or a broken install
            missing.append(f"{module} ({exc.__class__.__name__}: {exc})")
    if not missing:
        return
    reason = "S3 tests need moto[server], s3fs and boto3: missing " + ", ".join(missing)
    if os.environ.get("CI") == "true":
        pytest.fail(f"{reason}, and CI=true", pytrace=False)
    pytest.skip(reason)


@dataclass(frozen=True)
class Request:
    """One HTTP request the server answered (path-style: ``/bucket/key``)."""

    method: str
    bucket: str
    key: str
    query: dict[str, list[str]]

    @property
    def is_list(self) -> bool:
        return self.method == "GET" and not self.key and ("list-type" in self.query or "prefix" in self.query)

    @property
    def prefix(self) -> str:
        return self.query.get("prefix", [""])[0]

    @property
    def is_write(self) -> bool:
        return self.method in ("PUT", "POST", "DELETE")


class RequestLog:
    """Thread-safe record of the requests a WSGI app receives."""

    def __init__(self, app: Any) -> None:
        self._app = app
        self._lock = threading.Lock()
        self._requests: list[Request] = []

    def __call__(self, environ: dict[str, Any], start_response: Any) -> Any:
        path = unquote(environ.get("PATH_INFO", ""))
        bucket, _, key = path.lstrip("/").partition("/")
        query = parse_qs(environ.get("QUERY_STRING", ""), keep_blank_values=True)
        with self._lock:
            self._requests.append(Request(environ.get("REQUEST_METHOD", ""), bucket, key, query))
        return self._app(environ, start_response)

    def clear(self) -> None:
        with self._lock:
            self._requests.clear()

    def all(self) -> list[Request]:
        with self._lock:
            return list(self._requests)

    @staticmethod
    def summary(requests: list[Request]) -> str:
        """A readable dump of requests for assertion messages."""
        lines = []
        for r in requests:
            q = "&".join(f"{k}={v[0]}" for k, v in sorted(r.query.items()) if k in ("prefix", "delimiter"))
            lines.append(f"{r.method} /{r.bucket}/{r.key}{'?' + q if q else ''}")
        return "\n".join(lines)


@dataclass
class S3Endpoint:
    """What a test needs to reach the loopback S3 server."""

    url: str
    key: str
    secret: str
    region: str
    requests: RequestLog
    _buckets: list[str] = field(default_factory=list)
    _client: Any = field(default=None, repr=False)

    @property
    def storage_options(self) -> dict[str, Any]:
        return {"key": self.key, "secret": self.secret, "client_kwargs": {"endpoint_url": self.url, "region_name": self.region}}

    def cli_options(self, key: str | None = None, secret: str | None = None) -> list[str]:
        """``-o`` arguments for the command line (credentials can be overridden per test)."""
        return [
            "-o", f"key={key or self.key}",
            "-o", f"secret={secret or self.secret}",
            "-o", f"client_kwargs.endpoint_url={self.url}",
        ]  # fmt: skip

    def client(self) -> Any:
        """A boto3 client for test setup and checks (made once; boto3 clients are thread-safe)."""
        if self._client is None:
            import boto3

            self._client = boto3.client(
                "s3", endpoint_url=self.url, aws_access_key_id=self.key, aws_secret_access_key=self.secret, region_name=self.region
            )
        return self._client

    def filesystem(self) -> Any:
        """A private s3fs instance (no shared listing cache with anything else)."""
        import s3fs

        return s3fs.S3FileSystem(skip_instance_cache=True, **self.storage_options)

    def new_bucket(self, stem: str = "ckpt") -> str:
        name = f"{stem}-{uuid.uuid4().hex[:12]}"
        self.client().create_bucket(Bucket=name)
        self._buckets.append(name)
        return name

    def upload_tree(self, local: Path, bucket: str, prefix: str) -> int:
        """Upload every file under ``local`` (hidden files included) to ``bucket/prefix/...``."""
        client = self.client()
        count = 0
        for path in sorted(Path(local).rglob("*")):
            if path.is_file():
                rel = path.relative_to(local).as_posix()
                client.put_object(Bucket=bucket, Key=f"{prefix}/{rel}", Body=path.read_bytes())
                count += 1
        assert count, f"{local}: nothing to upload"
        return count

    def download_tree(self, bucket: str, prefix: str, local: Path) -> int:
        """Download every object under ``bucket/prefix/`` into ``local`` (keys become paths)."""
        client = self.client()
        count = 0
        for key in self.objects(bucket, prefix):
            rel = key[len(prefix) + 1 :]
            if not rel or rel.endswith("/"):
                continue
            target = Path(local) / rel
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(client.get_object(Bucket=bucket, Key=key)["Body"].read())
            count += 1
        return count

    def objects(self, bucket: str, prefix: str = "") -> dict[str, tuple[str, int]]:
        """key -> (ETag, size) of every object under ``prefix/`` (listed without a delimiter)."""
        client = self.client()
        out: dict[str, tuple[str, int]] = {}
        kwargs: dict[str, Any] = {"Bucket": bucket, "Prefix": f"{prefix}/" if prefix else ""}
        while True:
            page = client.list_objects_v2(**kwargs)
            for obj in page.get("Contents", []):
                out[obj["Key"]] = (obj["ETag"], int(obj["Size"]))
            if not page.get("IsTruncated"):
                return out
            kwargs["ContinuationToken"] = page["NextContinuationToken"]

    def read(self, bucket: str, key: str) -> bytes:
        return self.client().get_object(Bucket=bucket, Key=key)["Body"].read()


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line("markers", "s3: talks to the loopback S3-protocol server (selected with -m s3)")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    for item in items:
        if {"s3_server", "s3_stack"} & set(getattr(item, "fixturenames", ())):
            item.add_marker(pytest.mark.s3)


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture()
def s3_stack() -> None:
    """For tests that need s3fs but no server: the same skip-or-fail rule as ``s3_server``."""
    s3_required()


@pytest.fixture(scope="session")
def s3_server() -> Iterator[S3Endpoint]:
    """moto's S3 server on loopback for the whole session; fake credentials in the environment."""
    s3_required()
    from moto.server import ThreadedMotoServer

    env = {
        "AWS_ACCESS_KEY_ID": FAKE_KEY_ID,
        "AWS_SECRET_ACCESS_KEY": FAKE_SECRET,
        "AWS_DEFAULT_REGION": REGION,
        "AWS_REGION": REGION,
        "AWS_EC2_METADATA_DISABLED": "true",
        "AWS_CONFIG_FILE": os.devnull,
        "AWS_SHARED_CREDENTIALS_FILE": os.devnull,
    }
    mp = pytest.MonkeyPatch()
    for k, v in env.items():
        mp.setenv(k, v)
    for k in ("AWS_PROFILE", "AWS_SESSION_TOKEN", "AWS_ENDPOINT_URL", "AWS_ENDPOINT_URL_S3"):
        mp.delenv(k, raising=False)
    # one log line per request on stderr would drown test output; the RequestLog keeps them instead
    werkzeug_logger = logging.getLogger("werkzeug")
    old_level = werkzeug_logger.level
    werkzeug_logger.setLevel(logging.WARNING)
    server = ThreadedMotoServer(ip_address="127.0.0.1", port=_free_port(), verbose=False)
    server.start()
    try:
        host, port = server.get_host_and_port()
        wsgi = getattr(server, "_server", None)
        if wsgi is None or not hasattr(wsgi, "app"):
            pytest.fail("cannot attach the request recorder: moto's ThreadedMotoServer changed its internals", pytrace=False)
        log = RequestLog(wsgi.app)
        wsgi.app = log  # the werkzeug handler calls server.app for every request
        yield S3Endpoint(url=f"http://{host}:{port}", key=FAKE_KEY_ID, secret=FAKE_SECRET, region=REGION, requests=log)
    finally:
        server.stop()
        werkzeug_logger.setLevel(old_level)
        mp.undo()
