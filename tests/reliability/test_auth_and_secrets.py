"""Tokens and scopes against the real service: refused requests (401/403) leave no trace in the
routing state, and no token ever appears in the service's output, in error bodies, in the
routing history or in the metrics.
"""

from __future__ import annotations

import json
import secrets
from pathlib import Path

import pytest
import requests

from model_store import open_store
from tests.support.payloads import situations_for
from tests.support.processes import start_service

MODEL = "wrenmouth_commute"
PROBLEM = "application/problem+json"


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


@pytest.fixture()
def secured(demo_store: Path, logs: Path, tokens: dict[str, str]):
    """The service with score and admin tokens from the environment and one more admin token
    from a tokens file; yields (server, every secret, store)."""
    file_admin = "file-admin-" + secrets.token_urlsafe(24)
    tokens_file = logs.parent / "tokens.json"
    tokens_file.write_text(json.dumps({"admin": [file_admin]}))
    env = {
        "CHOICECAST_SCORE_TOKENS": tokens["score"],
        "CHOICECAST_ADMIN_TOKENS": tokens["admin"],
        "CHOICECAST_TOKENS_FILE": str(tokens_file),
        "CHOICECAST_LOG_LEVEL": "DEBUG",
    }
    server = start_service(str(demo_store), logs, env=env, workers=2)
    secrets_ = {**tokens, "file_admin": file_admin, "wrong": "wrong-" + secrets.token_urlsafe(24)}
    try:
        yield server, secrets_, open_store(str(demo_store))
    finally:
        server.stop()


def test_scopes_are_enforced_and_refusals_leave_routing_unchanged(secured) -> None:
    server, tok, store = secured
    url = server.url
    spec = store.load_version(MODEL, "v1").spec
    body = {"situations": situations_for(spec, 1, seed=7)}
    score = f"{url}/v1/models/{MODEL}/score"
    responses: list[tuple[str, requests.Response]] = []

    def call(method: str, path: str, headers: dict, payload: dict, expected: set[int]) -> None:
        r = requests.request(method, url + path, json=payload, headers=headers, timeout=10)
        assert r.status_code in expected, (method, path, r.status_code, r.text[:300])
        if r.status_code >= 400:
            assert r.headers["Content-Type"].startswith(PROBLEM)
            assert r.json()["status"] == r.status_code
        responses.append((headers.get("Authorization", ""), r))

    # Scoring: missing -> 401 (with a challenge), unknown token -> 401/403, either scope -> 200.
    r = requests.post(score, json=body, timeout=10)
    assert r.status_code == 401 and r.headers["WWW-Authenticate"].startswith("Bearer")
    responses.append(("", r))
    path = f"/v1/models/{MODEL}/score"
    call("POST", path, bearer(tok["wrong"]), body, {401, 403})
    call("POST", path, {"Authorization": f"Basic {tok['score']}"}, body, {401})
    call("POST", path, {"Authorization": tok["score"]}, body, {401})
    call("POST", path, bearer(tok["score"]), body, {200})
    call("POST", path, bearer(tok["admin"]), body, {200})
    call("POST", path, bearer(tok["file_admin"]), body, {200})

    before = store.routing_generation(MODEL)
    history = len(store.history(MODEL))
    changes = [
        ("PUT", f"/v1/models/{MODEL}/routing", {"live": {"v2": 1}, "reason": "hijack"}),
        ("POST", f"/v1/models/{MODEL}/routing/promote", {"version": "v2", "reason": "hijack"}),
        ("POST", f"/v1/models/{MODEL}/routing/rollback", {"reason": "hijack"}),
    ]
    for method, change_path, payload in changes:
        call(method, change_path, {}, payload, {401})
        call(method, change_path, bearer(tok["wrong"]), payload, {401, 403})
        call(method, change_path, bearer(tok["score"]), payload, {403})  # wrong scope
        call(method, change_path, {"Authorization": f"Basic {tok['admin']}"}, payload, {401})
    assert store.routing_generation(MODEL) == before
    assert len(store.history(MODEL)) == history

    # The admin scope does change routing (so the refusals above were refusals).
    approved = {"live": {"v2": 1}, "reason": "approved change"}
    call("PUT", f"/v1/models/{MODEL}/routing", bearer(tok["admin"]), approved, {200})
    call("POST", f"/v1/models/{MODEL}/routing/rollback", bearer(tok["file_admin"]), {}, {200})
    assert store.routing_generation(MODEL) == before + 2

    for _, r in responses:
        for secret in tok.values():
            assert secret not in r.text, "a token is echoed in a response body"
            assert secret not in json.dumps(dict(r.headers))
    recorded = json.dumps([s.as_dict() for s in store.history(MODEL)])
    metrics = requests.get(f"{url}/metrics", timeout=10).text
    server.stop()  # flush and close the output before reading it
    output = server.log_text()
    assert "hijack" not in recorded  # refused changes were never recorded
    assert responses and output  # the log exists and holds the access lines
    for name, secret in tok.items():
        for where, text in (("output", output), ("history", recorded), ("metrics", metrics)):
            # The whole token, and any 16-character piece of its random part.
            pieces = [secret] + [secret[i : i + 16] for i in range(secret.index("-") + 1, 30, 7)]
            for piece in pieces:
                assert piece not in text, f"the {name} token appears in the {where}"
