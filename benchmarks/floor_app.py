"""The least a one-situation scoring request must do under DESIGN.md, for
benchmarks/request_floor.py: a lower bound of what the service could cost, not a service.

The view does only the steps the contract requires of every scoring request, each in its
cheapest form: a request id and timer (hooks), the body read and parsed as JSON, the real
request envelope schema (marshmallow), routing among the live versions, the one situation's
values copied into arrays, the finiteness and estimation-range checks as two whole-array
comparisons, the utilities and the shifted softmax in NumPy (linear terms, constants and the
context interactions as one product each), a JSON answer naming the version and the routing
decision with its headers, four metric updates in prometheus multiprocess mode and one JSON
access line.  It skips everything a real service needs beyond that (problem details, naming the
offending fields, availability, transforms, nested models, other outputs, shadow, range
policies, the store poller), so a service that does the whole job costs more than this.

It serves the live versions of the demo store's model that the HTTP benchmark scores.
"""

from __future__ import annotations

import json
import os
import sys
import time

import numpy as np
from flask import Flask, Response, g, request

from service.api import metrics
from service.api.access_log import configure_logging, new_request_id, write_access_line
from service.api.config import load_settings
from service.api.routing import route
from service.api.schemas import ScoreRequestSchema
from service.choice import compile_model

MODEL = "wrenmouth_commute"
SCHEMA = ScoreRequestSchema()
ENCODER = json.JSONEncoder(allow_nan=False, separators=(",", ":"))


class Version:
    """One live version's arrays, as the core compiles them."""

    def __init__(self, name: str, compiled: object):
        self.name = name
        self.alternatives = list(compiled.alternatives)  # type: ignore[attr-defined]
        self.attributes = list(compiled.attributes)  # type: ignore[attr-defined]
        self.context = list(compiled.context)  # type: ignore[attr-defined]
        j, a, c = len(self.alternatives), len(self.attributes), len(self.context)
        self.cells = j * a
        self.linear = compiled.linear.reshape(j * a)  # type: ignore[attr-defined]
        self.constants = compiled.constants  # type: ignore[attr-defined]
        self.interactions = np.zeros((c, j))  # one product stands for the context terms
        self.low, self.high = np.full(j * a + c, -1e300), np.full(j * a + c, 1e300)


def _live() -> tuple[dict[str, float], dict[str, Version]]:
    from model_store import open_store

    store = open_store(load_settings(None).store)
    live = dict(store.get_routing(MODEL).live)
    versions = {}
    for name in live:
        loaded = store.load_version(MODEL, name)
        versions[name] = Version(name, compile_model(loaded.spec, loaded.coefficients))
    return live, versions


LIVE, VERSIONS = _live()
configure_logging("info")
app = Flask("floor")


@app.before_request
def _start() -> None:
    state = g._get_current_object()  # type: ignore[attr-defined]
    state.started = time.perf_counter()
    offered = request.environ.get("HTTP_X_REQUEST_ID", "")
    state.request_id = offered or new_request_id()


@app.post(f"/v1/models/{MODEL}/score")
def score() -> Response:
    loaded = SCHEMA.load(json.loads(request.get_data(cache=False)))
    decision = route(MODEL, LIVE, loaded.get("routing_key"))
    m = VERSIONS[decision.version]
    (situation,) = loaded["situations"]
    values = np.empty(len(m.low))
    attributes, context = situation["attributes"], situation.get("context", {})
    i = 0
    for alternative in m.alternatives:
        cells = attributes.get(alternative, {})
        for attribute in m.attributes:
            values[i] = cells.get(attribute, 0.0)
            i += 1
    for variable in m.context:
        values[i] = context.get(variable, 0.0)
        i += 1
    if not ((values >= m.low) & (values <= m.high)).all():  # NaN fails both comparisons
        return Response(b'{"refused":true}', status=422, mimetype="application/json")
    v = (values[: m.cells] * m.linear).reshape(len(m.alternatives), -1).sum(axis=1)
    v += values[m.cells :] @ m.interactions
    v += m.constants
    v -= v.max()
    np.exp(v, out=v)
    v /= v.sum()
    out = {
        "model": MODEL,
        "version": m.name,
        "routing": {"decision": decision.decision, "generation": 1},
        "alternatives": m.alternatives,
        "situations": [
            {
                "id": situation.get("id", "0"),
                "probabilities": dict(zip(m.alternatives, v.tolist(), strict=True)),
            }
        ],
        "warnings": [],
        "warning_count": 0,
    }
    response = Response(ENCODER.encode(out), mimetype="application/json")
    response.headers.extend(
        [
            ("X-Model-Name", MODEL),
            ("X-Model-Version", m.name),
            ("X-Routing-Decision", decision.decision),
            ("X-Routing-Generation", "1"),
        ]
    )
    metrics.child(metrics.ROUTING, MODEL, m.name, decision.decision).inc()
    metrics.child(metrics.SITUATIONS, MODEL, m.name).inc(1)
    g.version = m.name
    return response


@app.after_request
def _finish(response: Response) -> Response:
    state, req = g._get_current_object(), request._get_current_object()  # type: ignore[attr-defined]
    elapsed = time.perf_counter() - state.started
    response.headers["X-Request-ID"] = state.request_id
    rule = req.url_rule.rule if req.url_rule is not None else "unmatched"
    version = state.get("version", "")
    metrics.child(metrics.REQUESTS, MODEL, version, rule, str(response.status_code)).inc()
    metrics.child(metrics.LATENCY, rule).observe(elapsed)
    write_access_line(
        {
            "ts": round(time.time(), 3),
            "type": "access",
            "request_id": state.request_id,
            "method": req.method,
            "path": req.path,
            "route": rule,
            "status": response.status_code,
            "duration_ms": round(elapsed * 1000, 3),
            "model": MODEL,
            "version": version,
            "pid": os.getpid(),
        }
    )
    return response


@app.get("/readyz")
def ready() -> Response:
    return Response(b'{"ready":true}', mimetype="application/json")


if not os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
    sys.exit("floor_app: run it as benchmarks/request_floor.py does (multiprocess metrics)")
