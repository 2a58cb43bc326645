"""Choosing a backend from a store URI."""

from __future__ import annotations

import os
from urllib.parse import urlparse

from model_store.errors import StoreError
from model_store.store import Store

DEFAULT_STORE = "./var/store"
"""The store used when neither ``--store`` nor ``CHOICECAST_STORE`` is given."""


def default_store_uri() -> str:
    return os.environ.get("CHOICECAST_STORE") or DEFAULT_STORE


def open_store(uri: str | None = None, endpoint_url: str | None = None) -> Store:
    """Open the store at ``uri``: a directory path or ``file://`` URL (filesystem), or
    ``s3://bucket/prefix`` (S3-compatible; ``endpoint_url`` or ``CHOICECAST_S3_ENDPOINT``
    selects a server other than AWS; credentials as usual for boto3).

    ``uri`` defaults to ``CHOICECAST_STORE``, else :data:`DEFAULT_STORE`. Opening does not
    contact the store; call :meth:`Store.check` for that.
    """
    uri = uri or default_store_uri()
    if uri.startswith("s3://"):
        from model_store.backends.s3 import S3Backend

        parsed = urlparse(uri)
        if not parsed.netloc:
            raise StoreError(f"store: {uri!r} names no bucket (s3://bucket/prefix)")
        endpoint = endpoint_url or os.environ.get("CHOICECAST_S3_ENDPOINT") or None
        return Store(S3Backend(parsed.netloc, parsed.path, endpoint))
    if "://" in uri and not uri.startswith("file://"):
        raise StoreError(f"store: unsupported URI scheme in {uri!r} (a path, file:// or s3://)")
    from model_store.backends.filesystem import FileBackend

    path = urlparse(uri).path if uri.startswith("file://") else uri
    return Store(FileBackend(path))
