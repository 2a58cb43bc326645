"""Invented models of the core's tests: commuters choosing among car, bus, rail and bike.

Train (2009) section and equation numbers are cited from memory.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from service.choice import Batch, Coefficients, CompiledModel, compile_model, spec_from_dict

ALTERNATIVES = ("car", "bus", "rail", "bike")


def model_from(spec: dict[str, Any], estimates: dict[str, float], **kw: Any) -> CompiledModel:
    return compile_model(spec_from_dict(spec), Coefficients.from_mapping(estimates, **kw))


def commute_spec(family: str = "multinomial", nests: list | None = None) -> dict[str, Any]:
    """Generic fare and time (log), alternative-specific constants and wait coefficient,
    an income interaction on the car constant and on the rail fare."""
    spec: dict[str, Any] = {
        "name": "commute",
        "family": family,
        "alternatives": [{"id": a} for a in ALTERNATIVES],
        "attributes": [
            {"name": "fare", "unit": "EUR", "role": "cost", "low": 0, "high": 30},
            {"name": "time", "unit": "min", "low": 1, "high": 180},
            {"name": "wait", "unit": "min"},
        ],
        "context": [{"name": "income", "unit": "kEUR"}],
        "utilities": {
            "car": [
                {"coefficient": "asc_car"},
                {"coefficient": "b_fare", "attribute": "fare"},
                {"coefficient": "b_time", "attribute": "time", "transform": "log"},
                {"coefficient": "b_car_income", "context": "income"},
            ],
            "bus": [
                {"coefficient": "asc_bus"},
                {"coefficient": "b_fare", "attribute": "fare"},
                {"coefficient": "b_time", "attribute": "time", "transform": "log"},
                {"coefficient": "b_wait_bus", "attribute": "wait", "transform": "log1p"},
            ],
            "rail": [
                {"coefficient": "asc_rail"},
                {"coefficient": "b_fare", "attribute": "fare"},
                {"coefficient": "b_time", "attribute": "time", "transform": "log"},
                {"coefficient": "b_wait_rail", "attribute": "wait"},
                {"coefficient": "b_fare_income", "attribute": "fare", "context": "income"},
            ],
            "bike": [{"coefficient": "b_time_bike", "attribute": "time"}],
        },
    }
    if nests is not None:
        spec["nests"] = nests
    return spec


COMMUTE_ESTIMATES = {
    "asc_car": 0.4,
    "b_fare": -0.25,
    "b_time": -0.9,
    "b_car_income": 0.012,
    "asc_bus": -0.2,
    "b_wait_bus": -0.35,
    "asc_rail": 0.3,
    "b_wait_rail": -0.06,
    "b_fare_income": 0.001,
    "b_time_bike": -0.04,
}

TRANSIT_NESTS = [
    {"id": "private", "scale": "lambda_private", "alternatives": ["car", "bike"]},
    {"id": "transit", "scale": "lambda_transit", "alternatives": ["bus", "rail"]},
]


def commute_model(family: str = "multinomial", scales: tuple[float, float] = (0.7, 0.45)):
    if family == "nested":
        est = dict(COMMUTE_ESTIMATES, lambda_private=scales[0], lambda_transit=scales[1])
        return model_from(commute_spec("nested", TRANSIT_NESTS), est)
    return model_from(commute_spec(), COMMUTE_ESTIMATES)


def commute_batch(model: CompiledModel, n: int, seed: int = 0, p_unavailable: float = 0.0):
    """Random but plausible situations; the first alternative stays available."""
    rng = np.random.default_rng(seed)
    j = len(model.alternatives)
    x = np.empty((n, j, len(model.attributes)))
    x[:, :, 0] = rng.uniform(0.5, 12.0, (n, j))
    x[:, :, 1] = rng.uniform(5.0, 90.0, (n, j))
    x[:, :, 2] = rng.uniform(0.0, 20.0, (n, j))
    z = rng.uniform(15.0, 120.0, (n, len(model.context)))
    avail = rng.random((n, j)) >= p_unavailable
    avail[:, 0] = True
    w = rng.uniform(0.5, 2.0, n)
    return Batch(attributes=x, context=z, available=avail, weights=w)


def reference_utilities(model: CompiledModel, batch: Batch) -> np.ndarray:
    """V (N, J) straight from the spec's definition, term by term (Train 2009, sec. 3.1)."""
    fns = {"identity": lambda x: x, "log": np.log, "log1p": np.log1p}
    est = model.coefficients.as_mapping()
    v = np.zeros((batch.size, len(model.alternatives)))
    for j, alt in enumerate(model.alternatives):
        for t in model.spec.utilities[alt]:
            f = np.ones(batch.size)
            if t.attribute is not None:
                f = fns[t.transform](batch.attributes[:, j, model.attributes.index(t.attribute)])
            if t.context is not None:
                f = f * batch.context[:, model.context.index(t.context)]
            v[:, j] += est[t.coefficient] * f
    return v


@pytest.fixture
def mnl() -> CompiledModel:
    return commute_model()


@pytest.fixture
def nested() -> CompiledModel:
    return commute_model("nested")
