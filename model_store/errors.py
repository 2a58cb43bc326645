"""The errors the store raises. Every one carries a message naming what is wrong."""

from __future__ import annotations


class StoreError(Exception):
    """Base class of everything the store refuses or fails at."""


class StoreUnavailable(StoreError):
    """The store cannot be reached or used (missing bucket, refused connection, no access)."""


class NotFound(StoreError):
    """An unknown model or version."""


class VersionExists(StoreError):
    """A publish of a version id that is already published (nothing is ever overwritten)."""


class ArtifactError(StoreError):
    """A published version that cannot be trusted: bad checksum, unknown format, bad file.

    ``file`` names the offending file of the version (e.g. ``coefficients.parquet``, whatever
    name it is stored under).
    """

    def __init__(self, model: str, version: str, file: str, message: str):
        self.model, self.version, self.file = model, version, file
        super().__init__(f"{model}/{version}/{file}: {message}")


class RoutingError(StoreError):
    """A routing change that is invalid (unknown versions, bad weights, nothing to roll back)."""


class RoutingConflict(RoutingError):
    """A routing change computed from a stale generation: another change won in between."""

    def __init__(self, model: str, expected: int, current: int):
        self.model, self.expected, self.current = model, expected, current
        super().__init__(
            f"routing of {model!r} changed meanwhile: the change was computed from generation "
            f"{expected} but the current generation is {current}; review it and retry"
        )
