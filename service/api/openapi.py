"""The OpenAPI 3 document, generated from the marshmallow schemas (apispec MarshmallowPlugin)."""

from __future__ import annotations

from functools import cache
from typing import Any

from apispec import APISpec
from apispec.ext.marshmallow import MarshmallowPlugin

from . import schemas as s

ARROW = "application/vnd.apache.arrow.stream"
PROBLEM = "application/problem+json"

NAME = {"name": "name", "in": "path", "required": True, "schema": {"type": "string"}}
VERSION = {"name": "version", "in": "path", "required": True, "schema": {"type": "string"}}


def _problems(*codes: int) -> dict[str, Any]:
    text = {
        400: "malformed request or schema error",
        401: "a bearer token is needed",
        403: "the token lacks the scope",
        404: "unknown model or version",
        409: "conflict (routing changed meanwhile, or the model is not routed)",
        413: "body or situation count over the limits",
        415: "unsupported media type",
        422: "values that parse but cannot be scored",
        503: "the version cannot be loaded now",
    }
    return {
        str(c): {"description": text[c], "content": {PROBLEM: {"schema": "Problem"}}} for c in codes
    }


def _json(schema: str, description: str) -> dict[str, Any]:
    return {"description": description, "content": {"application/json": {"schema": schema}}}


ARROW_QUERY = [
    {"name": n, "in": "query", "required": False, "schema": {"type": t}, "description": d}
    for n, t, d in (
        ("routing_key", "string", "sticky routing key (Arrow requests)"),
        ("probabilities", "boolean", "return probabilities (default true)"),
        ("logsum", "boolean", "return the logsum"),
        ("expected_max_utility", "boolean", "return logsum + Euler's constant"),
        ("surplus", "boolean", "return consumer surplus"),
        ("elasticities", "string", "comma-separated attribute/context names"),
        ("aggregate", "boolean", "aggregate shares/elasticities in the schema metadata"),
        ("std_errors", "boolean", "delta-method standard errors"),
    )
]


def _score_operation(summary: str, params: list[dict[str, Any]]) -> dict[str, Any]:
    return {
        "summary": summary,
        "parameters": params + ARROW_QUERY,
        "requestBody": {
            "required": True,
            "content": {
                "application/json": {"schema": "ScoreRequest"},
                ARROW: {"schema": {"type": "string", "format": "binary"}},
            },
        },
        "responses": {
            "200": {
                "description": "scores (an Arrow request gets an Arrow long table)",
                "content": {
                    "application/json": {"schema": "ScoreResponse"},
                    ARROW: {"schema": {"type": "string", "format": "binary"}},
                },
            },
            **_problems(400, 401, 403, 404, 409, 413, 415, 422, 503),
        },
    }


@cache
def document() -> dict[str, Any]:
    spec = APISpec(
        title="choicecast",
        version="1.0.0",
        openapi_version="3.0.3",
        plugins=[MarshmallowPlugin()],
        info={
            "description": "Choice probabilities, logsums, consumer surplus and elasticities "
            "of versioned logit-family models."
        },
        components={
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"}},
        },
    )
    for name, schema in (
        ("Problem", s.ProblemSchema),
        ("RoutingState", s.RoutingStateSchema),
        ("ModelSummary", s.ModelSummarySchema),
        ("ModelList", s.ModelListSchema),
        ("ScoreRequest", s.ScoreRequestSchema),
        ("ScoreResponse", s.ScoreResponseSchema),
        ("ScenarioRequest", s.ScenarioRequestSchema),
        ("ScenarioResponse", s.ScenarioResponseSchema),
        ("VersionDetail", s.VersionDetailSchema),
        ("Health", s.HealthSchema),
        ("RoutingChange", s.RoutingChangeSchema),
        ("Promote", s.PromoteSchema),
        ("Rollback", s.RollbackSchema),
        ("RoutingHistory", s.RoutingHistorySchema),
    ):
        spec.components.schema(name, schema=schema)

    spec.path(
        "/livez",
        operations={"get": {"summary": "liveness", "responses": {"200": _json("Health", "alive")}}},
    )
    spec.path(
        "/readyz",
        operations={
            "get": {
                "summary": "readiness: store reachable and every routed version loaded",
                "responses": {"200": _json("Health", "ready"), "503": _json("Health", "degraded")},
            }
        },
    )
    spec.path(
        "/metrics",
        operations={
            "get": {
                "summary": "Prometheus metrics",
                "responses": {
                    "200": {
                        "description": "text format",
                        "content": {"text/plain": {"schema": {"type": "string"}}},
                    }
                },
            }
        },
    )
    spec.path(
        "/openapi.json",
        operations={
            "get": {"summary": "this document", "responses": {"200": {"description": "OpenAPI 3"}}}
        },
    )
    spec.path(
        "/v1/models",
        operations={
            "get": {
                "summary": "models with their versions and routing",
                "responses": {"200": _json("ModelList", "models"), **_problems(401, 403)},
            }
        },
    )
    spec.path(
        "/v1/models/{name}",
        operations={
            "get": {
                "summary": "one model: versions, routing, spec summary",
                "parameters": [NAME],
                "responses": {"200": _json("ModelSummary", "model"), **_problems(401, 403, 404)},
            }
        },
    )
    spec.path(
        "/v1/models/{name}/versions/{version}",
        operations={
            "get": {
                "summary": "one version: full spec, coefficients, manifest with checksums",
                "parameters": [NAME, VERSION],
                "responses": {
                    "200": _json("VersionDetail", "version"),
                    **_problems(401, 403, 404, 503),
                },
            }
        },
    )
    spec.path(
        "/v1/models/{name}/score",
        operations={"post": _score_operation("score situations on the routed version", [NAME])},
    )
    spec.path(
        "/v1/models/{name}/versions/{version}/score",
        operations={
            "post": _score_operation("score situations on a pinned version", [NAME, VERSION])
        },
    )
    spec.path(
        "/v1/models/{name}/scenarios",
        operations={
            "post": {
                "summary": "what-if variants of the same situations: shares, deltas, surplus change, revenue",
                "parameters": [NAME],
                "requestBody": {
                    "required": True,
                    "content": {"application/json": {"schema": "ScenarioRequest"}},
                },
                "responses": {
                    "200": _json("ScenarioResponse", "scenario results"),
                    **_problems(400, 401, 403, 404, 409, 413, 415, 422, 503),
                },
            }
        },
    )
    spec.path(
        "/v1/models/{name}/routing",
        operations={
            "get": {
                "summary": "the current routing state",
                "parameters": [NAME],
                "responses": {"200": _json("RoutingState", "routing"), **_problems(401, 403, 404)},
            },
            "put": {
                "summary": "change the routing (admin token)",
                "parameters": [NAME],
                "security": [{"bearer": []}],
                "requestBody": {
                    "required": True,
                    "content": {"application/json": {"schema": "RoutingChange"}},
                },
                "responses": {
                    "200": _json("RoutingState", "the new state"),
                    **_problems(400, 401, 403, 404, 409, 415, 422, 503),
                },
            },
        },
    )
    for action, schema, summary in (
        ("promote", "Promote", "route 100% to a version (admin token)"),
        ("rollback", "Rollback", "restore the previous routing state (admin token)"),
    ):
        spec.path(
            f"/v1/models/{{name}}/routing/{action}",
            operations={
                "post": {
                    "summary": summary,
                    "parameters": [NAME],
                    "security": [{"bearer": []}],
                    "requestBody": {
                        "required": True,
                        "content": {"application/json": {"schema": schema}},
                    },
                    "responses": {
                        "200": _json("RoutingState", "the new state"),
                        **_problems(400, 401, 403, 404, 409, 415, 422, 503),
                    },
                }
            },
        )
    spec.path(
        "/v1/models/{name}/routing/history",
        operations={
            "get": {
                "summary": "every routing change, oldest first",
                "parameters": [NAME],
                "responses": {
                    "200": _json("RoutingHistory", "history"),
                    **_problems(401, 403, 404),
                },
            }
        },
    )
    return spec.to_dict()
