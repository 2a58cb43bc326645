"""The S3-compatible object-storage backend (boto3), for stores shared by a cluster.

``put_new`` is a PutObject with ``If-None-Match: *``: the server refuses it with 412 when the
key exists (S3 conditional writes, AWS documentation "Conditional requests"). Objects are
written whole, so readers never see a partial object. A boto3 client is thread-safe and is
kept per process: a store opened before a fork gets its own client in the child.
"""

from __future__ import annotations

import os
import threading

import boto3
import botocore.exceptions
from botocore.config import Config

from model_store.backends.base import KeyExists, KeyMissing, check_key
from model_store.errors import StoreUnavailable

_MISSING = {"NoSuchKey", "404", "NotFound"}
_EXISTS = {"PreconditionFailed", "412", "ConditionalRequestConflict", "409"}
_UNAVAILABLE_EXC = (
    botocore.exceptions.EndpointConnectionError,
    botocore.exceptions.ConnectTimeoutError,
    botocore.exceptions.ReadTimeoutError,
    botocore.exceptions.NoCredentialsError,
    botocore.exceptions.PartialCredentialsError,
)

_CLIENTS: dict[tuple, object] = {}
_CLIENTS_LOCK = threading.Lock()


def _client(endpoint_url: str | None):
    """One boto3 client per process and endpoint (clients are thread-safe, costly to build)."""
    region = os.environ.get("AWS_DEFAULT_REGION") or os.environ.get("AWS_REGION") or "us-east-1"
    key = (
        os.getpid(),
        endpoint_url,
        region,
        os.environ.get("AWS_ACCESS_KEY_ID"),
        os.environ.get("CHOICECAST_S3_CONNECT_TIMEOUT"),
        os.environ.get("CHOICECAST_S3_READ_TIMEOUT"),
    )
    with _CLIENTS_LOCK:
        client = _CLIENTS.get(key)
        if client is None:
            config = Config(
                connect_timeout=float(os.environ.get("CHOICECAST_S3_CONNECT_TIMEOUT", "3")),
                read_timeout=float(os.environ.get("CHOICECAST_S3_READ_TIMEOUT", "20")),
                retries={"max_attempts": 3, "mode": "standard"},
                s3={"addressing_style": "path"} if endpoint_url else {},
            )
            session = boto3.session.Session()
            client = session.client(
                "s3", endpoint_url=endpoint_url, config=config, region_name=region
            )
            _CLIENTS[key] = client
        return client


class S3Backend:
    def __init__(self, bucket: str, prefix: str = "", endpoint_url: str | None = None):
        self.bucket = bucket
        self.prefix = prefix.strip("/")
        self.endpoint_url = endpoint_url
        self.uri = f"s3://{bucket}/{self.prefix}" + (f" at {endpoint_url}" if endpoint_url else "")
        _client(endpoint_url)  # build it now: configuration errors surface at open

    @property
    def client(self):
        """This process's client (looked up per call, so a store opened before a fork gets
        a fresh client and connection pool in the child)."""
        return _client(self.endpoint_url)

    def _key(self, key: str) -> str:
        check_key(key)
        return f"{self.prefix}/{key}" if self.prefix else key

    def _fail(self, exc: Exception) -> Exception:
        """Translate a botocore error into the store's vocabulary."""
        if isinstance(exc, _UNAVAILABLE_EXC):
            return StoreUnavailable(f"store {self.uri}: {exc}")
        if isinstance(exc, botocore.exceptions.ClientError):
            code = str(exc.response.get("Error", {}).get("Code", ""))
            if code == "NoSuchBucket":
                return StoreUnavailable(f"store {self.uri}: bucket {self.bucket!r} does not exist")
            if code in ("AccessDenied", "InvalidAccessKeyId", "SignatureDoesNotMatch"):
                return StoreUnavailable(f"store {self.uri}: access refused ({code})")
            return StoreUnavailable(f"store {self.uri}: {code or exc}")
        if isinstance(exc, botocore.exceptions.BotoCoreError):
            return StoreUnavailable(f"store {self.uri}: {exc}")
        return exc

    @staticmethod
    def _code(exc: botocore.exceptions.ClientError) -> str:
        return str(exc.response.get("Error", {}).get("Code", ""))

    def get(self, key: str) -> bytes:
        try:
            return self.client.get_object(Bucket=self.bucket, Key=self._key(key))["Body"].read()
        except botocore.exceptions.ClientError as exc:
            if self._code(exc) in _MISSING:
                raise KeyMissing(key) from None
            raise self._fail(exc) from exc
        except botocore.exceptions.BotoCoreError as exc:
            raise self._fail(exc) from exc

    def put_new(self, key: str, data: bytes) -> None:
        try:
            self.client.put_object(
                Bucket=self.bucket, Key=self._key(key), Body=data, IfNoneMatch="*"
            )
        except botocore.exceptions.ClientError as exc:
            if self._code(exc) in _EXISTS:
                raise KeyExists(key) from None
            raise self._fail(exc) from exc
        except botocore.exceptions.BotoCoreError as exc:
            raise self._fail(exc) from exc

    def exists(self, key: str) -> bool:
        try:
            self.client.head_object(Bucket=self.bucket, Key=self._key(key))
            return True
        except botocore.exceptions.ClientError as exc:
            if self._code(exc) in _MISSING:
                return False
            raise self._fail(exc) from exc
        except botocore.exceptions.BotoCoreError as exc:
            raise self._fail(exc) from exc

    def list(self, prefix: str) -> list[str]:
        full = self._key(prefix.rstrip("/")) + "/"
        cut = len(self.prefix) + 1 if self.prefix else 0
        keys: list[str] = []
        try:
            pages = self.client.get_paginator("list_objects_v2").paginate(
                Bucket=self.bucket, Prefix=full
            )
            for page in pages:
                keys += [item["Key"][cut:] for item in page.get("Contents", [])]
        except (botocore.exceptions.ClientError, botocore.exceptions.BotoCoreError) as exc:
            raise self._fail(exc) from exc
        return sorted(k for k in keys if not any(p.startswith(".") for p in k.split("/")))

    def ensure(self) -> None:
        try:
            self.client.head_bucket(Bucket=self.bucket)
        except botocore.exceptions.ClientError as exc:
            if self._code(exc) not in ("404", "NoSuchBucket", "NotFound"):
                raise self._fail(exc) from exc
            try:
                region = self.client.meta.region_name
                extra = (
                    {"CreateBucketConfiguration": {"LocationConstraint": region}}
                    if region and region != "us-east-1"
                    else {}
                )
                self.client.create_bucket(Bucket=self.bucket, **extra)
            except (botocore.exceptions.ClientError, botocore.exceptions.BotoCoreError) as e:
                raise self._fail(e) from e
        except botocore.exceptions.BotoCoreError as exc:
            raise self._fail(exc) from exc

    def check(self) -> None:
        try:
            self.client.head_bucket(Bucket=self.bucket)
        except botocore.exceptions.ClientError as exc:
            if self._code(exc) in ("404", "NoSuchBucket", "NotFound"):
                raise StoreUnavailable(
                    f"store {self.uri}: bucket {self.bucket!r} does not exist"
                ) from None
            raise self._fail(exc) from exc
        except botocore.exceptions.BotoCoreError as exc:
            raise self._fail(exc) from exc
