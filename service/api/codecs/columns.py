"""The columnar JSON form: one list per attribute, one value per situation.

``{"columns": {"id": [...], "attributes": {alt: {attr: [...]}}, "context": {name: [...]},
"available": {alt: [...]}, "weight": [...]}}``.  Columns arrive as NumPy arrays (the schema
converts each list in one step); filling the batch is a copy per column, no per-value loop.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from service.choice import Batch

from ..problems import FieldError
from .decoded import MISSING, Decoded, columns_locator

ROOT = "$.columns"


def column_length(columns: dict[str, Any]) -> int:
    """The number of situations (the longest column; mismatches are reported on decode)."""
    lengths = [len(columns.get("id", ()))]
    lengths += [len(c) for alt in columns.get("attributes", {}).values() for c in alt.values()]
    lengths += [len(c) for c in columns.get("context", {}).values()]
    lengths += [len(c) for c in columns.get("available", {}).values()]
    if "weight" in columns:
        lengths.append(len(columns["weight"]))
    return max(lengths)


def decode_columns(model: Any, columns: dict[str, Any]) -> Decoded:
    n = column_length(columns)
    j_of, a_of, c_of = model.positions
    unset_x, unset_z = model.unset_values
    x = unset_x[None].repeat(n, axis=0)
    z = unset_z[None].repeat(n, axis=0)
    available = np.ones((n, len(model.alternatives)), dtype=bool)
    weights = np.ones(n)
    errors: list[FieldError] = []

    def fits(path: str, column: Any) -> bool:
        if len(column) != n:
            errors.append(FieldError(path, f"has {len(column)} values; other columns have {n}"))
            return False
        return True

    for alt, attrs in columns.get("attributes", {}).items():
        if alt not in j_of:
            errors.append(FieldError(f"{ROOT}.attributes.{alt}", "not an alternative of the model"))
            continue
        for attr, column in attrs.items():
            path = f"{ROOT}.attributes.{alt}.{attr}"
            if attr not in a_of:
                errors.append(FieldError(path, "not an attribute of the model"))
            elif fits(path, column) and model.required[j_of[alt], a_of[attr]]:
                x[:, j_of[alt], a_of[attr]] = column  # a cell no term uses stays 0
    for name, column in columns.get("context", {}).items():
        path = f"{ROOT}.context.{name}"
        if name not in c_of:
            errors.append(FieldError(path, "not a context variable of the model"))
        elif fits(path, column) and model.required_context_mask[c_of[name]]:
            z[:, c_of[name]] = column
    for alt, column in columns.get("available", {}).items():
        path = f"{ROOT}.available.{alt}"
        if alt not in j_of:
            errors.append(FieldError(path, "not an alternative of the model"))
        elif fits(path, column):
            available[:, j_of[alt]] = column
    if "weight" in columns and fits(f"{ROOT}.weight", columns["weight"]):
        weights = columns["weight"]
    if "id" in columns:
        ids = columns["id"]
        fits(f"{ROOT}.id", ids)
    else:
        ids = [str(i) for i in range(n)]
    given = columns.get("attributes", {})
    for j, a in zip(*np.nonzero(model.required), strict=True):
        alt, attr = model.alternatives[j], model.attributes[a]
        if attr not in given.get(alt, {}) and available[:, j].any():
            errors.append(FieldError(f"{ROOT}.attributes.{alt}.{attr}", MISSING))
    for c in np.flatnonzero(model.required_context_mask):
        if model.context[c] not in columns.get("context", {}) and n:
            errors.append(FieldError(f"{ROOT}.context.{model.context[c]}", MISSING))
    batch = Batch(attributes=x, context=z, available=available, weights=weights)
    return Decoded(
        ids=ids, batch=batch, problems=tuple(errors), locate=columns_locator(ROOT), form="columns"
    )
