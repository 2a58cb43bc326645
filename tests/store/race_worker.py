"""A process that makes one routing change at a barrier (for the concurrency test)."""

from __future__ import annotations

from model_store import RoutingConflict, open_store


def race(root: str, version: str, base: int, barrier, results) -> None:
    store = open_store(root)
    barrier.wait(timeout=20)
    try:
        store.change_routing(
            "ferry", {version: 1}, reason="race", changed_by=version, expected_generation=base
        )
        results.put("won")
    except RoutingConflict:
        results.put("conflict")
