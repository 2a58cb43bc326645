"""GET /metrics: the Prometheus text format, merged over all workers."""

from __future__ import annotations

from flask import Blueprint, Response

from .. import metrics

blueprint = Blueprint("metrics", __name__)


@blueprint.get("/metrics")
def scrape() -> Response:
    body, content_type = metrics.render()
    return Response(body, content_type=content_type)
