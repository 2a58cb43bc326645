"""Liveness (the process answers) and readiness (store reachable, every routed version loaded)."""

from __future__ import annotations

from flask import Blueprint, Response, jsonify

from ..context import registry

blueprint = Blueprint("health", __name__)


@blueprint.get("/livez")
def livez() -> Response:
    return jsonify({"status": "ok"})


@blueprint.get("/readyz")
def readyz() -> tuple[Response, int]:
    snapshot = registry().snapshot
    models = {
        name: {"generation": r.generation, "live": dict(r.live), "shadow": r.shadow}
        for name, r in snapshot.routes.items()
    }
    if snapshot.problems:
        body = {"status": "degraded", "reasons": list(snapshot.problems), "models": models}
        return jsonify(body), 503
    return jsonify({"status": "ready", "reasons": [], "models": models}), 200
