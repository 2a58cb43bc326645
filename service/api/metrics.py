"""Prometheus metrics, shared across gunicorn workers.

Under gunicorn, ``server.run`` sets ``PROMETHEUS_MULTIPROC_DIR`` before any worker starts, so
prometheus_client keeps each worker's values in memory-mapped files there and ``/metrics``
merges them (multiprocess mode; the gunicorn ``child_exit`` hook marks dead workers).
Without that variable (tests with the Flask client) the ordinary in-process registry is used.
"""

from __future__ import annotations

import os
from typing import Any

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    REGISTRY,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
    multiprocess,
)

REQUESTS = Counter(
    "choicecast_requests_total",
    "HTTP requests by model, version, route and status.",
    ["model", "version", "route", "status"],
)
LATENCY = Histogram(
    "choicecast_request_duration_seconds",
    "Time from request start to response, by route.",
    ["route"],
    buckets=(0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30),
)
ROUTING = Counter(
    "choicecast_routing_decisions_total",
    "Scoring requests by the version that scored them and how it was chosen.",
    ["model", "version", "decision"],
)
SITUATIONS = Counter(
    "choicecast_situations_scored_total",
    "Choice situations scored, by model and version.",
    ["model", "version"],
)
VALIDATION_FAILURES = Counter(
    "choicecast_validation_failures_total",
    "Requests refused for their content, by model and status (400, 413, 415, 422).",
    ["model", "status"],
)
OUT_OF_RANGE = Counter(
    "choicecast_out_of_range_total",
    "Input values outside the range seen in estimation (warned or clipped), by model and version.",
    ["model", "version"],
)
SHADOW_DIVERGENCE = Histogram(
    "choicecast_shadow_max_abs_dp",
    "Per request, max |P_shadow - P_live| over situations and shared alternatives.",
    ["model", "live_version", "shadow_version"],
    buckets=(0.0, 1e-6, 1e-4, 1e-3, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0),
)
SHADOW_LAST = Gauge(
    "choicecast_shadow_last_max_abs_dp",
    "The most recent shadow divergence (max |dP|) of each model.",
    ["model", "live_version", "shadow_version"],
    multiprocess_mode="mostrecent",
)
SHADOW_FAILURES = Counter(
    "choicecast_shadow_failures_total",
    "Shadow scorings that failed (never visible to the caller).",
    ["model", "shadow_version"],
)
ROUTING_GENERATION = Gauge(
    "choicecast_routing_generation",
    "The routing generation this replica serves, by model.",
    ["model"],
    multiprocess_mode="max",
)
DEGRADED = Gauge(
    "choicecast_degraded",
    "1 when the replica serves a last good state (store unreachable or a version not loaded).",
    multiprocess_mode="max",
)


_children: dict[tuple[Any, tuple[str, ...]], Any] = {}


def child(metric: Any, *labels: str) -> Any:
    """``metric.labels(*labels)``, kept for the next request with the same labels.  Label
    values are bounded (known models, found versions, routes, statuses), so the cache is
    too; it is per process, built after gunicorn forks."""
    key = (metric, labels)
    found = _children.get(key)
    if found is None:
        found = _children[key] = metric.labels(*labels)
    return found


def render() -> tuple[bytes, str]:
    """The Prometheus text exposition of every worker's metrics."""
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        registry = CollectorRegistry()
        multiprocess.MultiProcessCollector(registry)
        return generate_latest(registry), CONTENT_TYPE_LATEST
    return generate_latest(REGISTRY), CONTENT_TYPE_LATEST
