"""Health, readiness and the last good state; tokens; OpenAPI; request ids; model listing."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from http_models import situation
from openapi_spec_validator import validate
from scipy import stats

from model_store import open_store
from service.api import create_app
from service.api.routing import key_position, pick, route
from service.api.schemas import HealthSchema, ModelListSchema, VersionDetailSchema

SCORE = "/v1/models/harbour/score"
SCORE_TOKEN = "s" * 20
ADMIN_TOKEN = "a" * 20


def make_app(store: str, **config):
    return create_app({"store": store, "poll_seconds": 0, "access_log": False, **config})


def test_readiness_degrades_and_recovers_keeping_the_last_good_state(fresh_store):
    app = make_app(fresh_store)
    client = app.test_client()
    registry = app.extensions["choicecast.registry"]
    assert client.get("/readyz").status_code == 200
    moved = Path(fresh_store).with_name("moved")
    shutil.move(fresh_store, moved)
    try:
        # The store root replaced by a plain file: the store cannot be used at all.
        Path(fresh_store).write_text("not a store")
        registry.refresh()
        r = client.get("/readyz")
        body = HealthSchema().load(r.get_json())
        assert r.status_code == 503 and body["status"] == "degraded"
        assert "store unreachable" in body["reasons"][0]
        assert client.get("/livez").status_code == 200
        # The routed, already compiled version keeps serving.
        r = client.post(SCORE, json={"situations": [situation(0)]})
        assert r.status_code == 200 and r.get_json()["version"] == "v1"
        # An empty store (the directory gone): the routed model is kept and reported.
        Path(fresh_store).unlink()
        registry.refresh()
        r = client.get("/readyz")
        assert r.status_code == 503 and "no longer listed" in r.get_json()["reasons"][0]
        assert client.post(SCORE, json={"situations": [situation(0)]}).status_code == 200
    finally:
        Path(fresh_store).unlink(missing_ok=True)
        shutil.move(moved, fresh_store)
    registry.refresh()
    assert client.get("/readyz").status_code == 200


def test_a_version_that_fails_to_load_is_never_routed(fresh_store):
    app = make_app(fresh_store)
    client = app.test_client()
    store = open_store(fresh_store)
    store.change_routing("harbour", {"v1": 0.5, "v2": 0.5}, reason="split", changed_by="tests")
    # Corrupt v2 after the (validated) change: this replica has not loaded it yet.
    coefficients = Path(fresh_store) / store.stored_key("harbour", "v2", "coefficients.parquet")
    coefficients.write_bytes(coefficients.read_bytes()[:-7] + b"garbage")
    app.extensions["choicecast.registry"].refresh()
    r = client.get("/readyz")
    assert r.status_code == 503
    assert any("v2" in reason for reason in r.get_json()["reasons"])
    versions = {
        client.post(SCORE, json={"routing_key": f"k{i}", "situations": [situation(0)]}).get_json()[
            "version"
        ]
        for i in range(40)
    }
    assert versions == {"v1"}  # the last good routing (generation 1)
    r = client.post("/v1/models/harbour/versions/v2/score", json={"situations": [situation(0)]})
    assert r.status_code == 503 and r.mimetype == "application/problem+json"


def test_scoring_is_open_without_tokens_and_admin_is_refused(client):
    assert client.post(SCORE, json={"situations": [situation(0)]}).status_code == 200
    r = client.put("/v1/models/harbour/routing", json={"live": {"v1": 1}, "reason": "x"})
    assert r.status_code == 403 and "no admin token" in r.get_json()["detail"]


@pytest.mark.parametrize("source", ["env", "file"])
def test_tokens_and_scopes(store_uri, tmp_path, monkeypatch, source):
    if source == "env":
        monkeypatch.setenv("CHOICECAST_SCORE_TOKENS", SCORE_TOKEN)
        monkeypatch.setenv("CHOICECAST_ADMIN_TOKENS", ADMIN_TOKEN)
        app = make_app(store_uri)
    else:
        path = tmp_path / "tokens.json"
        path.write_text(json.dumps({"score": [SCORE_TOKEN], "admin": [ADMIN_TOKEN]}))
        app = make_app(store_uri, tokens_file=str(path))
    client = app.test_client()
    body = {"situations": [situation(0)]}
    r = client.post(SCORE, json=body)
    assert r.status_code == 401 and r.headers["WWW-Authenticate"].startswith("Bearer")
    assert SCORE_TOKEN not in r.get_data(as_text=True)
    assert (
        client.post(SCORE, json=body, headers={"Authorization": "Bearer wrong"}).status_code == 403
    )
    for token in (SCORE_TOKEN, ADMIN_TOKEN):  # admin implies score
        r = client.post(SCORE, json=body, headers={"Authorization": f"Bearer {token}"})
        assert r.status_code == 200
    change = {"live": {"v1": 1.0}, "reason": "re-affirm", "expected_generation": 99}
    r = client.put(
        "/v1/models/harbour/routing",
        json=change,
        headers={"Authorization": f"Bearer {SCORE_TOKEN}"},
    )
    assert r.status_code == 403
    r = client.put(
        "/v1/models/harbour/routing",
        json=change,
        headers={"Authorization": f"Bearer {ADMIN_TOKEN}"},
    )
    assert r.status_code == 409  # authorised; refused only for the stale generation
    # Health, metrics and the OpenAPI document stay open for probes and scrapers.
    for path in ("/livez", "/readyz", "/metrics", "/openapi.json"):
        assert client.get(path).status_code == 200


def test_short_tokens_are_refused_at_start(store_uri, monkeypatch):
    from service.api.config import ConfigError

    monkeypatch.setenv("CHOICECAST_SCORE_TOKENS", "short")
    with pytest.raises(ConfigError):
        make_app(store_uri)


def test_openapi_document_is_valid_and_covers_every_route(client):
    doc = client.get("/openapi.json").get_json()
    validate(doc)  # openapi-spec-validator: OpenAPI 3.0 schema
    rules = {
        r.rule.replace("<", "{").replace(">", "}")
        for r in client.application.url_map.iter_rules()
        if r.endpoint != "static"
    }
    assert rules == set(doc["paths"])


def test_request_ids_are_honoured_or_generated(client):
    r = client.get("/livez", headers={"X-Request-ID": "abc-123"})
    assert r.headers["X-Request-ID"] == "abc-123"
    r = client.get("/livez", headers={"X-Request-ID": "bad id {with} spaces"})
    assert (
        r.headers["X-Request-ID"] != "bad id {with} spaces" and len(r.headers["X-Request-ID"]) == 32
    )
    r = client.post(
        SCORE, data="{", content_type="application/json", headers={"X-Request-ID": "r-9"}
    )
    assert r.get_json()["request_id"] == "r-9"


def test_generated_request_ids_are_unique_hex_and_drawn_anew_in_a_forked_worker():
    import os
    import re

    from service.api.access_log import new_request_id

    ids = [new_request_id() for _ in range(10_000)]
    assert len(set(ids)) == len(ids) and all(re.fullmatch(r"[0-9a-f]{32}", i) for i in ids)
    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:  # a gunicorn worker is such a child: its ids must not repeat the parent's
        os.write(write, new_request_id().encode())
        os._exit(0)
    os.waitpid(pid, 0)
    child = os.read(read, 64).decode()
    os.close(read), os.close(write)
    assert re.fullmatch(r"[0-9a-f]{32}", child) and child[:16] != ids[0][:16]


def test_access_log_is_one_json_line_per_request(store_uri, capsys):
    app = create_app({"store": store_uri, "poll_seconds": 0})
    app.test_client().post(
        SCORE,
        json={"situations": [situation(0)]},
        headers={"X-Request-ID": "log-1", "Authorization": "Bearer not-logged-anywhere"},
    )
    lines = [json.loads(x) for x in capsys.readouterr().out.splitlines() if '"access"' in x]
    assert len(lines) == 1
    entry = lines[0]
    assert entry["request_id"] == "log-1" and entry["status"] == 200
    assert entry["model"] == "harbour" and entry["version"] == "v1"
    assert "not-logged-anywhere" not in json.dumps(entry)


def test_a_broken_stdout_loses_the_access_line_not_the_answer(store_uri, monkeypatch):
    class BrokenPipe:
        def write(self, text):
            raise BrokenPipeError("reader gone")

        def flush(self):
            raise BrokenPipeError("reader gone")

    app = create_app({"store": store_uri, "poll_seconds": 0})
    monkeypatch.setattr("sys.stdout", BrokenPipe())
    r = app.test_client().post(SCORE, json={"situations": [situation(0)]})
    assert r.status_code == 200 and r.get_json()["version"] == "v1"


def test_model_listing_and_version_detail(client):
    listing = ModelListSchema().load(client.get("/v1/models").get_json())
    (model,) = [m for m in listing["models"] if m["name"] == "harbour"]
    assert model["versions"] == ["v1", "v2", "v3"]
    assert model["routing"]["live"] == {"v1": 1.0} and model["cost_attribute"] == "fare"
    detail = VersionDetailSchema().load(client.get("/v1/models/harbour/versions/v3").get_json())
    assert detail["spec"]["family"] == "nested"
    assert {c["name"] for c in detail["coefficients"]} >= {"lambda_water", "b_fare"}
    assert "sha256" in json.dumps(detail["manifest"]) or "files" in detail["manifest"]


def test_key_positions_are_uniform():
    # Kolmogorov-Smirnov against U(0, 1) (SciPy): sticky shares equal the weights only if
    # hashed keys are uniform (common practice for hash-based traffic splitting).
    u = [key_position("harbour", f"customer-{i}") for i in range(5000)]
    assert stats.kstest(u, "uniform").pvalue > 1e-4
    assert all(0.0 <= x < 1.0 for x in u)


def test_pick_follows_cumulative_normalised_weights():
    weights = {"v2": 1.0, "v1": 3.0}  # normalised: v1 0.75, v2 0.25 (sorted order v1, v2)
    assert pick(weights, 0.0) == "v1" and pick(weights, 0.7499) == "v1"
    assert pick(weights, 0.75) == "v2" and pick(weights, 0.9999) == "v2"
    assert route("harbour", weights, "k").decision == "key-sticky"
    assert route("harbour", weights, "k").version == route("harbour", weights, "k").version
    with pytest.raises(ValueError):
        pick({"v1": 0.0}, 0.5)


def test_version_detail_gives_willingness_to_pay(client):
    import numpy as np
    from http_models import coefficients

    body = VersionDetailSchema().load(client.get("/v1/models/harbour/versions/v1").get_json())
    wtp = {w["coefficient"]: w for w in body["willingness_to_pay"]}
    coefs = coefficients("v1")
    names = list(coefs.names)
    c = names.index("b_fare")
    for name in ("b_time", "asc_taxi"):
        k = names.index(name)
        bk, bc = coefs.estimates[k], coefs.estimates[c]
        # WTP = -beta_k / beta_cost; delta-method variance g' S g with
        # g = (-1/beta_cost, beta_k/beta_cost^2) (common practice; from memory).
        g = np.array([-1 / bc, bk / bc**2])
        se = float(np.sqrt(g @ coefs.covariance[np.ix_([k, c], [k, c])] @ g))
        assert wtp[name]["value"] == pytest.approx(-bk / bc, rel=1e-12)
        assert wtp[name]["std_error"] == pytest.approx(se, rel=1e-12)
    assert "b_fare" not in wtp


def test_routing_weights_near_the_largest_float_split_traffic_by_their_proportions():
    """Relative weights: 1e308 and 1e308 route like 1 and 1 (neither version starves)."""
    weights = {"v1": 1e308, "v2": 1e308}
    assert [pick(weights, u) for u in (0.0, 0.49, 0.5, 0.99)] == ["v1", "v1", "v2", "v2"]
