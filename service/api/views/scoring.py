"""Scoring: POST /v1/models/{name}/score (routed), .../versions/{version}/score (pinned),
and POST /v1/models/{name}/scenarios.  Views parse, call the core, encode."""

from __future__ import annotations

from typing import Any

from flask import Blueprint, Response, g

from .. import auth, metrics
from ..codecs.arrow import MEDIA_TYPE as ARROW
from ..codecs.arrow import encode_arrow
from ..codecs.results import aggregate_json, encode_columns, encode_rows
from ..context import registry, settings, tokens
from ..problems import ApiError, not_found
from ..registry import Registry
from ..routing import Decision, route
from ..scoring_flow import (
    ParsedRequest,
    check_size,
    decode,
    dumps,
    parse_score_request,
    run_score,
    shadow_score,
)
from .models import load

blueprint = Blueprint("scoring", __name__)


@blueprint.post("/v1/models/<name>/score")
def score_routed(name: str) -> Response:
    return _score(name, None)


@blueprint.post("/v1/models/<name>/versions/<version>/score")
def score_pinned(name: str, version: str) -> Response:
    return _score(name, version)


def choose(
    reg: Registry, name: str, pinned: str | None, key: str | None, shadow_on: bool
) -> tuple[Decision, int | None, str | None]:
    """(decision, routing generation, shadow version to score afterwards)."""
    if name not in reg.known_models():
        raise not_found(f"no model named {name!r}")
    routing = reg.routing(name)
    generation = routing.generation if routing is not None else None
    if pinned is not None:
        return Decision(pinned, "pinned"), generation, None
    if routing is None:
        raise ApiError(
            409,
            "not-routed",
            "Model not routed",
            f"model {name!r} has no live version; route one or pin a version "
            f"(/v1/models/{name}/versions/{{version}}/score)",
        )
    decision = route(name, routing.live, key)
    shadow = routing.shadow if shadow_on and routing.shadow != decision.version else None
    return decision, generation, shadow


def _score(name: str, pinned: str | None) -> Response:
    auth.require(tokens(), "score")
    # Resolved once: every lookup through Flask's context proxies costs about a microsecond.
    config, reg, state = settings(), registry(), g._get_current_object()  # type: ignore[attr-defined]
    state.model = name
    parsed: ParsedRequest = parse_score_request(config)
    decision, generation, shadow = choose(reg, name, pinned, parsed.routing_key, config.shadow)
    loaded = load(reg, name, decision.version)
    state.version, state.decision, state.generation = loaded.version, decision.decision, generation
    model = loaded.compiled
    decoded = decode(parsed, model)
    check_size(decoded.batch.size, config.max_situations)
    state.situations = decoded.batch.size
    outputs = parsed.outputs
    result, check, warnings = run_score(model, decoded, outputs, parsed.form, config.max_work)

    alternatives = list(model.alternatives)
    routing_info = {"decision": decision.decision, "generation": generation}
    if parsed.form == "arrow":
        meta: dict[str, Any] = {
            "model": name,
            "version": loaded.version,
            "routing": routing_info,
            "warnings": [w.as_dict() for w in warnings],
            "warning_count": check.warning_count,
        }
        if outputs.aggregate:
            meta["aggregate"] = aggregate_json(alternatives, result)
        body = encode_arrow(
            alternatives, decoded.ids, decoded.batch.available, result, outputs, meta
        )
        response = Response(body, mimetype=ARROW)
    else:
        out: dict[str, Any] = {
            "model": name,
            "version": loaded.version,
            "routing": routing_info,
            "alternatives": alternatives,
        }
        if parsed.form == "rows":
            out["situations"] = encode_rows(alternatives, decoded.ids, result, outputs, {})
        else:
            out["columns"] = encode_columns(alternatives, decoded.ids, result, outputs)
        if outputs.aggregate:
            out["aggregate"] = aggregate_json(alternatives, result)
        out["warnings"] = [w.as_dict() for w in warnings]
        out["warning_count"] = check.warning_count
        response = Response(dumps(out), mimetype="application/json")
    headers = [
        ("X-Model-Name", name),
        ("X-Model-Version", loaded.version),
        ("X-Routing-Decision", decision.decision),
    ]
    if generation is not None:
        headers.append(("X-Routing-Generation", str(generation)))
    response.headers.extend(headers)

    metrics.child(metrics.ROUTING, name, loaded.version, decision.decision).inc()
    metrics.child(metrics.SITUATIONS, name, loaded.version).inc(decoded.batch.size)
    if check.warning_count:
        metrics.child(metrics.OUT_OF_RANGE, name, loaded.version).inc(check.warning_count)
    if shadow is not None and result.probabilities is not None:
        live_p, checked = result.probabilities, check.batch

        def _shadow() -> None:
            shadow_score(reg, name, loaded.version, shadow, parsed, model, checked, live_p)

        response.call_on_close(_shadow)
    return response
