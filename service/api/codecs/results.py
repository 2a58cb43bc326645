"""Score results as JSON rows or JSON columns (the Arrow form is in :mod:`.arrow`).

Every alternative of the model is listed in every situation; unavailable ones have
probability 0.  Elasticities of an attribute are nested ``{name: {i: {k: E}}}``: the
elasticity of P_i with respect to the attribute of alternative k; of a context variable
``{name: {i: E}}``.  Marginal effects dP/dx follow the same layout.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from service.choice import BatchProblem, ScoreResult

from ..problems import FieldError, unprocessable


@dataclass(frozen=True)
class Outputs:
    """What the caller asked to get back."""

    probabilities: bool = True
    logsum: bool = False
    expected_max_utility: bool = False
    surplus: bool = False
    elasticities: tuple[str, ...] = ()
    aggregate: bool = False
    std_errors: bool = False


def outputs_from(data: dict[str, Any]) -> Outputs:
    return Outputs(
        probabilities=data.get("probabilities", True),
        logsum=data.get("logsum", False),
        expected_max_utility=data.get("expected_max_utility", False),
        surplus=data.get("surplus", False),
        elasticities=tuple(data.get("elasticities", ())),
        aggregate=data.get("aggregate", False),
        std_errors=data.get("std_errors", False),
    )


def require_finite(result: ScoreResult, locate: Callable[[BatchProblem], str]) -> None:
    """Refuse (422) rather than emit a non-finite number; names the situations."""
    arrays: list[tuple[str, np.ndarray | None]] = [
        ("probabilities", result.probabilities),
        ("logsum", result.logsum),
        ("expected_max_utility", result.expected_max_utility),
        ("surplus", result.surplus),
        ("probability_std_errors", result.prob_std_errors),
    ]
    for name, e in result.elasticities.items():
        arrays += [
            (f"elasticities.{name}", e.elasticity),
            (f"marginal_effects.{name}", e.marginal_effect),
        ]
    errors: list[FieldError] = []
    for name, arr in arrays:
        if arr is None or np.isfinite(arr).all():
            continue
        bad = ~np.isfinite(arr.reshape(arr.shape[0], -1)).all(axis=1)
        for i in np.flatnonzero(bad)[:20]:
            where = locate(BatchProblem(int(i), (), ""))
            errors.append(FieldError(where, f"gives a {name} that is not a finite number"))
    if result.aggregate is not None:
        if not np.isfinite(result.aggregate.shares).all():
            errors.append(FieldError("$", "gives aggregate shares that are not finite"))
        for name, e in result.aggregate.elasticities.items():
            if not np.isfinite(e).all():
                errors.append(
                    FieldError("$", f"gives aggregate elasticities of {name} that are not finite")
                )
    if errors:
        raise unprocessable("the inputs give results that are not finite numbers", errors)


def clear_negative_zeros(result: ScoreResult) -> None:
    """Elasticities and marginal effects with ``-0.0`` made ``0.0``, in place (x + 0.0 is
    +0.0 for x = -0.0 under IEEE 754 round-to-nearest, and x for every other x): an exact
    zero (an attribute the alternative does not use) reads as 0.0 in JSON and Arrow alike."""
    arrays = [a for e in result.elasticities.values() for a in (e.elasticity, e.marginal_effect)]
    if result.aggregate is not None:
        arrays += list(result.aggregate.elasticities.values())
    for arr in arrays:
        np.add(arr, 0.0, out=arr)


def _matrix(alternatives: Sequence[str], rows: list, attribute: bool) -> dict[str, Any]:
    if attribute:
        return {
            a: dict(zip(alternatives, r, strict=True))
            for a, r in zip(alternatives, rows, strict=True)
        }
    return dict(zip(alternatives, rows, strict=True))


def aggregate_json(alternatives: Sequence[str], result: ScoreResult) -> dict[str, Any] | None:
    agg = result.aggregate
    if agg is None:
        return None
    return {
        "shares": dict(zip(alternatives, agg.shares.tolist(), strict=True)),
        "elasticities": {
            name: _matrix(alternatives, e.tolist(), e.ndim == 2)
            for name, e in agg.elasticities.items()
        },
    }


def encode_rows(
    alternatives: Sequence[str],
    ids: Sequence[str],
    result: ScoreResult,
    outputs: Outputs,
    warnings: dict[int, list[FieldError]],
) -> list[dict[str, Any]]:
    """One object per situation."""
    n = len(ids)
    columns: list[tuple[str, list]] = []
    if outputs.probabilities and result.probabilities is not None:
        probs = result.probabilities.tolist()
        columns.append(("probabilities", [dict(zip(alternatives, p, strict=True)) for p in probs]))
    if outputs.std_errors and result.prob_std_errors is not None:
        se = result.prob_std_errors.tolist()
        columns.append(
            ("probability_std_errors", [dict(zip(alternatives, s, strict=True)) for s in se])
        )
    for flag, name, arr in (
        (outputs.logsum, "logsum", result.logsum),
        (outputs.expected_max_utility, "expected_max_utility", result.expected_max_utility),
        (outputs.surplus, "surplus", result.surplus),
    ):
        if flag and arr is not None:
            columns.append((name, arr.tolist()))
    if result.elasticities:
        for key, attr in (("elasticities", "elasticity"), ("marginal_effects", "marginal_effect")):
            per_name = {
                name: [
                    _matrix(alternatives, m, getattr(e, attr).ndim == 3)
                    for m in getattr(e, attr).tolist()
                ]
                for name, e in result.elasticities.items()
            }
            columns.append(
                (key, [{name: per_name[name][i] for name in per_name} for i in range(n)])
            )
    out = []
    for i in range(n):
        row: dict[str, Any] = {"id": ids[i]}
        for name, values in columns:
            row[name] = values[i]
        if i in warnings:
            row["warnings"] = [w.as_dict() for w in warnings[i]]
        out.append(row)
    return out


def encode_columns(
    alternatives: Sequence[str], ids: Sequence[str], result: ScoreResult, outputs: Outputs
) -> dict[str, Any]:
    """One list per quantity and alternative."""

    def by_alt(arr: np.ndarray) -> dict[str, list]:
        return dict(zip(alternatives, arr.T.tolist(), strict=True))

    out: dict[str, Any] = {"id": list(ids)}
    if outputs.probabilities and result.probabilities is not None:
        out["probabilities"] = by_alt(result.probabilities)
    if outputs.std_errors and result.prob_std_errors is not None:
        out["probability_std_errors"] = by_alt(result.prob_std_errors)
    for flag, name, arr in (
        (outputs.logsum, "logsum", result.logsum),
        (outputs.expected_max_utility, "expected_max_utility", result.expected_max_utility),
        (outputs.surplus, "surplus", result.surplus),
    ):
        if flag and arr is not None:
            out[name] = arr.tolist()
    if result.elasticities:
        for key, attr in (("elasticities", "elasticity"), ("marginal_effects", "marginal_effect")):
            block: dict[str, Any] = {}
            for name, e in result.elasticities.items():
                arr = getattr(e, attr)
                if arr.ndim == 3:
                    block[name] = {
                        a: dict(zip(alternatives, arr[:, i, :].T.tolist(), strict=True))
                        for i, a in enumerate(alternatives)
                    }
                else:
                    block[name] = by_alt(arr)
            out[key] = block
    return out
