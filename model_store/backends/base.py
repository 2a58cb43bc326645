"""The interface every storage backend implements.

Keys are ``/``-separated paths relative to the store root, e.g.
``models/ferry/versions/v3/manifest.json``. Components never start with ``.``: the
backends use such names for their own temporary files and listings skip them.
"""

from __future__ import annotations

from typing import Protocol


class KeyMissing(LookupError):
    """The key does not exist."""


class KeyExists(Exception):
    """A create-if-absent write found the key already present."""


class Backend(Protocol):
    uri: str
    """Where the store lives, for messages (no credentials)."""

    def get(self, key: str) -> bytes:
        """The whole object; raises :class:`KeyMissing`."""
        ...

    def put_new(self, key: str, data: bytes) -> None:
        """Create ``key`` only if absent, atomically; raises :class:`KeyExists` otherwise.
        The only write: nothing stored is ever replaced."""
        ...

    def exists(self, key: str) -> bool: ...

    def list(self, prefix: str) -> list[str]:
        """Every key under ``prefix`` (a folder ending in ``/``), sorted."""
        ...

    def ensure(self) -> None:
        """Create the root (directory or bucket) if missing."""
        ...

    def check(self) -> None:
        """Raise :class:`~model_store.errors.StoreUnavailable` unless the store answers."""
        ...


def check_key(key: str) -> None:
    """Refuse keys that could escape the root or collide with temporary files."""
    parts = key.split("/")
    if not key or any(not p or p.startswith(".") for p in parts):
        raise ValueError(f"invalid store key {key!r}")
