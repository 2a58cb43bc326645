"""Choosing the version that scores a request: pure functions of the routing weights.

Sticky assignment (common practice for canary releases): u = H(model, key) in [0, 1), where H
is the first 64 bits of SHA-256 of ``model \\0 key`` divided by 2**64; the version is the first
whose cumulative normalised weight exceeds u, versions in sorted order.  The same key meets the
same version while the weights stand; without a key u is drawn at random.
"""

from __future__ import annotations

import hashlib
import random
from collections.abc import Mapping
from dataclasses import dataclass

from model_store.routing import proportions

DECISIONS = ("pinned", "key-sticky", "random")


@dataclass(frozen=True)
class Decision:
    version: str
    decision: str
    """``pinned`` (version named in the path), ``key-sticky`` (routing key) or ``random``."""


def key_position(model: str, key: str) -> float:
    """The routing key's position in [0, 1)."""
    digest = hashlib.sha256(f"{model}\0{key}".encode()).digest()
    return int.from_bytes(digest[:8], "big") / 2.0**64


def pick(weights: Mapping[str, float], u: float) -> str:
    """The version whose cumulative share (sorted versions) first exceeds ``u``."""
    items = sorted((v, share) for v, share in proportions(weights).items() if share > 0)
    if not items:
        raise ValueError("no version has a positive weight")
    cumulative = 0.0
    for version, share in items:
        cumulative += share
        if u < cumulative:
            return version
    return items[-1][0]


def route(
    model: str,
    weights: Mapping[str, float],
    key: str | None,
    rng: random.Random | None = None,
) -> Decision:
    if key is not None:
        return Decision(pick(weights, key_position(model, key)), "key-sticky")
    return Decision(pick(weights, (rng or random).random()), "random")
