"""GET /openapi.json: the OpenAPI 3 document generated from the schemas."""

from __future__ import annotations

from flask import Blueprint, Response, jsonify

from ..openapi import document

blueprint = Blueprint("openapi", __name__)


@blueprint.get("/openapi.json")
def openapi_document() -> Response:
    return jsonify(document())
