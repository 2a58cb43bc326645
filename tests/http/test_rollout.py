"""A rollout over HTTP against the real service (gunicorn, 2 workers): canary 10%, sticky keys,
shadow, promote, rollback; each step seen in responses and in /metrics."""

from __future__ import annotations

import math
import time

import numpy as np
import requests
from http_models import situation
from prometheus_client.parser import text_string_to_metric_families

from model_store import open_store
from service.choice import Batch, ScoreOptions, check_batch, compile_model, score


def metric(url: str, name: str, **labels: str) -> float:
    """Sum of the samples of ``name`` whose labels include ``labels`` (0 if none)."""
    text = requests.get(f"{url}/metrics", timeout=5).text
    total = 0.0
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            if sample.name == name and all(sample.labels.get(k) == v for k, v in labels.items()):
                total += sample.value
    return total


def score_json(server, body: dict, path: str = "/v1/models/harbour/score") -> requests.Response:
    return requests.post(server.url + path, json=body, headers=server.headers(), timeout=10)


def wait_generation(server, generation: int, seconds: float = 15.0) -> None:
    """Until 20 responses in a row report ``generation``, after three poll intervals (0.3 s
    each), by which every worker has polled: one worker may serve all 20."""
    time.sleep(1.0)
    deadline = time.monotonic() + seconds
    streak = 0
    while time.monotonic() < deadline and streak < 20:
        r = score_json(server, {"situations": [situation(0)]})
        streak = streak + 1 if r.json()["routing"]["generation"] == generation else 0
        if streak == 0:
            time.sleep(0.05)
    assert streak >= 20, f"replicas did not converge on generation {generation}"


def change(server, method: str, path: str, body: dict, scope: str = "admin") -> requests.Response:
    return requests.request(
        method,
        f"{server.url}/v1/models/harbour/routing{path}",
        json=body,
        headers=server.headers(scope),
        timeout=10,
    )


def core_probabilities(store: str, version: str, situations: list[dict]) -> np.ndarray:
    loaded = open_store(store).load_version("harbour", version)
    model = compile_model(loaded.spec, loaded.coefficients)
    batch, problems = Batch.from_records(model, situations)
    assert not problems
    check = check_batch(model, batch)
    return score(model, check.batch, ScoreOptions(logsum=False)).probabilities


def test_rollout_canary_sticky_shadow_promote_rollback(server):
    keys = [f"customer-{i}" for i in range(400)]

    # Admin changes need the admin scope: none -> 401, score token -> 403.
    canary = {"live": {"v1": 0.9, "v2": 0.1}, "shadow": "v3", "reason": "canary v2, shadow v3"}
    r = requests.put(f"{server.url}/v1/models/harbour/routing", json=canary, timeout=5)
    assert r.status_code == 401 and r.headers["Content-Type"] == "application/problem+json"
    assert change(server, "PUT", "", canary, scope="score").status_code == 403
    # A stale expected generation is refused without writing anything.
    stale = change(server, "PUT", "", {**canary, "expected_generation": 0})
    assert stale.status_code == 409
    # A change the store refuses is a routing problem, named by field.
    unknown = change(server, "PUT", "", {**canary, "live": {"v9": 1}})
    assert unknown.status_code == 422
    assert unknown.json()["type"] == "urn:choicecast:problem:routing-refused"
    assert [e["path"] for e in unknown.json()["errors"]] == ["$.live.v9"]

    r = change(server, "PUT", "", {**canary, "expected_generation": 1})
    assert r.status_code == 200, r.text
    assert r.json()["generation"] == 2
    wait_generation(server, 2)

    # Canary 10%: over 400 distinct keys the v2 count is Binomial(400, 0.1) for a uniform
    # hash (common practice): mean 40, sd 6; accept within 4 sd.
    versions = {}
    for key in keys:
        body = r = score_json(server, {"routing_key": key, "situations": [situation(1)]}).json()
        assert body["routing"] == {"decision": "key-sticky", "generation": 2}
        versions[key] = body["version"]
    n_canary = sum(v == "v2" for v in versions.values())
    assert 40 - 24 <= n_canary <= 40 + 24, n_canary
    assert set(versions.values()) == {"v1", "v2"}

    # Sticky: the same key meets the same version again.
    for key in keys[:60]:
        again = score_json(server, {"routing_key": key, "situations": [situation(2)]}).json()
        assert again["version"] == versions[key]
    assert metric(
        server.url, "choicecast_routing_decisions_total", model="harbour", version="v2",
        decision="key-sticky",
    ) >= n_canary  # fmt: skip

    # Shadow: never in the response (same as the pinned live version), seen in metrics.
    v1_key = next(k for k, v in versions.items() if v == "v1")
    probe = [situation(i) for i in range(3, 8)]
    routed = score_json(server, {"routing_key": v1_key, "situations": probe})
    pinned = score_json(server, {"situations": probe}, "/v1/models/harbour/versions/v1/score")
    assert routed.json()["situations"] == pinned.json()["situations"]
    assert "v3" not in routed.text and routed.headers["X-Model-Version"] == "v1"
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline:
        count = metric(
            server.url, "choicecast_shadow_max_abs_dp_count", model="harbour", shadow_version="v3"
        )
        if count > 0:
            break
        time.sleep(0.05)
    assert count > 0
    # The divergence recorded for the probe equals max |P_v3 - P_v1| from the core.
    expected = np.abs(
        core_probabilities(server.store, "v3", probe)
        - core_probabilities(server.store, "v1", probe)
    ).max()
    score_json(server, {"routing_key": v1_key, "situations": probe})
    time.sleep(0.3)
    last = metric(
        server.url, "choicecast_shadow_last_max_abs_dp", model="harbour", live_version="v1",
        shadow_version="v3",
    )  # fmt: skip
    assert math.isclose(last, expected, rel_tol=1e-12), (last, expected)
    assert metric(server.url, "choicecast_shadow_failures_total") == 0

    # Promote v2: every key now meets v2.
    r = change(server, "POST", "/promote", {"version": "v2", "reason": "canary healthy"})
    assert r.status_code == 200, r.text
    assert r.json()["generation"] == 3 and r.json()["live"] == {"v2": 1.0}
    wait_generation(server, 3)
    for key in keys[:40]:
        assert (
            score_json(server, {"routing_key": key, "situations": [situation(1)]}).json()["version"]
            == "v2"
        )

    # Roll back: the canary state returns, and with it each key's version.
    r = change(server, "POST", "/rollback", {"reason": "undo promote"})
    assert r.status_code == 200, r.text
    assert r.json()["generation"] == 4 and r.json()["live"] == {"v1": 0.9, "v2": 0.1}
    wait_generation(server, 4)
    for key in keys[:80]:
        body = score_json(server, {"routing_key": key, "situations": [situation(1)]}).json()
        assert body["version"] == versions[key]
    assert metric(server.url, "choicecast_routing_generation", model="harbour") == 4

    history = requests.get(
        f"{server.url}/v1/models/harbour/routing/history", headers=server.headers(), timeout=5
    ).json()
    assert [e["action"] for e in history["entries"]] == ["route", "route", "promote", "rollback"]
    # Requests are counted by model, version, route and status across both workers.
    assert metric(
        server.url, "choicecast_requests_total", model="harbour", version="v2",
        route="/v1/models/<name>/score", status="200",
    ) >= n_canary + 40  # fmt: skip
