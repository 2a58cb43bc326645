"""Refusals name the field at fault in the request's own form, count each problem once, and
bound the work a request may cause; results never show a negative zero."""

from __future__ import annotations

import io
import json
import re
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from http_models import arrow_bytes, coefficients, columns, long_table, seed_store, situation
from http_models import spec_dict as harbour_spec

from model_store import open_store
from service.api import create_app
from service.choice import Coefficients, spec_from_dict

ARROW = "application/vnd.apache.arrow.stream"
SCORE = "/v1/models/{model}/versions/v1/score"
SCENARIOS = "/v1/models/{model}/scenarios"


def overflow_spec() -> dict:
    """``harbour`` with a time x income interaction on bike: a very large time and a very
    negative income give bike a utility of +inf while every value passes the checks."""
    spec = harbour_spec()
    spec["name"] = "overflow"
    spec["utilities"]["bike"].append(
        {"coefficient": "b_time_income_bike", "attribute": "time", "context": "income"}
    )
    return spec


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory):
    path: Path = tmp_path_factory.mktemp("review-store") / "store"
    seed_store(path)
    store = open_store(str(path))
    estimates = dict(zip(coefficients("v1").names, coefficients("v1").estimates, strict=True))
    estimates["b_time_income_bike"] = -0.001
    store.publish(
        "overflow",
        "v1",
        spec_from_dict(overflow_spec()),
        Coefficients.from_mapping(estimates),
        published_by="tests",
    )
    store.change_routing("overflow", {"v1": 1.0}, reason="first release", changed_by="tests")
    app = create_app({"store": str(path), "poll_seconds": 0, "access_log": False})
    return app.test_client()


def overflowing(i: int = 0) -> dict:
    s = situation(i, bike__time=1e200)
    s["context"]["income"] = -1e200
    return s


def refusal(r, status: int = 422) -> dict:
    assert r.status_code == status, r.get_data(as_text=True)
    assert r.mimetype == "application/problem+json"
    return r.get_json()


def assert_overflow_named(body: dict, path: str) -> None:
    # A utility that overflows is the input's fault: the detail says the input cannot be
    # scored (not the options), the message says why, the path is in the request's form.
    assert [e["path"] for e in body["errors"]] == [path]
    assert "cannot be scored" in body["detail"] and "options" not in body["detail"]
    message = body["errors"][0]["message"]
    assert "not finite" in message and "overflows" in message and "bike" in message
    assert "check the batch" not in message


def test_overflow_is_located_in_rows_columns_and_arrow(client):
    url = SCORE.format(model="overflow")
    rows = client.post(url, json={"situations": [situation(0), overflowing(1)]})
    assert_overflow_named(refusal(rows), "$.situations[1]")
    cols = client.post(url, json={"columns": columns([situation(0), overflowing(1)])})
    assert_overflow_named(refusal(cols), "$.columns[1]")
    table = long_table([situation(0), overflowing(1)])
    arrow = client.post(url, data=arrow_bytes(table), headers={"Content-Type": ARROW})
    assert_overflow_named(refusal(arrow), "situation[s1]")


def test_large_finite_results_across_many_situations_are_served(client):
    """Times of -1.7e308 minutes (outside the estimation range: warned, not refused) give
    ferry and taxi utilities near 7e306: every logsum is finite, but their sum over 30
    situations is not, so no check may add them up (the suite turns warnings into errors,
    which would make this a 500)."""
    rows = [situation(i, ferry__time=-1.7e308, taxi__time=-1.7e308) for i in range(30)]
    r = client.post(
        SCORE.format(model="overflow"), json={"situations": rows, "return": {"logsum": True}}
    )
    assert r.status_code == 200, r.get_data(as_text=True)
    logsums = [s["logsum"] for s in r.get_json()["situations"]]
    assert all(6e306 < v < 8e306 for v in logsums)


def chunked_post(client, path: str, body: bytes):
    return client.open(
        path,
        method="POST",
        input_stream=io.BytesIO(body),
        content_type="application/json",
        headers={"Transfer-Encoding": "chunked"},
        environ_overrides={"wsgi.input_terminated": True},
    )


def test_a_chunked_body_over_the_apps_limit_is_413_whatever_set_the_limit(tmp_path):
    """werkzeug cuts a chunked body at the app's max_content_length without a word; the
    service must answer 413, not parse the truncated JSON, for the limit Flask enforces."""
    app = create_app({"store": seed_store(tmp_path / "store"), "poll_seconds": 0,
                      "access_log": False, "max_body_bytes": 1_000_000})  # fmt: skip
    app.config["MAX_CONTENT_LENGTH"] = 1000
    body = json.dumps({"situations": [situation(0)], "pad": "x" * 5000}).encode()
    r = chunked_post(app.test_client(), SCORE.format(model="harbour"), body)
    assert r.status_code == 413, r.get_data(as_text=True)


@pytest.mark.parametrize("name", ["max_body_bytes", "max_situations", "max_work", "poll_seconds"])
def test_a_setting_given_as_none_is_refused_by_name(tmp_path, name):
    from service.api.config import ConfigError

    with pytest.raises(ConfigError, match=name):
        create_app({"store": seed_store(tmp_path / "store"), name: None})


def test_overflow_of_a_scenario_base_names_the_request_situation(client):
    url = SCENARIOS.format(model="overflow")
    variants = [{"name": "v", "remove": ["ferry"]}]
    rows = client.post(url, json={"situations": [overflowing(0)], "variants": variants})
    assert_overflow_named(refusal(rows), "$.situations[0]")
    cols = client.post(url, json={"columns": columns([overflowing(0)]), "variants": variants})
    assert_overflow_named(refusal(cols), "$.columns[0]")


def test_overflow_caused_by_a_variant_names_the_variant(client):
    base = situation(0)
    base["context"]["income"] = -1e200  # finite utilities at the base's times
    change = {"alternative": "bike", "attribute": "time", "op": "set", "value": 1e200}
    r = client.post(
        SCENARIOS.format(model="overflow"),
        json={"situations": [base], "variants": [{"name": "slow", "changes": [change]}]},
    )
    body = refusal(r)
    assert [e["path"] for e in body["errors"]] == ["$.variants[0]"]
    assert "situation 0" in body["errors"][0]["message"]
    assert "overflows" in body["errors"][0]["message"]


def test_scenario_revenue_overflow_names_the_result_and_its_inputs(client):
    # A fare of -1e300 and a weight of 1e100: each passes the checks (warn policy), but the
    # weighted expected revenue overflows to -inf.
    base = situation(0, ferry__fare=-1e300)
    base["weight"] = 1e100
    variant = {"name": "dearer taxi", "changes": [
        {"alternative": "taxi", "attribute": "fare", "op": "add", "value": 1.0}]}  # fmt: skip
    r = client.post(
        SCENARIOS.format(model="harbour"),
        json={"situations": [base, dict(base, id="u")], "variants": [variant]},
    )
    body = refusal(r)
    assert [e["path"] for e in body["errors"]] == ["$.base.revenue_total"]
    assert "weights" in body["errors"][0]["message"] and "costs" in body["errors"][0]["message"]


@pytest.mark.parametrize("endpoint", [SCORE, SCENARIOS])
def test_a_value_named_once_is_counted_once(client, endpoint):
    # A fare given as text fails decoding and leaves its cell NaN; check_batch finds that cell
    # too, but it is one problem: listed once and counted once.
    bad = situation(0)
    bad["attributes"]["ferry"]["fare"] = "three"
    body: dict = {"situations": [bad]}
    if endpoint == SCENARIOS:
        body["variants"] = [{"name": "v", "remove": ["taxi"]}]
    out = refusal(client.post(endpoint.format(model="harbour"), json=body))
    assert [e["path"] for e in out["errors"]] == ["$.situations[0].attributes.ferry.fare"]
    assert out["detail"] == "1 value(s) cannot be scored"


def test_scenarios_check_the_base_once(client, monkeypatch):
    import service.api.views.scenarios as view
    import service.choice.scenarios as core

    calls: list[int] = []
    original = core.check_batch

    def counting(model, batch, *args, **kwargs):
        calls.append(batch.size)
        return original(model, batch, *args, **kwargs)

    monkeypatch.setattr(core, "check_batch", counting)
    monkeypatch.setattr(view, "check_batch", counting)
    variants = [{"name": "a", "remove": ["taxi"]}, {"name": "b", "remove": ["bike"]}]
    r = client.post(
        SCENARIOS.format(model="harbour"),
        json={"situations": [situation(0), situation(1)], "variants": variants},
    )
    assert r.status_code == 200, r.get_data(as_text=True)
    assert len(calls) == 1 + len(variants)  # the base once, then each variant once


NEGATIVE_ZERO = re.compile(r"-0\.0(?![0-9])")


def negative_zeros(values: np.ndarray) -> int:
    return int(np.count_nonzero((values == 0) & np.signbit(values)))


def test_exact_zero_elasticities_are_positive_zero_in_json_and_arrow(client):
    # bike does not use fare, so every elasticity with respect to bike's fare is exactly 0
    # (Train 2009, sec. 3.6: E_ik = -beta x_k P_k with beta = 0 for bike; from memory).
    url = SCORE.format(model="harbour")
    options = {"elasticities": ["fare"], "aggregate": True}
    situations = [situation(i) for i in range(3)]
    for body in ({"situations": situations}, {"columns": columns(situations)}):
        r = client.post(url, json={**body, "return": options})
        assert r.status_code == 200, r.get_data(as_text=True)
        assert not NEGATIVE_ZERO.search(r.get_data(as_text=True))
        rows = r.get_json().get("situations")
        if rows:
            assert rows[0]["elasticities"]["fare"]["ferry"]["bike"] == 0.0
    table = long_table(situations)
    r = client.post(
        url + "?elasticities=fare&aggregate=true",
        data=arrow_bytes(table),
        headers={"Content-Type": ARROW},
    )
    assert r.status_code == 200, r.get_data(as_text=True)
    out = pa.ipc.open_stream(r.data).read_all()
    fare = [c for c in out.column_names if ".fare." in c]
    assert fare and all(negative_zeros(out[c].to_numpy()) == 0 for c in fare)
    assert out["elasticity.fare.bike"].to_numpy().tolist() == [0.0] * len(out)
    assert not NEGATIVE_ZERO.search(out.schema.metadata[b"choicecast.aggregate"].decode())


def test_out_of_range_counter_counts_values(client):
    from prometheus_client import REGISTRY

    labels = {"model": "harbour", "version": "v1"}
    before = REGISTRY.get_sample_value("choicecast_out_of_range_total", labels) or 0.0
    # Two values outside their estimation range in one situation (fare 0-20, time 2-120).
    s = situation(0, ferry__fare=25.0, taxi__time=500.0)
    r = client.post(SCORE.format(model="harbour"), json={"situations": [s]})
    assert r.status_code == 200 and r.get_json()["warning_count"] == 2
    after = REGISTRY.get_sample_value("choicecast_out_of_range_total", labels)
    assert after - before == 2
    text = client.get("/metrics").get_data(as_text=True)
    help_line = next(x for x in text.splitlines() if x.startswith("# HELP choicecast_out_of_r"))
    assert "values" in help_line and "Situations" not in help_line


def test_work_over_the_limit_is_413_naming_the_options(tmp_path):
    # harbour v3: J = 3 alternatives, K = 8 coefficients.  Ten situations with two
    # elasticities and std errors: 10 * 9 * 3 + 10 * 3 * 8 = 510 units (x1 Arrow, x4 rows).
    app = create_app(
        {
            "store": seed_store(tmp_path / "s"),
            "poll_seconds": 0,
            "max_work": 550,
            "access_log": False,
        }
    )
    c = app.test_client()
    url = "/v1/models/harbour/versions/v3/score"
    situations = [situation(i) for i in range(10)]
    heavy = {"elasticities": ["fare", "time"], "std_errors": True}
    body = refusal(c.post(url, json={"situations": situations, "return": heavy}), 413)
    assert [e["path"] for e in body["errors"]] == [
        "$.situations",
        "$.return.elasticities",
        "$.return.std_errors",
    ]
    assert "2,040" in body["detail"] and "max_work" in body["detail"]
    r = c.post(
        url + "?elasticities=fare,time&std_errors=true",
        data=arrow_bytes(long_table(situations)),
        headers={"Content-Type": ARROW},
    )
    assert r.status_code == 200, r.get_data(as_text=True)  # 510 units as Arrow
    light = c.post(url, json={"situations": situations[:2], "return": heavy})
    assert light.status_code == 200, light.get_data(as_text=True)  # 2 situations: 408
    # Three elasticities as Arrow: 10 * 9 * 4 + 240 = 600 units, over 550.
    arrow = c.post(
        url + "?elasticities=fare,time,income&std_errors=true",
        data=arrow_bytes(long_table(situations)),
        headers={"Content-Type": ARROW},
    )
    assert [e["path"] for e in refusal(arrow, 413)["errors"]] == [
        "$",
        "query.elasticities",
        "query.std_errors",
    ]


def test_the_default_work_limit_admits_the_documented_batches():
    from service.api.codecs.results import Outputs
    from service.api.config import Settings
    from service.api.scoring_flow import work_units

    class FourAlternatives:  # the shape of the benchmark and demo models (J = 4, K = 9)
        alternatives = ("car", "tram", "bicycle", "walk")

        class coefficients:
            names = tuple(f"b{k}" for k in range(9))

    limit = Settings().max_work
    model = FourAlternatives()
    # docs/benchmarks.md: 100,000 situations, probabilities, in every form.
    for form in ("rows", "columns", "arrow"):
        assert work_units(100_000, model, Outputs(), form) <= limit
    # 100,000 situations as Arrow with four elasticities and std errors.
    full = Outputs(elasticities=("cost", "minutes", "age", "rain_mm"), std_errors=True)
    assert work_units(100_000, model, full, "arrow") <= limit
    # ... but not twice as many (it took a worker from 315 to 1180 MiB).
    assert work_units(200_000, model, full, "arrow") > limit


def test_a_new_worker_serves_the_newest_generation_that_loads(tmp_path):
    path = seed_store(tmp_path / "store")
    store = open_store(path)
    store.change_routing("harbour", {"v1": 0.5, "v2": 0.5}, reason="split", changed_by="tests")
    # v2 corrupted after the (validated) change, before this worker starts.
    coefficients = Path(path) / store.stored_key("harbour", "v2", "coefficients.parquet")
    coefficients.write_bytes(coefficients.read_bytes()[:-7] + b"garbage")
    app = create_app({"store": path, "poll_seconds": 0, "access_log": False})
    c = app.test_client()
    ready = c.get("/readyz")
    assert ready.status_code == 503
    reasons = ready.get_json()["reasons"]
    assert any("'v2'" in r for r in reasons) and any("serving generation 1" in r for r in reasons)
    for i in range(20):
        r = c.post(
            "/v1/models/harbour/score",
            json={"routing_key": f"k{i}", "situations": [situation(0)]},
        )
        assert r.status_code == 200, r.get_data(as_text=True)
        assert r.get_json()["version"] == "v1" and r.headers["X-Routing-Generation"] == "1"
    # Polling again keeps serving generation 1 and keeps reporting the broken version.
    app.extensions["choicecast.registry"].refresh()
    assert c.get("/readyz").status_code == 503
    assert (
        c.post("/v1/models/harbour/score", json={"situations": [situation(0)]}).status_code == 200
    )


def test_scenario_work_over_the_limit_is_413_naming_the_variants(tmp_path):
    # harbour: J = 3.  Ten situations and four variants: 10 * 3 * (1 + 4) = 150 units.
    config = {"store": seed_store(tmp_path / "s"), "poll_seconds": 0, "max_work": 120}
    app = create_app({**config, "access_log": False})
    c = app.test_client()
    situations = [situation(i) for i in range(10)]
    change = {"alternative": "taxi", "attribute": "fare", "op": "add"}
    variants = [
        {"name": f"fare +{k}", "changes": [{**change, "value": float(k)}]} for k in range(4)
    ]
    url = SCENARIOS.format(model="harbour")
    body = refusal(c.post(url, json={"situations": situations, "variants": variants}), 413)
    assert [e["path"] for e in body["errors"]] == ["$", "$.variants"]
    assert "150" in body["detail"] and "max_work" in body["detail"]
    # Three variants: 10 * 3 * 4 = 120 units, at the limit.
    r = c.post(url, json={"situations": situations, "variants": variants[:3]})
    assert r.status_code == 200, r.get_data(as_text=True)
