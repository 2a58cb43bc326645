"""Model listing and details: GET /v1/models, /v1/models/{name}, .../versions/{version}."""

from __future__ import annotations

import dataclasses
from typing import Any

from flask import Blueprint, Response, g, jsonify

from service.choice import ScoringError, willingness_to_pay
from service.choice.spec import NAME_PATTERN, spec_to_dict

from .. import auth
from ..context import registry, tokens
from ..problems import not_found, unavailable
from ..registry import ModelRouting, Registry, UnknownModel, UnknownVersion, VersionUnavailable

blueprint = Blueprint("models", __name__)


def routing_dict(routing: ModelRouting | None) -> dict[str, Any] | None:
    if routing is None:
        return None
    return {"generation": routing.generation, "live": dict(routing.live), "shadow": routing.shadow}


def plain(value: Any) -> Any:
    """A manifest (dataclass, mapping or object with ``to_dict``) as plain JSON data."""
    if value is None:
        return None
    if hasattr(value, "to_dict"):
        return value.to_dict()
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return dataclasses.asdict(value)
    if isinstance(value, dict):
        return value
    return {"value": str(value)}


def _versions(name: str) -> list[str]:
    try:
        return registry().list_versions(name)
    except UnknownModel:
        raise not_found(f"no model named {name!r}") from None
    except Exception as exc:
        raise unavailable(f"the store cannot list versions of {name!r}: {exc}") from None


def summary(name: str) -> dict[str, Any]:
    reg = registry()
    routing = reg.routing(name)
    out: dict[str, Any] = {
        "name": name,
        "versions": _versions(name),
        "routing": routing_dict(routing),
    }
    if routing is not None:
        # Spec summary of the version with the largest live weight.
        version = max(routing.live, key=lambda v: (routing.live[v], v))
        loaded = load(reg, name, version)
        spec = spec_to_dict(loaded.spec)
        out.update(
            family=spec["family"],
            alternatives=[a["id"] for a in spec["alternatives"]],
            attributes=spec["attributes"],
            context=spec["context"],
            cost_attribute=loaded.spec.cost_attribute,
        )
    return out


@blueprint.get("/v1/models")
def list_models() -> Response:
    auth.require(tokens(), "score")
    return jsonify({"models": [summary(n) for n in registry().known_models()]})


@blueprint.get("/v1/models/<name>")
def show_model(name: str) -> Response:
    auth.require(tokens(), "score")
    g.model = name
    return jsonify(summary(name))


@blueprint.get("/v1/models/<name>/versions/<version>")
def show_version(name: str, version: str) -> Response:
    auth.require(tokens(), "score")
    g.model, g.version = name, version
    loaded = load(registry(), name, version)
    coefficients = loaded.coefficients
    rows = []
    for i, coef in enumerate(coefficients.names):
        row: dict[str, Any] = {"name": coef, "estimate": float(coefficients.estimates[i])}
        if (
            coefficients.std_errors is not None
            and coefficients.std_errors[i] == coefficients.std_errors[i]
        ):
            row["std_error"] = float(coefficients.std_errors[i])
        rows.append(row)
    try:
        wtp = [
            {"coefficient": w.coefficient, "value": w.value, "std_error": w.std_error}
            for w in willingness_to_pay(loaded.compiled)
        ]
        wtp_unavailable = None
    except ScoringError as exc:
        wtp, wtp_unavailable = None, "; ".join(p.message for p in exc.problems)
    return jsonify(
        {
            "model": name,
            "version": version,
            "spec": spec_to_dict(loaded.spec),
            "coefficients": rows,
            "has_covariance": coefficients.covariance is not None,
            "willingness_to_pay": wtp,
            "willingness_to_pay_unavailable": wtp_unavailable,
            "manifest": plain(loaded.manifest),
        }
    )


def load(reg: Registry, name: str, version: str):
    """The compiled version, or a 404/503 problem."""
    if name not in reg.known_models():
        raise not_found(f"no model named {name!r}")
    if not NAME_PATTERN.match(version):
        raise not_found(f"model {name!r} has no version {version!r}")
    try:
        return reg.get(name, version)
    except UnknownVersion:
        raise not_found(f"model {name!r} has no version {version!r}") from None
    except VersionUnavailable as exc:
        raise unavailable(str(exc)) from None
