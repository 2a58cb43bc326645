"""Property: whatever numbers arrive, the answer is a 200 or a 4xx problem, in strict JSON
(no NaN or Infinity), and a 200 holds probabilities that sum to 1 (common practice)."""

from __future__ import annotations

import json
import math

import pytest
from http_models import ALTERNATIVES, situation
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

SCORE = "/v1/models/harbour/versions/v3/score"
values = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(min_value=-1e308, max_value=1e308),
    st.sampled_from([0.0, -0.0, 1e-320, 1e308, -1e308, 5e-324]),
)


def strict(text: str):
    def refuse(token: str):
        raise AssertionError(f"non-standard JSON token {token}")

    return json.loads(text, parse_constant=refuse)


EVERY_OUTPUT = {"logsum": True, "surplus": True, "elasticities": ["fare", "income"],
                "aggregate": True, "std_errors": True}  # fmt: skip
PLAIN = {"logsum": True, "expected_max_utility": True}
"""Probabilities and logsums alone (warnings are errors in this suite: one would surface as a
500)."""


@pytest.mark.parametrize("options", [EVERY_OUTPUT, PLAIN], ids=["every output", "plain"])
@settings(
    max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    cells=st.dictionaries(
        st.tuples(st.sampled_from(ALTERNATIVES), st.sampled_from(["fare", "time"])),
        values,
        max_size=4,
    ),
    income=values,
    weight=values,
)
def test_any_numbers_give_a_clean_answer(client, options, cells, income, weight):
    s = situation(3)
    for (alt, attr), v in cells.items():
        s["attributes"][alt][attr] = v
    s["context"]["income"] = income
    s["weight"] = weight
    r = client.post(
        SCORE,
        data=json.dumps({"situations": [s, situation(4)], "return": options}),
        content_type="application/json",
    )
    assert r.status_code in (200, 422), r.get_data(as_text=True)
    body = strict(r.get_data(as_text=True))
    if r.status_code == 200:
        for out in body["situations"]:
            assert math.isclose(sum(out["probabilities"].values()), 1.0, abs_tol=1e-9)
    else:
        assert body["errors"] and all(e["path"].startswith("$") for e in body["errors"])


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    op=st.sampled_from(["set", "add", "multiply"]),
    value=values,
    alt=st.sampled_from(ALTERNATIVES),
    attr=st.sampled_from(["fare", "time"]),
    remove=st.lists(st.sampled_from(ALTERNATIVES), max_size=3, unique=True),
)
def test_any_scenario_gives_a_clean_answer(client, op, value, alt, attr, remove):
    body = {
        "version": "v3",
        "situations": [situation(i) for i in range(3)],
        "variants": [{"name": "v", "changes": [{"alternative": alt, "attribute": attr, "op": op,
                                                "value": value}], "remove": remove}],
    }  # fmt: skip
    r = client.post(
        "/v1/models/harbour/scenarios", data=json.dumps(body), content_type="application/json"
    )
    assert r.status_code in (200, 422), r.get_data(as_text=True)
    out = strict(r.get_data(as_text=True))
    if r.status_code == 200:
        assert math.isclose(sum(out["variants"][0]["shares"].values()), 1.0, abs_tol=1e-9)


@pytest.mark.parametrize("options", [EVERY_OUTPUT, PLAIN], ids=["every output", "plain"])
def test_values_the_model_ignores_never_spoil_an_answer(client, options):
    """Cells of an unavailable alternative and cells no term uses are ignored, whatever they
    hold (Batch's contract): infinities there leave a 200, equal to the same situation with
    plain values, rather than a NaN or a refusal."""
    plain = situation(3)
    plain["available"] = {"ferry": False}
    odd = situation(3, ferry__fare=math.inf, ferry__time=-math.inf, bike__fare=math.inf)
    odd["available"] = {"ferry": False}
    answers = []
    for s in (plain, odd):
        r = client.post(
            SCORE,
            data=json.dumps({"situations": [s], "return": options}),
            content_type="application/json",
        )
        assert r.status_code == 200, r.get_data(as_text=True)
        answers.append(strict(r.get_data(as_text=True))["situations"])
    assert answers[0] == answers[1]
