"""Routing state of a model: live weights over versions, an optional shadow, a generation.

Each change is an immutable record ``models/{model}/routing/{generation:010d}.json``; the
current state is the record with the highest generation, and the records are the append-only
history. Generation 0 is the empty state (nothing routed) and has no record. Everything here is
pure; :class:`model_store.store.Store` does the reading and the create-if-absent writes.
"""

from __future__ import annotations

import enum
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from model_store.errors import RoutingError

ACTIONS = ("route", "promote", "rollback")


class Keep(enum.Enum):
    """Marker for a change that keeps the shadow of the state it is computed from."""

    SHADOW = "keep the current shadow"


KEEP_SHADOW = Keep.SHADOW


@dataclass(frozen=True)
class RoutingState:
    model: str
    generation: int
    live: Mapping[str, float] = field(default_factory=dict)
    """Weights as given by the operator (not normalised); all >= 0, sum > 0 when non-empty."""
    shadow: str | None = None
    previous_generation: int | None = None
    action: str | None = None
    changed_by: str | None = None
    changed_at: str | None = None
    reason: str | None = None
    restored_generation: int | None = None
    """For a rollback: the generation whose live/shadow state it restored."""

    @property
    def is_empty(self) -> bool:
        return not self.live

    def shares(self) -> dict[str, float]:
        """Live weights normalised to sum to 1 (the traffic share of each version)."""
        return proportions(self.live)

    def versions(self) -> tuple[str, ...]:
        """Every version this state needs loaded: the live ones, then the shadow."""
        names = [v for v, w in self.live.items() if w > 0]
        if self.shadow is not None and self.shadow not in names:
            names.append(self.shadow)
        return tuple(names)

    def as_dict(self) -> dict[str, Any]:
        return {
            "format_version": 1,
            "model": self.model,
            "generation": self.generation,
            "previous_generation": self.previous_generation,
            "action": self.action,
            "live": dict(self.live),
            "shadow": self.shadow,
            "changed_by": self.changed_by,
            "changed_at": self.changed_at,
            "reason": self.reason,
            "restored_generation": self.restored_generation,
        }


def empty_state(model: str) -> RoutingState:
    return RoutingState(model=model, generation=0)


def record_key(model: str, generation: int) -> str:
    return f"models/{model}/routing/{generation:010d}.json"


def generation_of_key(key: str) -> int | None:
    """The generation a routing record key names, or None for anything else."""
    name = key.rsplit("/", 1)[-1]
    stem, dot, ext = name.partition(".")
    return int(stem) if dot and ext == "json" and len(stem) == 10 and stem.isdigit() else None


def encode(state: RoutingState) -> bytes:
    return (json.dumps(state.as_dict(), indent=2, allow_nan=False) + "\n").encode()


def decode(model: str, generation: int, data: bytes) -> RoutingState:
    """Decode a routing record; raises :class:`RoutingError` naming the record if it is bad."""
    where = f"routing record {record_key(model, generation)}"
    try:
        d = json.loads(data)
        live = {str(k): float(v) for k, v in d["live"].items()}
        if d.get("format_version") != 1 or d.get("generation") != generation:
            raise ValueError("format_version or generation does not match its name")
        return RoutingState(
            model=model,
            generation=generation,
            live=live,
            shadow=d.get("shadow"),
            previous_generation=d.get("previous_generation"),
            action=d.get("action"),
            changed_by=d.get("changed_by"),
            changed_at=d.get("changed_at"),
            reason=d.get("reason"),
            restored_generation=d.get("restored_generation"),
        )
    except (ValueError, KeyError, TypeError, AttributeError) as exc:
        raise RoutingError(f"{where} is unreadable: {exc}") from None


def proportions(weights: Mapping[str, float]) -> dict[str, float]:
    """Weights normalised to sum to 1 ({} without a positive sum), summed in sorted version
    order (the same total on every replica); weights whose sum overflows (near the largest
    float) are first divided by the largest."""
    live = {v: float(w) for v, w in sorted(weights.items())}
    total = sum(live.values())
    if total == math.inf:
        top = max(live.values())
        live = {v: w / top for v, w in live.items()}
        total = sum(live.values())
    return {v: w / total for v, w in live.items()} if total > 0 else {}


def kept_shadow(base: RoutingState, weights: Mapping[str, float]) -> str | None:
    """The shadow a change that keeps it records: the shadow of ``base``, unless the new
    weights make that version the only live one (then no shadow, as ``promote`` does)."""
    if base.shadow is not None and [v for v, w in weights.items() if w > 0] == [base.shadow]:
        return None
    return base.shadow


def check_change(live: Mapping[str, float], shadow: str | None, reason: str) -> dict[str, float]:
    """Validate the numbers of a change: weights finite and >= 0 with a positive sum, the
    shadow not also the only live version, a non-empty reason. Returns the weights as floats.
    """
    if not live:
        raise RoutingError("live: at least one version must be live")
    weights: dict[str, float] = {}
    for version, weight in live.items():
        try:
            w = float(weight)
        except (TypeError, ValueError):
            raise RoutingError(f"live.{version}: weight must be a number") from None
        if not math.isfinite(w) or w < 0:
            raise RoutingError(f"live.{version}: weight must be finite and >= 0, not {weight}")
        weights[version] = w
    total = sum(weights.values())
    if total <= 0:
        raise RoutingError("live: the weights must sum to more than 0")
    if not math.isfinite(total):
        raise RoutingError(
            "live: the weights sum to more than the largest number; give them as shares "
            "(for example 90 and 10)"
        )
    if shadow is not None and [v for v, w in weights.items() if w > 0] == [shadow]:
        raise RoutingError(
            f"shadow: {shadow!r} already takes 100% of live traffic; shadowing it is pointless"
        )
    if not isinstance(reason, str) or not reason.strip():
        raise RoutingError("reason: say why the routing changes")
    return weights
