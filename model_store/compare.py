"""Comparing two versions of a model on a reference population: what a rollout changes."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from model_store.population import known_columns, score_population
from model_store.store import LoadedVersion
from service.choice import ScoreOptions


@dataclass(frozen=True)
class Comparison:
    alternatives: tuple[str, ...]
    shares: tuple[np.ndarray, np.ndarray]
    """Weighted aggregate shares (J,) under each version."""
    cost_attribute: str | None
    cost_elasticities: tuple[np.ndarray, np.ndarray] | None
    """Aggregate elasticity (J, J) of P_i with respect to the cost of j, per version."""
    max_abs_dp: float
    mean_abs_dp: float
    """Over situations and available alternatives: |P2 - P1|."""
    max_abs_dp_by_alternative: np.ndarray
    situations: int
    warnings: tuple[int, int]

    def as_dict(self, names: tuple[str, str]) -> dict:
        out = {
            "situations": self.situations,
            "alternatives": list(self.alternatives),
            "shares": {
                n: dict(zip(self.alternatives, s.tolist(), strict=True))
                for n, s in zip(names, self.shares, strict=True)
            },
            "max_abs_dp": self.max_abs_dp,
            "mean_abs_dp": self.mean_abs_dp,
            "max_abs_dp_by_alternative": dict(
                zip(self.alternatives, self.max_abs_dp_by_alternative.tolist(), strict=True)
            ),
            "range_warnings": dict(zip(names, self.warnings, strict=True)),
            "cost_attribute": self.cost_attribute,
        }
        if self.cost_elasticities is not None:
            out["cost_elasticities"] = {
                n: {
                    alt: dict(zip(self.alternatives, row.tolist(), strict=True))
                    for alt, row in zip(self.alternatives, e, strict=True)
                }
                for n, e in zip(names, self.cost_elasticities, strict=True)
            }
        return out


def compare_versions(a: LoadedVersion, b: LoadedVersion, table: pa.Table) -> Comparison:
    """Score both versions on the same population (sample enumeration with its weights).

    Aggregate elasticity E_ij = sum_n w_n P_ni E_nij / sum_n w_n P_ni (Train 2009,
    sec. 3.6.1, from memory), taken from the core.
    """
    if a.spec.alternative_ids != b.spec.alternative_ids:
        raise ValueError(
            "the versions have different alternatives "
            f"({', '.join(a.spec.alternative_ids)} vs {', '.join(b.spec.alternative_ids)})"
        )
    cost = a.spec.cost_attribute if a.spec.cost_attribute == b.spec.cost_attribute else None
    options = ScoreOptions(aggregate=True, elasticities=(cost,) if cost else ())
    sa = score_population(a, table, options, known_columns(b))
    sb = score_population(b, table, options, known_columns(a))
    pa_, pb = sa.result.probabilities, sb.result.probabilities
    assert pa_ is not None and pb is not None
    assert sa.result.aggregate is not None and sb.result.aggregate is not None
    live = sa.batch.available | sb.batch.available
    dp = np.where(live, np.abs(pb - pa_), 0.0)
    elasticities = None
    if cost:
        elasticities = (
            sa.result.aggregate.elasticities[cost],
            sb.result.aggregate.elasticities[cost],
        )
    return Comparison(
        alternatives=a.spec.alternative_ids,
        shares=(sa.result.aggregate.shares, sb.result.aggregate.shares),
        cost_attribute=cost,
        cost_elasticities=elasticities,
        max_abs_dp=float(dp.max()) if dp.size else 0.0,
        mean_abs_dp=float(dp[live].mean()) if live.any() else 0.0,
        max_abs_dp_by_alternative=dp.max(axis=0) if dp.size else np.zeros(len(a.spec.alternatives)),
        situations=sa.batch.size,
        warnings=(sa.warnings, sb.warnings),
    )
