"""The three request forms of one batch (per-situation JSON, columnar JSON, Arrow IPC long table)
get identical answers, and those answers are the logit probabilities of the published formula.

Property tests (hypothesis, derandomised so CI is repeatable) through the Flask test client.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator
from pathlib import Path

import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from model_store import open_store
from service.api.app import create_app
from tests.support import artifacts
from tests.support.payloads import reference_probabilities

ARROW = "application/vnd.apache.arrow.stream"
ALTS = ("ferry", "plane", "stay")
PATH = f"/v1/models/{artifacts.MODEL}/versions/v1/score"


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory) -> Iterator:
    root: Path = tmp_path_factory.mktemp("codec-store")
    store = open_store(str(root))
    artifacts.publish_good(store, "v1")
    app = create_app({"store": str(root), "poll_seconds": 0, "access_log": False})
    yield app.test_client()


def _value(low: float, high: float) -> st.SearchStrategy[float]:
    return st.floats(low, high, allow_nan=False, allow_infinity=False)


situation = st.fixed_dictionaries(
    {
        "fare": st.tuples(_value(5, 400), _value(5, 400)),
        "hours": st.tuples(_value(0.5, 12), _value(0.5, 12)),
        "party": _value(1, 8),
        "weight": _value(0.1, 10),
        # At least one alternative stays available.
        "available": st.tuples(st.booleans(), st.booleans(), st.booleans()).filter(any),
    }
)


def rows_body(batch: list[dict]) -> dict:
    return {
        "return": {"logsum": True},
        "situations": [
            {
                "id": f"s{i}",
                "attributes": {
                    alt: {"fare": s["fare"][j], "hours": s["hours"][j]}
                    for j, alt in enumerate(ALTS[:2])
                },
                "context": {"party": s["party"]},
                "available": dict(zip(ALTS, s["available"], strict=True)),
                "weight": s["weight"],
            }
            for i, s in enumerate(batch)
        ],
    }


def columns_body(batch: list[dict]) -> dict:
    return {
        "return": {"logsum": True},
        "columns": {
            "id": [f"s{i}" for i in range(len(batch))],
            "attributes": {
                alt: {
                    "fare": [s["fare"][j] for s in batch],
                    "hours": [s["hours"][j] for s in batch],
                }
                for j, alt in enumerate(ALTS[:2])
            },
            "context": {"party": [s["party"] for s in batch]},
            "available": {alt: [s["available"][j] for s in batch] for j, alt in enumerate(ALTS)},
            "weight": [s["weight"] for s in batch],
        },
    }


def arrow_body(batch: list[dict]) -> bytes:
    """Long table: one row per (situation, alternative); null where an attribute is unused."""
    rows = [(i, j) for i in range(len(batch)) for j in range(len(ALTS))]
    table = pa.table(
        {
            "situation": pa.array([f"s{i}" for i, _ in rows], pa.string()),
            "alternative": pa.array([ALTS[j] for _, j in rows], pa.string()),
            "fare": pa.array(
                [batch[i]["fare"][j] if j < 2 else None for i, j in rows], pa.float64()
            ),
            "hours": pa.array(
                [batch[i]["hours"][j] if j < 2 else None for i, j in rows], pa.float64()
            ),
            "available": pa.array([batch[i]["available"][j] for i, j in rows], pa.bool_()),
            "party": pa.array([batch[i]["party"] for i, _ in rows], pa.float64()),
            "weight": pa.array([batch[i]["weight"] for i, _ in rows], pa.float64()),
        }
    )
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def answers_from_json(body: dict) -> list[tuple[tuple[float, ...], float]]:
    """(probabilities in model order, logsum) per situation, from either JSON form."""
    if "situations" in body:
        return [
            (tuple(s["probabilities"][a] for a in ALTS), s["logsum"]) for s in body["situations"]
        ]
    cols = body["columns"]
    n = len(cols["id"])
    return [(tuple(cols["probabilities"][a][i] for a in ALTS), cols["logsum"][i]) for i in range(n)]


def answers_from_arrow(payload: bytes) -> list[tuple[tuple[float, ...], float]]:
    table = pa.ipc.open_stream(payload).read_all().to_pylist()
    out: dict[str, dict] = {}
    for row in table:
        entry = out.setdefault(row["situation"], {"p": {}, "logsum": row["logsum"]})
        entry["p"][row["alternative"]] = row["probability"]
    return [(tuple(e["p"][a] for a in ALTS), e["logsum"]) for e in out.values()]


@settings(
    max_examples=25,
    derandomize=True,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture],
)
@given(batch=st.lists(situation, min_size=1, max_size=12))
def test_rows_columns_and_arrow_give_identical_answers(client, batch: list[dict]) -> None:
    rows = client.post(PATH, json=rows_body(batch))
    columns = client.post(PATH, json=columns_body(batch))
    arrow = client.post(f"{PATH}?logsum=true", data=arrow_body(batch), content_type=ARROW)
    for response in (rows, columns, arrow):
        assert response.status_code == 200, response.get_data(as_text=True)[:1000]
    assert arrow.mimetype == ARROW
    from_rows = answers_from_json(rows.get_json())
    assert from_rows == answers_from_json(columns.get_json())  # exact, not approximate
    assert from_rows == answers_from_arrow(arrow.get_data())

    spec = artifacts.spec()
    coefficients = artifacts.coefficients()
    for situation_body, (probabilities, logsum) in zip(
        rows_body(batch)["situations"], from_rows, strict=True
    ):
        expected = reference_probabilities(spec, coefficients, situation_body)
        for alt, p in zip(ALTS, probabilities, strict=True):
            # Train 2009, eq. 3.6 (from memory); unavailable alternatives are exactly 0.
            assert p == pytest.approx(expected[alt], rel=1e-12, abs=1e-15)
            if not situation_body["available"][alt]:
                assert p == 0.0
        assert math.isfinite(logsum)
        assert sum(probabilities) == pytest.approx(1.0, abs=1e-12)  # common practice


def test_answers_do_not_depend_on_json_key_order(client) -> None:
    """The same situations with keys in reversed order get the same bytes of probabilities."""
    body = rows_body(
        [
            {
                "fare": (40.0, 190.0),
                "hours": (5.5, 1.25),
                "party": 3.0,
                "weight": 1.0,
                "available": (True, True, True),
            }
        ]
    )

    def reverse(obj):
        if isinstance(obj, dict):
            return {k: reverse(obj[k]) for k in reversed(list(obj))}
        if isinstance(obj, list):
            return [reverse(x) for x in obj]
        return obj

    a = client.post(PATH, json=body)
    b = client.post(PATH, data=json.dumps(reverse(body)), content_type="application/json")
    assert a.status_code == b.status_code == 200
    assert answers_from_json(a.get_json()) == answers_from_json(b.get_json())
