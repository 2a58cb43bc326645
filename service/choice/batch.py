"""A batch of choice situations as arrays, and its construction from plain records."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.choice.compiled import CompiledModel

RECORD_KEYS = frozenset(("id", "attributes", "context", "available", "weight"))


@dataclass(frozen=True)
class BatchProblem:
    """One bad value of a batch: situation index (-1: the whole batch) and field path."""

    situation: int
    field: tuple[str, ...]
    message: str


@dataclass(frozen=True, eq=False)
class Batch:
    """N choice situations; axes ordered as the compiled model's tuples.

    ``attributes`` (N, J, A) float64, ``context`` (N, C) float64, ``available`` (N, J)
    bool, ``weights`` (N,) float64.  Cells an alternative does not use are ignored.
    """

    attributes: np.ndarray
    context: np.ndarray
    available: np.ndarray
    weights: np.ndarray

    @property
    def size(self) -> int:
        return int(self.attributes.shape[0])

    @classmethod
    def from_records(
        cls, model: CompiledModel, situations: Sequence[Any]
    ) -> tuple[Batch, tuple[BatchProblem, ...]]:
        """Fill arrays from plain dicts, never refusing: returns (batch, problems).

        A record is ``{"attributes": {alt: {attr: value}}, "context": {name: value},
        "available": {alt: bool}, "weight": w}`` (availability defaults to all true, the
        weight to 1; an ``id`` key is ignored).  Missing values the model uses become NaN
        (reported by :func:`check_batch`); unused ones 0, whatever the record gives for them.
        Unknown names and values of the wrong type are reported in ``problems``, their cells
        left NaN (used) or 0 (unused).
        """
        n, n_j = len(situations), len(model.alternatives)
        x_unset, z_unset = model.unset_values
        x = x_unset[None].repeat(n, axis=0)
        z = z_unset[None].repeat(n, axis=0)
        cells = x.reshape(n, x_unset.size)  # a view of x: row i, flat cell j * A + a
        available = np.empty((n, n_j), dtype=bool)
        available.fill(True)
        weights = np.empty(n)
        weights.fill(1.0)
        j_of = model.positions[0]
        cell_of, context_of = model.record_slots
        problems: list[BatchProblem] = []

        def bad(i: int, message: str, *path: str) -> None:
            problems.append(BatchProblem(i, tuple(path), message))

        for i, rec in enumerate(situations):
            if not _is_mapping(rec):
                bad(i, "must be an object")
                continue
            if not _known_keys(rec):
                for key in rec:
                    if not (isinstance(key, str) and key in RECORD_KEYS):
                        bad(i, "unknown field", str(key))
            attrs = rec.get("attributes", {})
            if not _is_mapping(attrs):
                bad(i, "must be an object keyed by alternative", "attributes")
                attrs = {}
            for alt, values in attrs.items():
                slots = cell_of.get(alt)
                if slots is None:
                    bad(i, "not an alternative of the model", "attributes", str(alt))
                    continue
                if not _is_mapping(values):
                    bad(i, "must be an object keyed by attribute", "attributes", alt)
                    continue
                for name, value in values.items():
                    k = slots.get(name)
                    if k is None:
                        bad(i, "not an attribute of the model", "attributes", alt, str(name))
                    elif (v := _number(value)) is None:
                        bad(i, "must be a number", "attributes", alt, name)
                    elif k >= 0:  # values of cells no term uses are ignored (left 0)
                        cells[i, k] = v
            ctx = rec.get("context", {})
            if not _is_mapping(ctx):
                bad(i, "must be an object keyed by context variable", "context")
                ctx = {}
            for name, value in ctx.items():
                c = context_of.get(name)
                if c is None:
                    bad(i, "not a context variable of the model", "context", str(name))
                elif (v := _number(value)) is None:
                    bad(i, "must be a number", "context", name)
                elif c >= 0:
                    z[i, c] = v
            avail = rec.get("available", {})
            if not _is_mapping(avail):
                bad(i, "must be an object keyed by alternative", "available")
                avail = {}
            for alt, flag in avail.items():
                if alt not in j_of:
                    bad(i, "not an alternative of the model", "available", str(alt))
                elif not isinstance(flag, bool):
                    bad(i, "must be true or false", "available", alt)
                else:
                    available[i, j_of[alt]] = flag
            if "weight" in rec:
                w = _number(rec["weight"])
                if w is None:
                    bad(i, "must be a number", "weight")
                weights[i] = np.nan if w is None else w
        return cls(attributes=x, context=z, available=available, weights=weights), tuple(problems)


def _known_keys(record: Mapping) -> bool:
    """Whether every key of the record is a record field (one set test; a mapping with an
    unhashable key is not, and its keys are then named one by one)."""
    try:
        return RECORD_KEYS.issuperset(record)
    except TypeError:
        return False


def _is_mapping(value: Any) -> bool:
    """A mapping (parsed JSON gives dicts: the exact-type test spares the abstract check)."""
    return type(value) is dict or isinstance(value, Mapping)


def _number(value: Any) -> float | None:
    """A JSON number as float (non-finite allowed: check_batch reports it), else None."""
    if type(value) is float:
        return value
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    try:
        return float(value)
    except OverflowError:
        return math.inf if value > 0 else -math.inf
