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
from ..context import registry, settings, tokens
from ..problems import FieldError, bad_request, too_large, unprocessable
from ..schemas import ScenarioRequestSchema
from ..scoring_flow import check_size, dumps, not_finite, read_json, refusal, situation_count
from .models import load
from .scoring import choose

blueprint = Blueprint("scenarios", __name__)
SCENARIO_REQUEST = ScenarioRequestSchema()


TOO_LARGE = {
    "shares": "the weights are too large: their weighted sum overflows",
    "revenue_total": "the weights or costs are too large: sum_n w_n sum_j P_nj cost_nj overflows",
    "revenue_change_total": "the weights or costs are too large: the revenue overflows",
    "surplus_change_total": (
        "the weights are too large for the surplus change: sum_n w_n dCS_n overflows"
    ),
    "surplus_change_mean": "the weights are too large for the surplus change: it overflows",
}
"""Why a scenario total is not finite (its inputs passed the checks, so they are too large)."""


def _finite(value: float | None, path: str, name: str) -> float | None:
    """``value`` as a float; a non-finite one is a 422 naming the result field and its
    inputs."""
    if value is None:
        return None
    if not np.isfinite(value):
        raise unprocessable(
            f"the scenario gives a {name} that is not a finite number",
            [FieldError(f"{path}.{name}", TOO_LARGE[name])],
        )
    return float(value)


def _outcome(alternatives: list[str], outcome: Any, path: str) -> dict[str, Any]:
    """One outcome as JSON; ``path`` is where it sits in the response (``$.base``,
    ``$.variants[2]``), named by a refusal."""
    shares = outcome.shares
    if not np.isfinite(shares).all():
        raise unprocessable(
            "the scenario gives shares that are not finite numbers",
            [FieldError(f"{path}.shares", TOO_LARGE["shares"])],
        )
    out: dict[str, Any] = {
        "name": outcome.name,
        "shares": dict(zip(alternatives, shares.tolist(), strict=True)),
        "revenue_total": _finite(outcome.revenue_total, path, "revenue_total"),
    }
    if hasattr(outcome, "share_deltas") and outcome.share_deltas is not None:
        out["share_deltas"] = dict(zip(alternatives, outcome.share_deltas.tolist(), strict=True))
        for name in ("surplus_change_total", "surplus_change_mean", "revenue_change_total"):
            out[name] = _finite(getattr(outcome, name), path, name)
        out["warnings"] = [
            {"path": f"$.{w.path}", "message": w.message} for w in outcome.located_warnings
        ]
    return out


def _check_work(n: int, model: Any, variants: int, limit: int) -> None:
    """413 when N J (1 + variants) exceeds ``limit`` (max_work): each variant is a copy of
    the batch, scored; measured about 25 bytes of worker memory per unit."""
    work = n * len(model.alternatives) * (1 + variants)
    if work > limit:
        raise too_large(
            f"the scenarios would cause {work:,} units of work (situations x alternatives x "
            f"(1 + variants)), more than the limit of {limit:,} (max_work): send fewer "
            "situations or fewer variants per request",
            [
                FieldError("$", f"{n} situations x {len(model.alternatives)} alternatives"),
                FieldError(
                    "$.variants", f"{variants} variants multiply the work by {1 + variants}"
                ),
            ],
        )


@blueprint.post("/v1/models/<name>/scenarios")
def scenarios(name: str) -> Response:
    auth.require(tokens(), "score")
    g.model = name
    config = settings()
    data = read_json()
    if not isinstance(data, dict):
        raise bad_request("the body must be a JSON object", [FieldError("$", "must be an object")])
    limit = config.max_situations
    check_size(situation_count(data), limit)
    body = SCENARIO_REQUEST.load(data)
    reg = registry()
    decision, generation, _ = choose(
        reg, name, body.get("version"), body.get("routing_key"), shadow_on=False
    )
    loaded = load(reg, name, decision.version)
    g.version, g.decision, g.generation = loaded.version, decision.decision, generation
    model = loaded.compiled
    if "situations" in body:
        decoded = decode_rows(model, body["situations"])
    else:
        check_size(column_length(body["columns"]), limit)
        decoded = decode_columns(model, body["columns"])
    check_size(decoded.batch.size, limit)
    g.situations = decoded.batch.size
    _check_work(decoded.batch.size, model, len(body["variants"]), config.max_work)
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
        "base": _outcome(alternatives, result.base, "$.base"),
        "variants": [
            _outcome(alternatives, v, f"$.variants[{i}]") for i, v in enumerate(result.variants)
        ],
        "surplus_unavailable": result.surplus_unavailable,
        "warnings": [w.as_dict() for w in decoded.errors(check.warnings)],
        "warning_count": check.warning_count,
    }
    response = Response(dumps(out), mimetype="application/json")
    response.headers["X-Model-Name"] = name
    response.headers["X-Model-Version"] = loaded.version
    response.headers["X-Routing-Decision"] = decision.decision
    return response
