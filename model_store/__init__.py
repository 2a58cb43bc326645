"""The model store: artifact format v1, storage backends, routing state and history.

    from model_store import open_store
    store = open_store("s3://models/prod", endpoint_url="http://127.0.0.1:9000")
    loaded = store.load_version("ferry", "v3")        # verified spec + coefficients
    state = store.get_routing("ferry")                # live weights, shadow, generation

See docs/artifact-format.md (the format) and docs/operations.md (the ops commands).
"""

from model_store.errors import (
    ArtifactError,
    NotFound,
    RoutingConflict,
    RoutingError,
    StoreError,
    StoreUnavailable,
    VersionExists,
)
from model_store.routing import KEEP_SHADOW, RoutingState
from model_store.store import LoadedVersion, Store
from model_store.uri import DEFAULT_STORE, default_store_uri, open_store

__all__ = [
    "DEFAULT_STORE",
    "KEEP_SHADOW",
    "ArtifactError",
    "LoadedVersion",
    "NotFound",
    "RoutingConflict",
    "RoutingError",
    "RoutingState",
    "Store",
    "StoreError",
    "StoreUnavailable",
    "VersionExists",
    "default_store_uri",
    "open_store",
]
