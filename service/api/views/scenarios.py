"""POST /v1/models/{name}/scenarios: what-if variants of the same situations.

The base situations come as rows or columns (as for scoring); each variant overrides
attributes (set/add/multiply), removes or adds alternatives.  Returned per variant: weighted
shares, their change from the base, the change in consumer surplus (total and mean) and the
expected revenue and its change where the model has a cost attribute.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from flask import Blueprint, Response, g

from service.choice import Change, ScoringError, Variant, check_batch, run_scenarios
from service.choice.probabilities import UtilityNotFinite

from .. import auth
from ..codecs.columns import column_length, decode_columns
from ..codecs.rows import decode_rows
from ..context import settings, tokens
from ..problems import FieldError, bad_request, unprocessable
from ..schemas import ScenarioRequestSchema
from ..scoring_flow import check_size, dumps, not_finite, read_json, refusal, situation_count
from .models import load
from .scoring import choose

blueprint = Blueprint("scenarios", __name__)
SCENARIO_REQUEST = ScenarioRequestSchema()


def _finite(value: float | None) -> float | None:
    if value is None:
        return None
    if not np.isfinite(value):
        raise unprocessable(
            "the scenario gives a non-finite result", [FieldError("$", "not finite")]
        )
    return float(value)


def _outcome(alternatives: list[str], outcome: Any) -> dict[str, Any]:
    shares = outcome.shares
    if not np.isfinite(shares).all():
        raise unprocessable("the scenario gives non-finite shares", [FieldError("$", "not finite")])
    out: dict[str, Any] = {
        "name": outcome.name,
        "shares": dict(zip(alternatives, shares.tolist(), strict=True)),
        "revenue_total": _finite(outcome.revenue_total),
    }
    if hasattr(outcome, "share_deltas") and outcome.share_deltas is not None:
        out["share_deltas"] = dict(zip(alternatives, outcome.share_deltas.tolist(), strict=True))
        out["surplus_change_total"] = _finite(outcome.surplus_change_total)
        out["surplus_change_mean"] = _finite(outcome.surplus_change_mean)
        out["revenue_change_total"] = _finite(outcome.revenue_change_total)
    return out


@blueprint.post("/v1/models/<name>/scenarios")
def scenarios(name: str) -> Response:
    auth.require(tokens(), "score")
    g.model = name
    data = read_json()
    if not isinstance(data, dict):
        raise bad_request("the body must be a JSON object", [FieldError("$", "must be an object")])
    limit = settings().max_situations
    check_size(situation_count(data), limit)
    body = SCENARIO_REQUEST.load(data)
    decision, generation, _ = choose(name, body.get("version"), body.get("routing_key"))
    loaded = load(name, decision.version)
    g.version, g.decision, g.generation = loaded.version, decision.decision, generation
    model = loaded.compiled
    if "situations" in body:
        decoded = decode_rows(model, body["situations"])
    else:
        check_size(column_length(body["columns"]), limit)
        decoded = decode_columns(model, body["columns"])
    check_size(decoded.batch.size, limit)
    g.situations = decoded.batch.size
    check = check_batch(model, decoded.batch)
    if decoded.problems or check.problems:
        raise refusal(decoded, check)
    variants = [
        Variant(
            name=v["name"],
            changes=tuple(Change(**c) for c in v["changes"]),
            remove=tuple(v["remove"]),
            add=tuple(v["add"]),
        )
        for v in body["variants"]
    ]
    try:
        with np.errstate(all="ignore"):  # non-finite results are refused below (422)
            result = run_scenarios(model, check, variants)
    except UtilityNotFinite as exc:
        raise not_finite(decoded, exc) from None
    except ScoringError as exc:
        raise unprocessable(
            "the scenario cannot be scored",
            [
                FieldError(p.path if p.path.startswith("$") else f"$.{p.path}", p.message)
                for p in exc.problems
            ],
        ) from None
    alternatives = list(model.alternatives)
    out = {
        "model": name,
        "version": loaded.version,
        "routing": {"decision": decision.decision, "generation": generation},
        "alternatives": alternatives,
        "base": _outcome(alternatives, result.base),
        "variants": [_outcome(alternatives, v) for v in result.variants],
        "surplus_unavailable": result.surplus_unavailable,
        "warnings": [w.as_dict() for w in decoded.errors(check.warnings)],
    }
    response = Response(dumps(out), mimetype="application/json")
    response.headers["X-Model-Name"] = name
    response.headers["X-Model-Version"] = loaded.version
    response.headers["X-Routing-Decision"] = decision.decision
    return response
