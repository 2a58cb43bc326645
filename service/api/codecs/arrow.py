"""Arrow IPC streams: a long table in, a long table out (one row per situation, alternative).

Requests use the shared long-table layout (:mod:`service.codecs.long_table`).  Responses:

Columns: ``situation`` (string), ``alternative`` (string), ``available`` (bool), and as
requested ``probability``, ``probability_std_error``, ``logsum``, ``expected_max_utility``,
``surplus`` (per-situation values repeated on each of the situation's rows),
``elasticity.<attr>.<k>`` / ``marginal_effect.<attr>.<k>`` (of this row's probability with
respect to the attribute of alternative k) and ``elasticity.<ctx>`` / ``marginal_effect.<ctx>``
for a context variable.  Rows are situation-major in request order, alternatives in model order.
The schema metadata carries ``choicecast.model``, ``choicecast.version``,
``choicecast.routing`` and, when asked or present, ``choicecast.aggregate`` and
``choicecast.warnings`` (JSON).
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from typing import Any

import numpy as np
import pyarrow as pa

from service.choice import BatchProblem, ScoreResult
from service.codecs.long_table import batch_from_table

from ..problems import FieldError
from .decoded import Decoded
from .results import Outputs

MEDIA_TYPE = "application/vnd.apache.arrow.stream"


def encode_arrow(
    alternatives: Sequence[str],
    ids: Sequence[str],
    available: np.ndarray,
    result: ScoreResult,
    outputs: Outputs,
    metadata: dict[str, Any],
) -> bytes:
    n, n_j = len(ids), len(alternatives)
    situation_ids = pa.array(ids, type=pa.string())
    columns: dict[str, pa.Array] = {
        "situation": situation_ids.take(pa.array(np.repeat(np.arange(n), n_j))),
        "alternative": pa.array(list(alternatives), type=pa.string()).take(
            pa.array(np.tile(np.arange(n_j), n))
        ),
        "available": pa.array(available.reshape(-1)),
    }

    def per_row(arr: np.ndarray) -> pa.Array:
        return pa.array(np.ascontiguousarray(arr).reshape(-1))

    def per_situation(arr: np.ndarray) -> pa.Array:
        return pa.array(np.repeat(arr, n_j))

    if outputs.probabilities and result.probabilities is not None:
        columns["probability"] = per_row(result.probabilities)
    if outputs.std_errors and result.prob_std_errors is not None:
        columns["probability_std_error"] = per_row(result.prob_std_errors)
    for flag, name, arr in (
        (outputs.logsum, "logsum", result.logsum),
        (outputs.expected_max_utility, "expected_max_utility", result.expected_max_utility),
        (outputs.surplus, "surplus", result.surplus),
    ):
        if flag and arr is not None:
            columns[name] = per_situation(arr)
    for name, e in result.elasticities.items():
        for prefix, arr in (("elasticity", e.elasticity), ("marginal_effect", e.marginal_effect)):
            if arr.ndim == 3:
                for k, alt in enumerate(alternatives):
                    columns[f"{prefix}.{name}.{alt}"] = per_row(arr[:, :, k])
            else:
                columns[f"{prefix}.{name}"] = per_row(arr)
    table = pa.table(columns)
    table = table.replace_schema_metadata(
        {f"choicecast.{k}": json.dumps(v, allow_nan=False) for k, v in metadata.items()}
    )
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def decode_arrow(model: Any, table: pa.Table) -> Decoded:
    """An Arrow long table (situation, alternative, attribute columns, available, context
    columns, weight) into a batch, by the shared long-table codec.

    Problems name ``row[<r>].<column>`` (0-based row of the request table) or
    ``column.<name>``; value problems found later name ``situation[<id>].<field>``.
    """
    ids, batch, problems = batch_from_table(model, table)
    errors = tuple(
        FieldError(f"row[{p.row}].{p.column}" if p.row >= 0 else f"column.{p.column}", p.message)
        for p in problems
    )
    id_list = [str(v) for v in ids.to_pylist()] if len(ids) else []

    def locate(p: BatchProblem) -> str:
        if p.situation < 0:
            return ".".join(p.field) or "situations"
        return f"situation[{id_list[p.situation]}]" + "".join(f".{f}" for f in p.field)

    undecoded = frozenset(p.column for p in problems)
    return Decoded(
        ids=id_list, batch=batch, problems=errors, locate=locate, form="arrow", undecoded=undecoded
    )
