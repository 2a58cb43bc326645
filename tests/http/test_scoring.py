"""Scoring over the Flask test client: the numbers against published formulas and the core,
and the three request forms (rows, columns, Arrow) against each other."""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pytest
from http_models import BASE, arrow_bytes, columns, long_table, situation
from scipy.special import logsumexp, softmax

from model_store import open_store
from service.api.schemas import ScenarioResponseSchema, ScoreResponseSchema
from service.choice import Batch, ScoreOptions, check_batch, compile_model, score

ARROW = "application/vnd.apache.arrow.stream"
ALL = {
    "logsum": True,
    "expected_max_utility": True,
    "surplus": True,
    "elasticities": ["fare", "income"],
    "aggregate": True,
    "std_errors": True,
}


def utilities_v1(s: dict) -> np.ndarray:
    """V_j of the harbour v1 spec written out by hand (tests/http/models.py)."""
    a, z = s["attributes"], s["context"]["income"]
    b = BASE
    return np.array(
        [
            b["asc_ferry"] + b["b_fare"] * a["ferry"]["fare"] + b["b_time"] * a["ferry"]["time"]
            + b["b_income_ferry"] * z,
            b["asc_taxi"] + b["b_fare"] * a["taxi"]["fare"] + b["b_time"] * a["taxi"]["time"],
            b["b_log_time"] * math.log(a["bike"]["time"]),
        ]
    )  # fmt: skip


def test_rows_match_the_logit_formulas(client):
    situations = [situation(i) for i in range(6)]
    r = client.post(
        "/v1/models/harbour/versions/v1/score", json={"situations": situations, "return": ALL}
    )
    assert r.status_code == 200, r.get_json()
    body = ScoreResponseSchema().load(r.get_json())
    assert body["version"] == "v1" and body["routing"]["decision"] == "pinned"
    for s, out in zip(situations, body["situations"], strict=True):
        v = utilities_v1(s)
        # Logit probabilities P_i = exp V_i / sum_j exp V_j (Train 2009, eq. 3.6), via SciPy.
        p = softmax(v)
        got = np.array([out["probabilities"][a] for a in ("ferry", "taxi", "bike")])
        np.testing.assert_allclose(got, p, rtol=1e-12)
        # Logsum ln sum_j exp V_j and E[max U] = logsum + Euler's gamma (Train 2009, sec. 3.5).
        assert out["logsum"] == pytest.approx(logsumexp(v), rel=1e-12)
        assert out["expected_max_utility"] == pytest.approx(logsumexp(v) + np.euler_gamma)
        # Consumer surplus logsum / alpha, alpha = -b_fare (Train 2009, eq. 3.10).
        assert out["surplus"] == pytest.approx(logsumexp(v) / -BASE["b_fare"], rel=1e-12)
        # Own fare elasticity b x_i (1 - P_i), cross -b x_j P_j (Train 2009, eq. 3.7-3.8).
        fare = out["elasticities"]["fare"]
        x_ferry = s["attributes"]["ferry"]["fare"]
        assert fare["ferry"]["ferry"] == pytest.approx(BASE["b_fare"] * x_ferry * (1 - p[0]))
        assert fare["taxi"]["ferry"] == pytest.approx(-BASE["b_fare"] * x_ferry * p[0])
        assert sum(out["probabilities"].values()) == pytest.approx(1.0, abs=1e-12)
    agg = body["aggregate"]["shares"]
    mean_p = np.mean([softmax(utilities_v1(s)) for s in situations], axis=0)
    # Sample enumeration with equal weights: shares are mean probabilities (Train 2009, 3.6.1).
    np.testing.assert_allclose([agg[a] for a in ("ferry", "taxi", "bike")], mean_p, rtol=1e-12)


def core_result(store_uri: str, version: str, situations: list[dict]):
    loaded = open_store(store_uri).load_version("harbour", version)
    model = compile_model(loaded.spec, loaded.coefficients)
    batch, problems = Batch.from_records(model, situations)
    assert not problems
    options = ScoreOptions(
        logsum=True, surplus=True, elasticities=("fare", "income"), aggregate=True, std_errors=True
    )
    return score(model, check_batch(model, batch).batch, options)


@pytest.mark.parametrize("version", ["v1", "v3"])
def test_rows_columns_and_arrow_reproduce_the_core_exactly(client, store_uri, version):
    situations = [situation(i) for i in range(7)]
    situations[2]["available"] = {"taxi": False}
    path = f"/v1/models/harbour/versions/{version}/score"
    rows = client.post(path, json={"situations": situations, "return": ALL}).get_json()
    cols = client.post(path, json={"columns": columns(situations), "return": ALL}).get_json()
    query = "&".join(f"{k}=true" for k in ALL if k != "elasticities") + "&elasticities=fare,income"
    r = client.post(f"{path}?{query}", data=arrow_bytes(long_table(situations)), content_type=ARROW)
    assert r.status_code == 200 and r.mimetype == ARROW
    table = pa.ipc.open_stream(r.data).read_all()
    core = core_result(store_uri, version, situations)
    alts = ("ferry", "taxi", "bike")

    rows_p = np.array([[s["probabilities"][a] for a in alts] for s in rows["situations"]])
    cols_p = np.array([cols["columns"]["probabilities"][a] for a in alts]).T
    arrow_p = table.column("probability").to_numpy().reshape(-1, 3)
    for got in (rows_p, cols_p, arrow_p):
        np.testing.assert_array_equal(got, core.probabilities)
    assert rows_p[2, 1] == 0.0  # unavailable: exactly 0

    np.testing.assert_array_equal([s["logsum"] for s in rows["situations"]], core.logsum)
    np.testing.assert_array_equal(cols["columns"]["logsum"], core.logsum)
    np.testing.assert_array_equal(table.column("logsum").to_numpy()[::3], core.logsum)
    np.testing.assert_array_equal(cols["columns"]["surplus"], core.surplus)
    se = np.array([[s["probability_std_errors"][a] for a in alts] for s in rows["situations"]])
    np.testing.assert_array_equal(se, core.prob_std_errors)
    np.testing.assert_array_equal(
        table.column("probability_std_error").to_numpy().reshape(-1, 3), core.prob_std_errors
    )
    e = core.elasticities["fare"].elasticity  # (N, i, k)
    rows_e = np.array(
        [
            [[s["elasticities"]["fare"][i][k] for k in alts] for i in alts]
            for s in rows["situations"]
        ]
    )
    cols_e = np.array(
        [[cols["columns"]["elasticities"]["fare"][i][k] for k in alts] for i in alts]
    ).transpose(2, 0, 1)
    arrow_e = np.stack(
        [table.column(f"elasticity.fare.{k}").to_numpy().reshape(-1, 3) for k in alts], axis=2
    )
    for got in (rows_e, cols_e, arrow_e):
        np.testing.assert_array_equal(got, e)
    np.testing.assert_array_equal(
        table.column("elasticity.income").to_numpy().reshape(-1, 3),
        core.elasticities["income"].elasticity,
    )
    np.testing.assert_array_equal(
        [rows["aggregate"]["shares"][a] for a in alts], core.aggregate.shares
    )
    assert rows["aggregate"] == cols["aggregate"]
    meta = table.schema.metadata
    assert meta[b"choicecast.version"] == f'"{version}"'.encode()
    assert table.column("situation").to_pylist()[:3] == ["s0"] * 3


def test_routed_request_names_version_and_decision(client):
    r = client.post(
        "/v1/models/harbour/score", json={"routing_key": "c-1", "situations": [situation(0)]}
    )
    body = r.get_json()
    assert r.status_code == 200
    assert (body["model"], body["version"]) == ("harbour", "v1")
    assert body["routing"] == {"decision": "key-sticky", "generation": 1}
    assert r.headers["X-Model-Version"] == "v1" and r.headers["X-Routing-Decision"] == "key-sticky"
    r = client.post("/v1/models/harbour/score", json={"situations": [situation(0)]})
    assert r.get_json()["routing"]["decision"] == "random"


def test_out_of_range_inputs_are_warned_per_situation(client):
    # The harbour spec's range policy is "warn": fare 25 lies above the estimation range.
    situations = [situation(0), situation(1, taxi__fare=25.0)]
    r = client.post("/v1/models/harbour/versions/v1/score", json={"situations": situations})
    body = r.get_json()
    assert r.status_code == 200
    assert body["warning_count"] == 1
    assert body["warnings"][0]["path"] == "$.situations[1].attributes.taxi.fare"


def test_scenarios_against_the_logit_formulas(client):
    situations = [situation(i) for i in range(4)]
    body = {
        "version": "v1",
        "situations": situations,
        "variants": [
            {"name": "ferry+20%", "changes": [
                {"alternative": "ferry", "attribute": "fare", "op": "multiply", "value": 1.2}]},
            {"name": "no-taxi", "remove": ["taxi"]},
        ],
    }  # fmt: skip
    r = client.post("/v1/models/harbour/scenarios", json=body)
    assert r.status_code == 200, r.get_json()
    out = ScenarioResponseSchema().load(r.get_json())
    base_v = [utilities_v1(s) for s in situations]
    up = [dict(s, attributes={**s["attributes"]}) for s in situations]
    for s in up:
        s["attributes"]["ferry"] = {**s["attributes"]["ferry"]}
        s["attributes"]["ferry"]["fare"] *= 1.2
    up_v = [utilities_v1(s) for s in up]
    # Change in consumer surplus (logsum_1 - logsum_0) / alpha (Train 2009, eq. 3.11).
    dcs = [
        (logsumexp(b) - logsumexp(a)) / -BASE["b_fare"] for a, b in zip(base_v, up_v, strict=True)
    ]
    assert out["variants"][0]["surplus_change_total"] == pytest.approx(sum(dcs), rel=1e-12)
    # Removing an alternative: the others keep their ratios (IIA, Train 2009, sec. 3.3.2).
    p0 = np.mean([softmax(v[[0, 2]]) for v in base_v], axis=0)
    shares = out["variants"][1]["shares"]
    assert shares["taxi"] == 0.0
    assert [shares["ferry"], shares["bike"]] == pytest.approx(list(p0), rel=1e-12)


def test_a_variant_that_moves_a_value_out_of_range_is_warned_at_its_change(client):
    # harbour v1 warns: its fare range is [0, 20]. Situation 1's taxi fare is out of range in
    # the base already (warned once, at the top); the variant takes every ferry fare to 25.
    situations = [situation(0), situation(1, taxi__fare=25.0)]
    body = {
        "version": "v1",
        "situations": situations,
        "variants": [{"name": "ferry at 25", "changes": [
            {"alternative": "ferry", "attribute": "fare", "op": "set", "value": 25.0}]}],
    }  # fmt: skip
    r = client.post("/v1/models/harbour/scenarios", json=body)
    assert r.status_code == 200, r.get_json()
    out = ScenarioResponseSchema().load(r.get_json())
    assert [w["path"] for w in out["warnings"]] == ["$.situations[1].attributes.taxi.fare"]
    assert out["warning_count"] == 1
    variant = out["variants"][0]["warnings"]
    assert [w["path"] for w in variant] == ["$.variants[0].changes[0]"] * 2
    assert [w["message"].split(":")[0] for w in variant] == ["situation 0", "situation 1"]
    assert "attributes.ferry.fare" in variant[0]["message"]


@pytest.mark.parametrize("policy", ["reject", "clip"])
def test_range_policies_over_http(fresh_store, policy):
    from http_models import coefficients, spec_dict
    from prometheus_client import REGISTRY

    from service.api import create_app
    from service.choice import spec_from_dict

    store = open_store(fresh_store)
    store.publish("harbour", f"{policy}1", spec_from_dict(spec_dict(range_policy=policy)),
                  coefficients("v1"), published_by="tests")  # fmt: skip
    client = create_app(
        {"store": fresh_store, "poll_seconds": 0, "access_log": False}
    ).test_client()
    path = f"/v1/models/harbour/versions/{policy}1/score"
    high = situation(0, taxi__fare=25.0)  # the estimation range of fare is [0, 20]
    labels = {"model": "harbour", "version": f"{policy}1"}
    before = REGISTRY.get_sample_value("choicecast_out_of_range_total", labels) or 0.0
    r = client.post(path, json={"situations": [situation(1), high]})
    if policy == "reject":
        assert r.status_code == 422
        assert [e["path"] for e in r.get_json()["errors"]] == [
            "$.situations[1].attributes.taxi.fare"
        ]
        return
    body = r.get_json()
    assert r.status_code == 200
    assert [w["path"] for w in body["warnings"]] == ["$.situations[1].attributes.taxi.fare"]
    # Clipping scores the value at the bound: the same as sending fare = 20 (common practice).
    at_bound = client.post(path, json={"situations": [situation(0, taxi__fare=20.0)]}).get_json()
    clipped, bound = (
        body["situations"][1]["probabilities"],
        at_bound["situations"][0]["probabilities"],
    )
    assert clipped == pytest.approx(bound, rel=1e-12)  # batch sizes may differ in the last bit
    after = REGISTRY.get_sample_value("choicecast_out_of_range_total", labels)
    assert after == before + 1
