"""Invented demo models for a first try of the store, the CLI and the service.

The scenario is fictional: the island town of Wrenmouth, whose residents cross the strait by a
toll bridge or the old ferry, commute by car, tram, bicycle or on foot; and the Larkspur Loaf
bakeries, which deliver by courier or let customers collect, where a customer may also not
order at all. Every number is made up (plausible signs: cost coefficients negative, nest
scales in (0, 1]). Covariance matrices are built as D R D with R the correlation matrix of an
invented Jacobian's J^T J, hence positive semi-definite; D holds the standard errors.

Populations are generated deterministically (fixed seeds) as long tables.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from model_store.errors import VersionExists
from model_store.store import Store
from service.choice.spec import Coefficients, spec_from_dict

PUBLISHER = "choicecast-demo"


@dataclass(frozen=True)
class DemoVersion:
    model: str
    version: str
    spec: dict[str, Any]
    estimates: dict[str, float]
    relative_se: float
    estimation: dict[str, Any]
    seed: int


BRIDGE = {
    "name": "wrenmouth_crossing",
    "family": "binary",
    "alternatives": [
        {"id": "toll_bridge", "label": "Toll bridge"},
        {"id": "old_ferry", "label": "Old ferry"},
    ],
    "attributes": [
        {"name": "toll", "unit": "crown", "low": 0.0, "high": 12.0, "role": "cost"},
        {"name": "minutes", "unit": "min", "low": 3.0, "high": 60.0},
    ],
    "context": [],
    "utilities": {
        "toll_bridge": [
            {"coefficient": "asc_bridge"},
            {"coefficient": "b_toll", "attribute": "toll"},
            {"coefficient": "b_minutes", "attribute": "minutes"},
        ],
        "old_ferry": [
            {"coefficient": "b_toll", "attribute": "toll"},
            {"coefficient": "b_minutes", "attribute": "minutes"},
        ],
    },
    "range_policy": "warn",
}

COMMUTE = {
    "name": "wrenmouth_commute",
    "family": "multinomial",
    "alternatives": [
        {"id": "car", "label": "Car"},
        {"id": "tram", "label": "Tram"},
        {"id": "bicycle", "label": "Bicycle"},
        {"id": "walk", "label": "On foot"},
    ],
    "attributes": [
        {"name": "cost", "unit": "crown", "low": 0.0, "high": 15.0, "role": "cost"},
        {"name": "minutes", "unit": "min", "low": 2.0, "high": 90.0},
    ],
    "context": [
        {"name": "age", "unit": "years", "low": 16.0, "high": 90.0},
        {"name": "rain_mm", "unit": "mm", "low": 0.0, "high": 40.0},
    ],
    "utilities": {
        "car": [
            {"coefficient": "asc_car"},
            {"coefficient": "b_cost", "attribute": "cost"},
            {"coefficient": "b_log_minutes", "attribute": "minutes", "transform": "log"},
        ],
        "tram": [
            {"coefficient": "asc_tram"},
            {"coefficient": "b_cost", "attribute": "cost"},
            {"coefficient": "b_log_minutes", "attribute": "minutes", "transform": "log"},
        ],
        "bicycle": [
            {"coefficient": "asc_bicycle"},
            {"coefficient": "b_log_minutes", "attribute": "minutes", "transform": "log"},
            {"coefficient": "b_bicycle_rain", "context": "rain_mm"},
            {"coefficient": "b_bicycle_minutes_age", "attribute": "minutes", "context": "age"},
        ],
        "walk": [
            {"coefficient": "b_log_minutes", "attribute": "minutes", "transform": "log"},
        ],
    },
    "range_policy": "warn",
}

COMMUTE_NESTED = {
    **COMMUTE,
    "name": "wrenmouth_commute_nested",
    "family": "nested",
    "nests": [
        {"id": "motorised", "scale": "lambda_motorised", "alternatives": ["car", "tram"]},
        {"id": "active", "scale": "lambda_active", "alternatives": ["bicycle", "walk"]},
    ],
}

BAKERY = {
    "name": "larkspur_delivery",
    "family": "multinomial",
    "alternatives": [
        {"id": "express_courier", "label": "Courier within the hour"},
        {"id": "standard_courier", "label": "Courier same day"},
        {"id": "collect", "label": "Collect at the counter"},
        {"id": "no_order", "label": "No order", "outside": True},
    ],
    "attributes": [
        {"name": "fee", "unit": "crown", "low": 0.0, "high": 9.0, "role": "cost"},
        {"name": "wait_minutes", "unit": "min", "low": 0.0, "high": 240.0},
    ],
    "context": [{"name": "basket", "unit": "crown", "low": 3.0, "high": 80.0}],
    "utilities": {
        "express_courier": [
            {"coefficient": "asc_express"},
            {"coefficient": "b_fee", "attribute": "fee"},
            {"coefficient": "b_wait", "attribute": "wait_minutes", "transform": "log1p"},
            {"coefficient": "b_fee_basket", "attribute": "fee", "context": "basket"},
        ],
        "standard_courier": [
            {"coefficient": "asc_standard"},
            {"coefficient": "b_fee", "attribute": "fee"},
            {"coefficient": "b_wait", "attribute": "wait_minutes", "transform": "log1p"},
            {"coefficient": "b_fee_basket", "attribute": "fee", "context": "basket"},
        ],
        "collect": [
            {"coefficient": "asc_collect"},
            {"coefficient": "b_wait", "attribute": "wait_minutes", "transform": "log1p"},
        ],
        "no_order": [],
    },
    "range_policy": "warn",
}

COMMUTE_V1 = {
    "asc_car": 0.6,
    "b_cost": -0.28,
    "b_log_minutes": -1.1,
    "asc_tram": 0.35,
    "asc_bicycle": 0.1,
    "b_bicycle_rain": -0.07,
    "b_bicycle_minutes_age": -0.0012,
}

VERSIONS = (
    DemoVersion(
        "wrenmouth_crossing",
        "v1",
        BRIDGE,
        {"asc_bridge": 0.4, "b_toll": -0.35, "b_minutes": -0.06},
        0.12,
        {
            "sample_size": 1840,
            "log_likelihood": -1012.4,
            "date": "2026-03-02",
            "notes": "invented demo estimates",
        },
        11,
    ),
    DemoVersion(
        "wrenmouth_commute",
        "v1",
        COMMUTE,
        COMMUTE_V1,
        0.1,
        {
            "sample_size": 5210,
            "log_likelihood": -5633.0,
            "date": "2026-04-14",
            "notes": "invented demo estimates",
        },
        12,
    ),
    DemoVersion(
        "wrenmouth_commute",
        "v2",
        COMMUTE,
        {**COMMUTE_V1, "b_cost": -0.24, "asc_tram": 0.5, "b_bicycle_rain": -0.09},
        0.09,
        {
            "sample_size": 6105,
            "log_likelihood": -6521.7,
            "date": "2026-09-30",
            "notes": "invented demo estimates, re-estimated after the tram extension",
        },
        13,
    ),
    DemoVersion(
        "wrenmouth_commute_nested",
        "v1",
        COMMUTE_NESTED,
        {**COMMUTE_V1, "lambda_motorised": 0.55, "lambda_active": 0.8},
        0.1,
        {
            "sample_size": 5210,
            "log_likelihood": -5601.9,
            "date": "2026-04-20",
            "notes": "invented demo estimates",
        },
        14,
    ),
    DemoVersion(
        "larkspur_delivery",
        "v1",
        BAKERY,
        {
            "asc_express": 1.9,
            "b_fee": -0.45,
            "b_wait": -0.38,
            "b_fee_basket": 0.004,
            "asc_standard": 2.2,
            "asc_collect": 1.1,
        },
        0.15,
        {
            "sample_size": 2990,
            "log_likelihood": -3770.2,
            "date": "2026-06-11",
            "notes": "invented demo estimates",
        },
        15,
    ),
)

ROUTES = {
    "wrenmouth_crossing": {"v1": 100.0},
    "wrenmouth_commute": {"v1": 90.0, "v2": 10.0},
    "wrenmouth_commute_nested": {"v1": 100.0},
    "larkspur_delivery": {"v1": 100.0},
}


def demo_coefficients(demo: DemoVersion) -> Coefficients:
    """Estimates with a PSD covariance D R D (R from an invented Jacobian's J^T J)."""
    names = tuple(demo.estimates)
    est = np.array([demo.estimates[n] for n in names])
    rng = np.random.default_rng(demo.seed)
    k = len(names)
    jac = rng.normal(size=(4 * k, k))
    gram = jac.T @ jac
    d = np.sqrt(np.diag(gram))
    corr = gram / np.outer(d, d)
    se = demo.relative_se * np.maximum(np.abs(est), 0.01)
    cov = corr * np.outer(se, se)
    cov = (cov + cov.T) / 2
    return Coefficients(names=names, estimates=est, std_errors=se, covariance=cov)


def population(spec: dict[str, Any], situations: int = 2000, seed: int = 7) -> pa.Table:
    """A deterministic long table of ``situations`` for ``spec`` (every alternative offered
    except, in one situation in ten, the last inside alternative)."""
    rng = np.random.default_rng(seed)
    alts = [a["id"] for a in spec["alternatives"]]
    n_j = len(alts)
    rows = situations * n_j
    columns: dict[str, Any] = {
        "situation": np.repeat(np.arange(1, situations + 1), n_j),
        "alternative": np.tile(np.array(alts, dtype=object), situations),
    }
    for var in spec["attributes"]:
        low, high = var["low"], var["high"]
        if var["name"] in ("minutes",):
            low = max(low, 1.0)
        columns[var["name"]] = np.round(rng.uniform(low, low + 0.8 * (high - low), rows), 2)
    outside = {a["id"] for a in spec["alternatives"] if a.get("outside")}
    is_outside = np.isin(columns["alternative"], list(outside))
    for var in spec["attributes"]:
        columns[var["name"]] = np.where(is_outside, 0.0, columns[var["name"]])
    for var in spec.get("context", []):
        low, high = var["low"], var["high"]
        values = np.round(rng.uniform(low, low + 0.7 * (high - low), situations), 1)
        columns[var["name"]] = np.repeat(values, n_j)
    inside = [a for a in alts if a not in outside]
    dropped = np.tile(np.array(alts, dtype=object) == inside[-1], situations)
    dropped &= np.repeat(np.arange(situations) % 10 == 9, n_j)
    columns["available"] = ~dropped
    columns["weight"] = np.repeat(np.round(rng.uniform(0.5, 2.0, situations), 3), n_j)
    columns["alternative"] = columns["alternative"].astype(str)
    return pa.table(columns)


def seed_store(
    store: Store, populations: Path, changed_by: str = PUBLISHER
) -> Iterator[tuple[str, str]]:
    """Publish the demo versions and their routing, write the populations. Idempotent:
    existing versions, routing and files are left as they are. Yields (what, outcome)."""
    store.backend.ensure()
    for demo in VERSIONS:
        what = f"{demo.model} {demo.version}"
        if demo.version in store.list_versions(demo.model):
            yield what, "already published (left as it is)"
            continue
        try:
            store.publish(
                demo.model,
                demo.version,
                spec_from_dict(demo.spec),
                demo_coefficients(demo),
                published_by=changed_by,
                estimation=demo.estimation,
                parent="v1" if demo.version != "v1" else None,
            )
            yield what, "published"
        except VersionExists:
            yield what, "already published (left as it is)"
    for model, live in ROUTES.items():
        state = store.get_routing(model)
        if state.generation:
            yield f"{model} routing", f"generation {state.generation} exists (left as it is)"
            continue
        shares = ", ".join(f"{v} {w:g}%" for v, w in live.items())
        state = store.change_routing(
            model,
            live,
            reason=f"demo set-up: {shares}",
            changed_by=changed_by,
            expected_generation=0,
        )
        yield f"{model} routing", f"generation {state.generation}: {shares}"
    populations.mkdir(parents=True, exist_ok=True)
    specs = {d.model: d.spec for d in VERSIONS}
    for i, (model, spec) in enumerate(specs.items()):
        path = populations / f"{model}.parquet"
        if path.exists():
            yield str(path), "exists (left as it is)"
            continue
        temp = path.with_name(f".{path.name}.tmp")
        pq.write_table(population(spec, seed=100 + i), temp)
        temp.replace(path)
        yield str(path), "written"
