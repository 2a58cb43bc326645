"""Bad input gets a problem document (RFC 9457) naming every offending field; never a 500."""

from __future__ import annotations

import json

import pytest
from http_models import arrow_bytes, columns, long_table, situation

from service.api import create_app
from service.api.schemas import ProblemSchema

SCORE = "/v1/models/harbour/versions/v1/score"
ARROW = "application/vnd.apache.arrow.stream"


def problem(r, status: int) -> dict:
    """The problem document of ``r``, checked against RFC 9457's members."""
    assert r.status_code == status, r.get_data(as_text=True)
    assert r.mimetype == "application/problem+json"
    body = ProblemSchema().load(r.get_json())
    assert body["status"] == status and body["instance"] == r.request.path
    assert body["request_id"] == r.headers["X-Request-ID"]
    return body


def paths(body: dict) -> list[str]:
    return [e["path"] for e in body["errors"]]


def raw_json(client, text: str, path: str = SCORE):
    return client.post(path, data=text, content_type="application/json")


@pytest.mark.parametrize(
    "text",
    ["{", "[1, 2", '{"situations": [}', "\xff\xfe", "", "[" * 100_000 + "]" * 100_000],
    ids=["open", "list", "nested", "bytes", "empty", "deep"],
)
def test_malformed_json_is_400(client, text):
    body = problem(raw_json(client, text), 400)
    assert paths(body) == ["$"]


@pytest.mark.parametrize(
    ("payload", "expected"),
    [
        ([situation(0)], ["$"]),
        ({"situations": [situation(0)], "colour": "red"}, ["$.colour"]),
        ({"situations": [situation(0)], "columns": columns([situation(0)])}, ["$"]),
        ({}, ["$"]),
        ({"situations": "all"}, ["$.situations"]),
        ({"situations": [3]}, ["$.situations[0]"]),
        ({"situations": [situation(0), {"id": 7}]}, ["$.situations[1].id"]),
        ({"situations": [situation(0), situation(0)]}, ["$.situations[1].id"]),
        ({"situations": [situation(0)], "return": {"logsum": "yes"}}, ["$.return.logsum"]),
        ({"situations": [situation(0)], "return": {"elasticities": "fare"}}, ["$.return.elasticities"]),
        ({"situations": [situation(0)], "routing_key": ""}, ["$.routing_key"]),
        ({"columns": {"attributes": {"ferry": {"fare": ["3"]}}}}, ["$.columns.attributes.ferry.fare[0]"]),
        ({"columns": {"available": {"ferry": [1]}}}, ["$.columns.available.ferry[0]"]),
        # NumPy reads a boolean beside numbers as 1 or 0; the column names it by index.
        ({"columns": {"attributes": {"ferry": {"fare": [2.5, True]}}}}, ["$.columns.attributes.ferry.fare[1]"]),
        ({"columns": {"weight": [1, True, 1]}}, ["$.columns.weight[1]"]),
        ({"columns": {"context": {"income": [3, None, "x"]}}}, ["$.columns.context.income[1]", "$.columns.context.income[2]"]),
        ({"situations": [{**situation(0), "id": None}]}, ["$.situations[0].id"]),
        # The second has no id, so it would be answered as "1": taken by the first.
        ({"situations": [{**situation(0), "id": "1"}, {k: v for k, v in situation(1).items() if k != "id"}]}, ["$.situations[1].id"]),
    ],
    ids=["list", "unknown", "both-forms", "neither", "not-list", "not-object", "id-type",
         "dup-id", "bool", "list-option", "empty-key", "string-column", "int-flags",
         "bool-among-numbers", "bool-weight", "null-and-string", "null-id", "index-id-taken"],
)  # fmt: skip
def test_schema_errors_are_400_with_paths(client, payload, expected):
    body = problem(client.post(SCORE, json=payload), 400)
    assert paths(body) == expected


def test_wrong_media_type_is_415(client):
    r = client.post(
        SCORE, data=json.dumps({"situations": [situation(0)]}), content_type="text/plain"
    )
    problem(r, 415)
    problem(client.post(SCORE, data=b"x"), 415)


def test_the_415_names_the_media_types_each_endpoint_takes(client):
    arrow = "application/vnd.apache.arrow.stream"
    score = problem(client.post(SCORE, data=b"x", content_type="text/csv"), 415)
    assert f"send application/json or {arrow}, not 'text/csv'" in score["detail"]
    scenarios = "/v1/models/harbour/scenarios"
    body = problem(client.post(scenarios, data=b"x", content_type=arrow), 415)
    assert f"send application/json, not '{arrow}'" in body["detail"]


@pytest.mark.parametrize(
    "path",
    [
        "/v1/models/ferryboat",
        "/v1/models/harbour/versions/v9",
        "/v1/models/harbour/versions/..%2F..%2Fetc",
        "/v1/models/harbour/versions/%00",
        "/v1/nothing-here",
    ],
)
def test_unknown_model_version_or_path_is_404(client, path):
    problem(client.get(path), 404)


def test_unknown_version_scoring_is_404(client):
    for url in ("/v1/models/harbour/versions/v9/score", "/v1/models/ferryboat/score"):
        problem(client.post(url, json={"situations": [situation(0)]}), 404)


def test_method_not_allowed_is_a_problem(client):
    r = client.get(SCORE)
    problem(r, 405)
    assert "POST" in r.headers["Allow"]


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # Non-finite values (Python's JSON reads NaN/Infinity; 1e400 overflows to inf).
        ('{"situations": [{"attributes": {"ferry": {"fare": NaN}}}]}',
         "$.situations[0].attributes.ferry.fare"),
        ('{"situations": [{"attributes": {"ferry": {"fare": 1e400}}}]}',
         "$.situations[0].attributes.ferry.fare"),
        ('{"situations": [{"context": {"income": -Infinity}}]}', "$.situations[0].context.income"),
    ],
)  # fmt: skip
def test_non_finite_values_are_422(client, text, expected):
    s = situation(0)
    data = json.loads(text)["situations"][0]
    for key, value in data.items():
        for name, inner in value.items():
            if isinstance(inner, dict):
                s[key][name].update(inner)
            else:
                s[key][name] = inner
    body = problem(
        client.post(SCORE, data=json.dumps({"situations": [s]}), content_type="application/json"),
        422,
    )
    assert paths(body) == [expected]


@pytest.mark.parametrize(
    ("mutate", "expected"),
    [
        (lambda s: s["attributes"]["ferry"].pop("fare"), "$.situations[0].attributes.ferry.fare"),
        (lambda s: s["context"].pop("income"), "$.situations[0].context.income"),
        (lambda s: s["attributes"]["bike"].update(time=0.0), "$.situations[0].attributes.bike.time"),
        (lambda s: s["attributes"].update(boat={"fare": 1.0}), "$.situations[0].attributes.boat"),
        (lambda s: s["attributes"]["taxi"].update(comfort=3.0), "$.situations[0].attributes.taxi.comfort"),
        (lambda s: s.update(available={"ferry": False, "taxi": False, "bike": False}),
         "$.situations[0].available"),
        (lambda s: s.update(available={"rocket": True}), "$.situations[0].available.rocket"),
        (lambda s: s["attributes"]["ferry"].update(fare="3"), "$.situations[0].attributes.ferry.fare"),
        (lambda s: s.update(weight=-1.0), "$.situations[0].weight"),
        (lambda s: s.update(colour="red"), "$.situations[0].colour"),
    ],
    ids=["missing-attr", "missing-context", "log-domain", "unknown-alt", "unknown-attr",
         "none-available", "unknown-available", "string", "weight", "unknown-field"],
)  # fmt: skip
def test_values_that_cannot_be_scored_are_422(client, mutate, expected):
    s = situation(0)
    mutate(s)
    r = client.post(SCORE, json={"situations": [situation(1), s]})
    assert r.headers["X-Model-Version"] == "v1"  # the version that judged the input
    body = problem(r, 422)
    assert paths(body) == [expected.replace("[0]", "[1]")]


def test_unavailable_alternative_needs_no_attributes(client):
    s = situation(0)
    del s["attributes"]["taxi"]
    s["available"] = {"taxi": False}
    r = client.post(SCORE, json={"situations": [s]})
    assert r.status_code == 200
    assert r.get_json()["situations"][0]["probabilities"]["taxi"] == 0.0


def test_options_the_model_cannot_serve_are_422(client):
    body = problem(
        client.post(
            SCORE, json={"situations": [situation(0)], "return": {"elasticities": ["wind"]}}
        ),
        422,
    )
    assert paths(body) == ["$.return.elasticities[0]"]


def test_columnar_problems_name_column_and_index(client):
    cols = columns([situation(0), situation(1)])
    cols["attributes"]["bike"]["time"][1] = -2.0
    cols["context"]["income"] = [50.0]
    body = problem(client.post(SCORE, json={"columns": cols}), 422)
    # Both faults at once; the short column is not reported again value by value.
    assert paths(body) == ["$.columns.context.income", "$.columns.attributes.bike.time[1]"]
    cols["context"]["income"] = [50.0, 60.0]
    body = problem(client.post(SCORE, json={"columns": cols}), 422)
    assert paths(body) == ["$.columns.attributes.bike.time[1]"]


def test_arrow_problems(client):
    problem(client.post(SCORE, data=b"not arrow", content_type=ARROW), 400)
    table = long_table([situation(0), situation(1)])
    body = problem(
        client.post(SCORE, data=arrow_bytes(table.append_column("wind", table.column("fare"))),
                    content_type=ARROW),
        422,
    )  # fmt: skip
    assert paths(body) == ["column.wind"]
    bad = table.set_column(table.column_names.index("time"), "time",
                           [[30.0, 12.0, -1.0, 30.0, 12.0, 40.0]])  # fmt: skip
    body = problem(client.post(SCORE, data=arrow_bytes(bad), content_type=ARROW), 422)
    assert paths(body) == ["situation[s0].attributes.bike.time"]
    body = problem(
        client.post(f"{SCORE}?logsum=maybe", data=arrow_bytes(table), content_type=ARROW), 400
    )
    assert paths(body) == ["query.logsum"]


def test_an_arrow_value_that_fails_to_decode_is_named_once(client):
    """By its row or column only: not again as the situation's non-finite value."""
    import pyarrow as pa

    table = long_table([situation(0), situation(1)])
    fare = table.column_names.index("fare")
    values = table.column("fare").to_pylist()
    for cell, message in ((None, "is null"), (float("nan"), "must be a finite number")):
        bad = table.set_column(fare, "fare", pa.array([values[0], cell, *values[2:]]))
        body = problem(client.post(SCORE, data=arrow_bytes(bad), content_type=ARROW), 422)
        assert paths(body) == ["row[1].fare"]
        assert body["errors"][0]["message"].startswith(message)
        assert body["detail"].startswith("1 value(s)")
    text = table.set_column(fare, "fare", pa.array([str(v) for v in values]))
    body = problem(client.post(SCORE, data=arrow_bytes(text), content_type=ARROW), 422)
    assert paths(body) == ["column.fare"]


def test_limits_are_413(store_uri):
    app = create_app({"store": store_uri, "poll_seconds": 0, "max_situations": 3,
                      "max_body_bytes": 20_000, "access_log": False})  # fmt: skip
    client = app.test_client()
    body = problem(client.post(SCORE, json={"situations": [situation(i) for i in range(4)]}), 413)
    assert "3" in body["detail"]
    problem(client.post(SCORE, json={"columns": columns([situation(i) for i in range(4)])}), 413)
    table = long_table([situation(i) for i in range(4)])
    problem(client.post(SCORE, data=arrow_bytes(table), content_type=ARROW), 413)
    big = {"situations": [situation(0)], "routing_key": "k", "pad": "x" * 30_000}
    problem(client.post(SCORE, json=big), 413)
    assert (
        client.post(SCORE, json={"situations": [situation(i) for i in range(3)]}).status_code == 200
    )


def test_unexpected_errors_are_a_500_problem_without_traceback(store_uri, monkeypatch):
    from service.api import scoring_flow

    app = create_app({"store": store_uri, "poll_seconds": 0, "access_log": False})

    def broken(*args, **kwargs):
        raise RuntimeError("secret internals")

    monkeypatch.setattr(scoring_flow, "check_batch", broken)
    r = app.test_client().post(SCORE, json={"situations": [situation(0)]})
    body = problem(r, 500)
    assert "secret" not in r.get_data(as_text=True) and "Traceback" not in r.get_data(as_text=True)
    assert body["title"] == "Internal error"


def test_missing_values_are_named_as_required(client):
    s = situation(0)
    del s["attributes"]["taxi"]["time"]
    body = problem(client.post(SCORE, json={"situations": [s]}), 422)
    assert body["errors"] == [
        {
            "path": "$.situations[0].attributes.taxi.time",
            "message": "is required: the model uses it",
        }
    ]
    cols = columns([situation(0), situation(1)])
    del cols["context"]["income"]
    body = problem(client.post(SCORE, json={"columns": cols}), 422)
    assert body["errors"] == [
        {"path": "$.columns.context.income", "message": "is required: the model uses it"}
    ]


@pytest.mark.parametrize(
    ("payload", "expected"),
    [
        ({"situations": []}, "$.situations"),
        ({"columns": {}}, "$.columns"),
        ({"situations": [dict(situation(0), weight=0.0)]}, "$.situations[*].weight"),
    ],
)
def test_whole_batch_problems_name_the_batch(client, payload, expected):
    assert paths(problem(client.post(SCORE, json=payload), 422)) == [expected]


def test_query_parameters_are_named_when_repeated_or_sent_with_json(client):
    table = long_table([situation(0)])
    twice = problem(
        client.post(f"{SCORE}?logsum=true&logsum=false", data=arrow_bytes(table),
                    content_type=ARROW),
        400,
    )  # fmt: skip
    assert paths(twice) == ["query.logsum"]
    with_json = problem(
        client.post(f"{SCORE}?logsum=maybe", json={"situations": [situation(0)]}), 400
    )
    assert paths(with_json) == ["query.logsum"]
    assert "in the body" in with_json["detail"]
