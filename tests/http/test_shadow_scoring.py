"""Shadow scoring: the shadow version scores the live request's input after the response and
its divergence max |dP| goes to metrics; a shadow with the live version's input contract
reuses the live check instead of decoding and checking the request again."""

from __future__ import annotations

import json

import numpy as np
import pytest
from http_models import coefficients, situation, spec_dict
from prometheus_client import REGISTRY

import service.api.scoring_flow as flow
from model_store import open_store
from service.api import create_app
from service.choice import Batch, check_batch, compile_model, score, spec_from_dict

SCORE = "/v1/models/harbour/score"


def shadowed_app(store_uri: str, shadow: str):
    open_store(store_uri).change_routing(
        "harbour", {"v1": 1.0}, shadow=shadow, reason="shadow test", changed_by="tests"
    )
    return create_app({"store": store_uri, "poll_seconds": 0, "access_log": False})


def last_divergence(shadow: str) -> float | None:
    labels = {"model": "harbour", "live_version": "v1", "shadow_version": shadow}
    return REGISTRY.get_sample_value("choicecast_shadow_last_max_abs_dp", labels)


def direct_divergence(store_uri: str, shadow: str, situations: list[dict]) -> float:
    """max |dP| over the situations, from the core alone (both versions, same records)."""
    store = open_store(store_uri)
    p = {}
    for version in ("v1", shadow):
        loaded = store.load_version("harbour", version)
        model = compile_model(loaded.spec, loaded.coefficients)
        batch, problems = Batch.from_records(model, situations)
        assert not problems
        p[version] = score(model, check_batch(model, batch).batch).probabilities
    return float(np.abs(p["v1"] - p[shadow]).max())


def post_and_close(app, situations: list[dict]) -> None:
    response = app.test_client().post(
        SCORE, data=json.dumps({"situations": situations}), content_type="application/json"
    )
    assert response.status_code == 200 and response.headers["X-Model-Version"] == "v1"
    assert "v2" not in response.get_data(as_text=True)  # the shadow never answers
    response.close()  # the shadow runs when the response is closed (after it was sent)


def shadow_decodes(app, shadow: str, situations: list[dict], monkeypatch) -> int:
    """Score the live version as a request would, then the shadow, counting the decodes
    the shadow makes."""
    reg = app.extensions["choicecast.registry"]
    live = reg.get("harbour", "v1").compiled
    parsed = flow.ParsedRequest("rows", situations)
    check = check_batch(live, flow.decode(parsed, live).batch)
    p = score(live, check.batch).probabilities
    calls = []
    real_decode = flow.decode
    monkeypatch.setattr(flow, "decode", lambda *a: calls.append(a) or real_decode(*a))
    flow.shadow_score(reg, "harbour", "v1", shadow, parsed, live, check.batch, p)
    return len(calls)


def test_the_shadow_divergence_of_a_routed_request_goes_to_metrics(fresh_store):
    app = shadowed_app(fresh_store, "v2")
    situations = [situation(i) for i in range(5)]
    post_and_close(app, situations)
    # Source: the definition of the shadow divergence, recomputed from the core directly.
    assert last_divergence("v2") == pytest.approx(direct_divergence(fresh_store, "v2", situations))


def test_a_shadow_with_the_live_contract_scores_the_live_check(fresh_store, monkeypatch):
    """v2 re-estimates v1's specification (a steeper fare coefficient): same contract."""
    app = shadowed_app(fresh_store, "v2")
    situations = [situation(i) for i in range(5)]
    assert shadow_decodes(app, "v2", situations, monkeypatch) == 0
    assert last_divergence("v2") == pytest.approx(direct_divergence(fresh_store, "v2", situations))


def test_a_shadow_with_another_contract_decodes_and_checks_again(fresh_store, monkeypatch):
    """v4 widens the time range seen in estimation: its checks differ, so the request is
    decoded and checked against it before it scores."""
    spec = spec_dict()
    spec["attributes"][1]["high"] = 240.0
    open_store(fresh_store).publish(
        "harbour", "v4", spec_from_dict(spec), coefficients("v2"), published_by="tests"
    )
    app = shadowed_app(fresh_store, "v4")
    situations = [situation(i) for i in range(5)]
    assert shadow_decodes(app, "v4", situations, monkeypatch) == 1
    assert last_divergence("v4") == pytest.approx(direct_divergence(fresh_store, "v4", situations))


def test_input_contracts_differ_exactly_where_decoding_or_checks_would():
    base = compile_model(spec_from_dict(spec_dict()), coefficients("v1"))
    again = compile_model(spec_from_dict(spec_dict()), coefficients("v2"))
    nested = compile_model(spec_from_dict(spec_dict("nested")), coefficients("v3"))
    clip = compile_model(spec_from_dict(spec_dict(range_policy="clip")), coefficients("v1"))
    assert base.input_contract == again.input_contract == nested.input_contract
    assert clip.input_contract != base.input_contract  # the policy changes what is scored
