"""Routing over HTTP: read the state and history; change, promote and roll back (admin scope).

Every change goes through the store (validated, append-only history, refused with 409 when
computed from a stale generation); this replica refreshes at once, the others on their poll.
"""

from __future__ import annotations

import hashlib
import re
from typing import Any

from flask import Blueprint, Response, g, jsonify, request

from model_store import KEEP_SHADOW

from .. import auth
from ..context import registry, tokens
from ..problems import ApiError, FieldError, bad_request, not_found, unavailable
from ..schemas import PromoteSchema, RollbackSchema, RoutingChangeSchema
from ..scoring_flow import read_json

blueprint = Blueprint("admin", __name__)

OPERATOR = re.compile(r"^[A-Za-z0-9._@:-]{1,64}$")


def state_dict(state: Any) -> dict[str, Any]:
    return state.as_dict() if hasattr(state, "as_dict") else dict(state)


def _operator() -> str:
    """Who made the change: ``X-Operator`` if sane, plus a fingerprint of the token."""
    header = request.headers.get("Authorization", "")
    token = header.partition(" ")[2].strip()
    fingerprint = hashlib.sha256(token.encode()).hexdigest()[:12] if token else "none"
    operator = request.headers.get("X-Operator", "")
    who = operator if OPERATOR.match(operator) else "http"
    return f"{who} (token {fingerprint})"


def _refused(errors: list[FieldError]) -> ApiError:
    return ApiError(
        422,
        "routing-refused",
        "Routing change refused",
        "the routing change is refused",
        tuple(errors),
    )


def _store_call(name: str, call: Any) -> Any:
    from model_store import NotFound, RoutingConflict, RoutingError, StoreError, StoreUnavailable

    g.model = name
    if name not in registry().known_models():
        raise not_found(f"no model named {name!r}")
    try:
        return call(registry().store)
    except RoutingConflict as exc:
        raise ApiError(409, "routing-conflict", "Routing changed meanwhile", str(exc)) from None
    except NotFound as exc:
        raise not_found(str(exc)) from None
    except RoutingError as exc:
        path, _, message = str(exc).partition(": ")
        error = FieldError(f"$.{path}", message) if message else FieldError("$", str(exc))
        raise _refused([error]) from None
    except StoreUnavailable as exc:
        raise unavailable(str(exc)) from None
    except StoreError as exc:
        raise _refused([FieldError("$", str(exc))]) from None


def _changed(state: Any) -> Response:
    registry().refresh()
    g.generation = state.generation
    return jsonify(state_dict(state))


@blueprint.get("/v1/models/<name>/routing")
def show_routing(name: str) -> Response:
    auth.require(tokens(), "score")
    return jsonify(state_dict(_store_call(name, lambda s: s.get_routing(name))))


@blueprint.get("/v1/models/<name>/routing/history")
def routing_history(name: str) -> Response:
    auth.require(tokens(), "score")
    entries = _store_call(name, lambda s: s.history(name))
    return jsonify({"model": name, "entries": [state_dict(e) for e in entries]})


@blueprint.put("/v1/models/<name>/routing")
def change_routing(name: str) -> Response:
    auth.require(tokens(), "admin")
    body = RoutingChangeSchema().load(_object())
    state = _store_call(
        name,
        lambda s: s.change_routing(
            name,
            body["live"],
            body.get("shadow", KEEP_SHADOW),
            reason=body["reason"],
            changed_by=_operator(),
            expected_generation=body.get("expected_generation"),
        ),
    )
    return _changed(state)


@blueprint.post("/v1/models/<name>/routing/promote")
def promote(name: str) -> Response:
    auth.require(tokens(), "admin")
    body = PromoteSchema().load(_object())
    state = _store_call(
        name,
        lambda s: s.promote(
            name,
            body["version"],
            changed_by=_operator(),
            reason=body.get("reason") or None,
            expected_generation=body.get("expected_generation"),
        ),
    )
    return _changed(state)


@blueprint.post("/v1/models/<name>/routing/rollback")
def rollback(name: str) -> Response:
    auth.require(tokens(), "admin")
    body = RollbackSchema().load(_object())
    state = _store_call(
        name,
        lambda s: s.rollback(
            name,
            changed_by=_operator(),
            reason=body.get("reason") or None,
            expected_generation=body.get("expected_generation"),
        ),
    )
    return _changed(state)


def _object() -> dict[str, Any]:
    data = read_json()
    if not isinstance(data, dict):
        raise bad_request("the body must be a JSON object", [FieldError("$", "must be an object")])
    return data
