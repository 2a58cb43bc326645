"""Invented test models of the HTTP tests: commuters choosing how to cross a fictional harbour.

``harbour`` v1 and v2 are multinomial logit (v2 a re-estimate with a steeper fare
coefficient), v3 nested logit (ferry and water-taxi share a nest) with a covariance matrix.
``harbour`` starts routed 100% to v1.  All numbers are made up for the tests.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from model_store import open_store
from service.choice import Coefficients, spec_from_dict

ALTERNATIVES = ("ferry", "taxi", "bike")


def spec_dict(family: str = "multinomial", range_policy: str = "warn") -> dict:
    spec = {
        "name": "harbour",
        "family": family,
        "alternatives": [{"id": a} for a in ALTERNATIVES],
        "attributes": [
            {"name": "fare", "unit": "EUR", "low": 0.0, "high": 20.0, "role": "cost"},
            {"name": "time", "unit": "min", "low": 2.0, "high": 120.0},
        ],
        "context": [{"name": "income", "unit": "kEUR", "low": 5.0, "high": 300.0}],
        "utilities": {
            "ferry": [
                {"coefficient": "asc_ferry"},
                {"coefficient": "b_fare", "attribute": "fare"},
                {"coefficient": "b_time", "attribute": "time"},
                {"coefficient": "b_income_ferry", "context": "income"},
            ],
            "taxi": [
                {"coefficient": "asc_taxi"},
                {"coefficient": "b_fare", "attribute": "fare"},
                {"coefficient": "b_time", "attribute": "time"},
            ],
            "bike": [{"coefficient": "b_log_time", "attribute": "time", "transform": "log"}],
        },
        "range_policy": range_policy,
    }
    if family == "nested":
        spec["nests"] = [
            {"id": "water", "scale": "lambda_water", "alternatives": ["ferry", "taxi"]},
            {"id": "land", "scale": "lambda_land", "alternatives": ["bike"]},
        ]
    return spec


BASE = {
    "asc_ferry": 0.6,
    "asc_taxi": 0.9,
    "b_fare": -0.30,
    "b_time": -0.04,
    "b_income_ferry": 0.002,
    "b_log_time": -0.9,
}


def coefficients(version: str) -> Coefficients:
    values = dict(BASE)
    if version == "v2":
        values["b_fare"] = -0.42
    if version == "v3":
        values["lambda_water"] = 0.6
        values["lambda_land"] = 1.0
    names = list(values)
    se = {n: 0.05 * abs(v) + 0.01 for n, v in values.items()}
    rng = np.random.default_rng(7)
    a = rng.normal(size=(len(names), len(names))) * 0.01
    cov = a @ a.T + np.diag([se[n] ** 2 for n in names])
    return Coefficients.from_mapping(values, se, (names, cov))


def seed_store(path: Path) -> str:
    """Publish v1-v3 of ``harbour`` and route 100% to v1; returns the store URI."""
    store = open_store(str(path))
    for version, family in (("v1", "multinomial"), ("v2", "multinomial"), ("v3", "nested")):
        store.publish(
            "harbour",
            version,
            spec_from_dict(spec_dict(family)),
            coefficients(version),
            published_by="tests",
        )
    store.change_routing("harbour", {"v1": 1.0}, reason="first release", changed_by="tests")
    return str(path)


def situation(i: int = 0, **overrides: float) -> dict:
    """A valid situation; fares and times vary with ``i``."""
    fare = {"ferry": 3.0 + (i % 5) * 0.5, "taxi": 9.0 + (i % 3), "bike": 0.0}
    time = {"ferry": 25.0 + i % 7, "taxi": 12.0 + i % 4, "bike": 35.0 + i % 11}
    attrs = {a: {"fare": fare[a], "time": time[a]} for a in ALTERNATIVES}
    for key, value in overrides.items():
        alt, attr = key.split("__")
        attrs[alt][attr] = value
    return {"id": f"s{i}", "attributes": attrs, "context": {"income": 40.0 + i % 50}}


def long_table(situations: list[dict]):
    """The same situations as an Arrow long table (one row per situation and alternative)."""
    import pyarrow as pa

    rows = []
    for s in situations:
        for alt, attrs in s["attributes"].items():
            available = s.get("available", {}).get(alt, True)
            rows.append(
                {"situation": s["id"], "alternative": alt, **attrs, "available": available,
                 **s.get("context", {})}
            )  # fmt: skip
    return pa.Table.from_pylist(rows)


def arrow_bytes(table) -> bytes:
    import pyarrow as pa

    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def columns(situations: list[dict]) -> dict:
    """The same situations in the columnar JSON form."""
    out: dict = {"id": [s["id"] for s in situations], "attributes": {}, "context": {},
                 "available": {}}  # fmt: skip
    for alt in ALTERNATIVES:
        for attr in ("fare", "time"):
            out["attributes"].setdefault(alt, {})[attr] = [
                s["attributes"][alt][attr] for s in situations
            ]
        out["available"][alt] = [s.get("available", {}).get(alt, True) for s in situations]
    out["context"]["income"] = [s["context"]["income"] for s in situations]
    return out
