"""Shared cases of the store tests: the ferry model, raw access to stored bytes."""

from __future__ import annotations

import numpy as np

from model_store import Store, open_store
from service.choice.spec import Coefficients, spec_from_dict


def reopen(store: Store) -> Store:
    """The same store opened afresh from its URI (as another process would)."""
    backend = store.backend
    if hasattr(backend, "root"):
        return open_store(str(backend.root))
    return open_store(f"s3://{backend.bucket}/{backend.prefix}", endpoint_url=backend.endpoint_url)


def raw_get(store: Store, key: str) -> bytes:
    """Read a key directly (not through the backend's own code path)."""
    backend = store.backend
    if hasattr(backend, "root"):
        return (backend.root / key).read_bytes()
    full = f"{backend.prefix}/{key}" if backend.prefix else key
    return backend.client.get_object(Bucket=backend.bucket, Key=full)["Body"].read()


def raw_put(store: Store, key: str, data: bytes) -> None:
    """Overwrite a key behind the store's back (to simulate corruption)."""
    backend = store.backend
    if hasattr(backend, "root"):
        path = backend.root / key
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
        return
    full = f"{backend.prefix}/{key}" if backend.prefix else key
    backend.client.put_object(Bucket=backend.bucket, Key=full, Body=data)


FERRY_SPEC = {
    "name": "ferry",
    "family": "multinomial",
    "alternatives": [
        {"id": "fast_boat", "label": "Fast boat"},
        {"id": "slow_boat"},
        {"id": "stay_home", "outside": True},
    ],
    "attributes": [
        {"name": "fare", "unit": "coin", "low": 1.0, "high": 40.0, "role": "cost"},
        {"name": "minutes", "unit": "min", "low": 5.0, "high": 120.0},
    ],
    "context": [{"name": "income", "unit": "kcoin", "low": 5.0, "high": 200.0}],
    "utilities": {
        "fast_boat": [
            {"coefficient": "asc_fast"},
            {"coefficient": "b_fare", "attribute": "fare"},
            {"coefficient": "b_minutes", "attribute": "minutes", "transform": "log"},
        ],
        "slow_boat": [
            {"coefficient": "asc_slow"},
            {"coefficient": "b_fare", "attribute": "fare"},
            {"coefficient": "b_minutes", "attribute": "minutes", "transform": "log"},
            {"coefficient": "b_slow_income", "context": "income"},
        ],
        "stay_home": [],
    },
}
FERRY_NAMES = ("asc_fast", "b_fare", "b_minutes", "asc_slow", "b_slow_income")


def ferry_coefficients(shift: float = 0.0, covariance: bool = True) -> Coefficients:
    est = np.array([0.8 + shift, -0.12, -0.9, 0.3, 0.004])
    se = np.array([0.1, 0.01, 0.05, 0.08, np.nan])
    cov = None
    if covariance:
        jac = np.arange(1.0, 26.0).reshape(5, 5) % 7 + np.eye(5)
        cov = jac.T @ jac * 1e-4  # J^T J is positive semi-definite (common practice)
    return Coefficients(names=FERRY_NAMES, estimates=est, std_errors=se, covariance=cov)


def publish_ferry(store: Store, version: str, shift: float = 0.0, **kw) -> dict:
    return store.publish(
        "ferry",
        version,
        spec_from_dict(FERRY_SPEC),
        ferry_coefficients(shift),
        published_by="tester",
        **kw,
    )
