"""Scoring a loaded version on a reference population (a long table), for the ops workflows."""

from __future__ import annotations

from dataclasses import dataclass

import pyarrow as pa

from model_store.store import LoadedVersion
from service.choice import (
    Batch,
    CompiledModel,
    ScoreOptions,
    ScoreResult,
    ScoringError,
    check_batch,
    compile_model,
    score,
)
from service.choice.spec import Problem
from service.codecs.long_table import RESERVED, batch_from_table


@dataclass(frozen=True, eq=False)
class Scored:
    model: CompiledModel
    batch: Batch
    ids: pa.Array
    result: ScoreResult
    warnings: int
    """Values outside the estimation range (warned or clipped under the spec's policy)."""


def _select(table: pa.Table, model: CompiledModel, also_known: set[str]) -> pa.Table:
    """Drop the columns only ``also_known`` (the other version compared) uses."""
    mine = set(RESERVED) | set(model.attributes) | set(model.context)
    return table.select([c for c in table.column_names if c in mine or c not in also_known])


def score_population(
    loaded: LoadedVersion,
    table: pa.Table,
    options: ScoreOptions,
    also_known: set[str] = frozenset(),  # type: ignore[assignment]
) -> Scored:
    """Convert, check and score; raises :class:`ScoringError` naming rows or situations."""
    model = compile_model(loaded.spec, loaded.coefficients)
    ids, batch, row_problems = batch_from_table(model, _select(table, model, also_known))
    if row_problems:
        raise ScoringError(
            [
                Problem(
                    f"population[row {p.row}].{p.column}"
                    if p.row >= 0
                    else f"population.{p.column}",
                    p.message,
                )
                for p in row_problems
            ]
        )
    checked = check_batch(model, batch)
    if not checked.ok:
        raise ScoringError(
            [
                Problem(
                    f"population[situation {ids[p.situation].as_py() if p.situation >= 0 else '*'}]"
                    + "".join(f".{f}" for f in p.field),
                    p.message,
                )
                for p in checked.problems
            ]
        )
    result = score(model, checked.batch, options)
    return Scored(model, checked.batch, ids, result, checked.warning_count)


def known_columns(loaded: LoadedVersion) -> set[str]:
    spec = loaded.spec
    return {v.name for v in spec.attributes} | {v.name for v in spec.context}
