"""Calibration of the constants to target shares, checked against an independent solver
(SciPy) and against the logit and nested logit share formulas written out here."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from cli_cases import ferry_population, ferry_utilities, logit_shares, publish
from scipy.optimize import fsolve

from tests.store.store_cases import FERRY_NAMES, ferry_coefficients

TARGETS = {"fast_boat": 0.3, "slow_boat": 0.25, "stay_home": 0.45}


def targets_text(targets: dict[str, float]) -> str:
    return ",".join(f"{k}={v}" for k, v in targets.items())


def test_mnl_constants_match_targets_and_an_independent_solution(cli, ferry_files, tmp_path):
    publish(cli, ferry_files, "v1")
    population = ferry_population(tmp_path / "pop.parquet")
    result = cli(
        "calibrate", "ferry", "v1", "--targets", targets_text(TARGETS),
        "--population", str(population), "--new-version", "v1-cal", "--by", "dee",
    )  # fmt: skip
    assert result.code == 0, result.err
    assert "converged after" in result.out and "reference alternative stay_home" in result.out
    detail = cli("show", "ferry", "v1-cal", "--json").json()
    manifest = detail["manifest"]
    assert manifest["parent"] == "v1" and manifest["published_by"] == "dee"
    calibration = manifest["calibration"]
    assert calibration["targets"] == TARGETS
    assert calibration["reference"] == "stay_home"
    assert calibration["iterations"] >= 1 and calibration["final_gap"] <= 1e-6
    beta = dict(
        zip(detail["coefficients"]["names"], detail["coefficients"]["estimates"], strict=True)
    )

    # the calibrated version reproduces the targets (Train 2009, eq. 3.6, from memory; by sample enumeration)
    v, w = ferry_utilities(beta, population)
    np.testing.assert_allclose(logit_shares(v, w), list(TARGETS.values()), atol=2e-6)

    # the same constants from SciPy's root finder on the share equations
    original = dict(zip(FERRY_NAMES, ferry_coefficients().estimates, strict=True))

    def gap(ascs):
        trial = {**original, "asc_fast": ascs[0], "asc_slow": ascs[1]}
        v, w = ferry_utilities(trial, population)
        return logit_shares(v, w)[:2] - [TARGETS["fast_boat"], TARGETS["slow_boat"]]

    solution = fsolve(gap, [original["asc_fast"], original["asc_slow"]], xtol=1e-12)
    np.testing.assert_allclose([beta["asc_fast"], beta["asc_slow"]], solution, atol=1e-4)
    for name in ("b_fare", "b_minutes", "b_slow_income"):
        assert beta[name] == original[name]  # only the constants move


NESTED = {
    "name": "harbour",
    "family": "nested",
    "alternatives": [{"id": "launch"}, {"id": "barge"}, {"id": "walk"}],
    "attributes": [{"name": "fare", "role": "cost"}],
    "utilities": {
        "launch": [{"coefficient": "asc_launch"}, {"coefficient": "b_fare", "attribute": "fare"}],
        "barge": [{"coefficient": "asc_barge"}, {"coefficient": "b_fare", "attribute": "fare"}],
        "walk": [],
    },
    "nests": [
        {"id": "boats", "scale": "lambda_boats", "alternatives": ["launch", "barge"]},
        {"id": "foot", "scale": "lambda_foot", "alternatives": ["walk"]},
    ],
}


def nested_shares(beta: dict[str, float], fare: np.ndarray) -> np.ndarray:
    """Nested logit (Train 2009, eq. 4.2; from memory): P_i = exp(V_i/l_k) (sum_{j in k} exp(V_j/l_k))^(l_k-1)
    / sum_l (sum_{j in l} exp(V_j/l_l))^l_l; unweighted shares."""
    lam = beta["lambda_boats"]
    v_launch = beta["asc_launch"] + beta["b_fare"] * fare[:, 0]
    v_barge = beta["asc_barge"] + beta["b_fare"] * fare[:, 1]
    inner = np.exp(v_launch / lam) + np.exp(v_barge / lam)
    denom = inner**lam + 1.0  # the walk nest: exp(0 / 1) ** 1
    p = np.column_stack(
        [
            np.exp(v_launch / lam) * inner ** (lam - 1) / denom,
            np.exp(v_barge / lam) * inner ** (lam - 1) / denom,
            1.0 / denom,
        ]
    )
    return p.mean(axis=0)


def test_nested_constants_match_targets(cli, tmp_path):
    spec = tmp_path / "harbour.json"
    spec.write_text(json.dumps(NESTED))
    coefs = tmp_path / "harbour.csv"
    coefs.write_text(
        "name,estimate\nasc_launch,0.2\nb_fare,-0.3\nasc_barge,-0.1\nlambda_boats,0.4\nlambda_foot,1\n"
    )
    assert cli("publish", str(spec), "--coefficients", str(coefs), "--version", "v1").code == 0
    rng = np.random.default_rng(9)
    n = 300
    fare = rng.uniform(1, 8, (n, 2))
    table = pa.table(
        {
            "situation": np.repeat(np.arange(n), 3),
            "alternative": np.tile(["launch", "barge", "walk"], n),
            "fare": np.column_stack([fare, np.zeros(n)]).ravel(),
        }
    )
    pq.write_table(table, tmp_path / "harbour.parquet")
    targets = {"launch": 0.2, "barge": 0.35, "walk": 0.45}
    result = cli(
        "calibrate", "harbour", "v1", "--targets", targets_text(targets), "--reference", "walk",
        "--population", str(tmp_path / "harbour.parquet"), "--new-version", "v2",
    )  # fmt: skip
    assert result.code == 0, result.err
    detail = cli("show", "harbour", "v2", "--json").json()
    beta = dict(
        zip(detail["coefficients"]["names"], detail["coefficients"]["estimates"], strict=True)
    )
    np.testing.assert_allclose(nested_shares(beta, fare), list(targets.values()), atol=2e-6)


@pytest.mark.parametrize(
    ("targets", "message"),
    [
        ("fast_boat=0.5,slow_boat=0.3,stay_home=0.3", "targets: must sum to 1"),
        ("fast_boat=0.5,slow_boat=0.5", "targets.stay_home: missing"),
        (
            "fast_boat=0.5,slow_boat=0.3,stay_home=0.1,ferry=0.1",
            "targets.ferry: not an alternative",
        ),
        (
            "fast_boat=1.2,slow_boat=-0.3,stay_home=0.1",
            "targets.fast_boat: must be a share in (0, 1)",
        ),
        ("fast_boat:0.5", "must be ALTERNATIVE=SHARE"),
    ],
)
def test_bad_targets_are_refused(cli, ferry_files, tmp_path, targets, message):
    publish(cli, ferry_files, "v1")
    population = ferry_population(tmp_path / "pop.parquet", n=20)
    result = cli(
        "calibrate", "ferry", "v1", "--targets", targets, "--population", str(population),
        "--new-version", "v2",
    )  # fmt: skip
    assert result.code == 2
    assert message in result.err
    assert [v["version"] for v in cli("versions", "ferry", "--json").json()] == ["v1"]


def test_no_convergence_publishes_nothing(cli, ferry_files, tmp_path):
    publish(cli, ferry_files, "v1")
    population = ferry_population(tmp_path / "pop.parquet", n=50)
    result = cli(
        "calibrate", "ferry", "v1", "--targets", "fast_boat=0.01,slow_boat=0.01,stay_home=0.98",
        "--population", str(population), "--new-version", "v2", "--max-iterations", "1",
        "--tolerance", "1e-12",
    )  # fmt: skip
    assert result.code == 1
    assert "did NOT converge" in result.out and "nothing published" in result.err
    assert [v["version"] for v in cli("versions", "ferry", "--json").json()] == ["v1"]


def test_existing_new_version_and_missing_population(cli, ferry_files, tmp_path):
    publish(cli, ferry_files, "v1")
    result = cli(
        "calibrate", "ferry", "v1", "--targets", targets_text(TARGETS),
        "--population", str(tmp_path / "absent.parquet"), "--new-version", "v2",
    )  # fmt: skip
    assert result.code == 2 and "population: file" in result.err and "not found" in result.err
    population = ferry_population(tmp_path / "pop.parquet", n=20)
    result = cli(
        "calibrate", "ferry", "v1", "--targets", targets_text(TARGETS),
        "--population", str(population), "--new-version", "v1",
    )  # fmt: skip
    assert result.code == 2 and "already published" in result.err


def test_validate_reports_nests_with_their_scales(cli, tmp_path):
    spec = tmp_path / "harbour.json"
    spec.write_text(json.dumps(NESTED))
    coefs = tmp_path / "harbour.csv"
    coefs.write_text(
        "name,estimate\nasc_launch,0.2\nb_fare,-0.3\nasc_barge,-0.1\nlambda_boats,0.4\nlambda_foot,1\n"
    )
    result = cli("validate", str(spec), "--coefficients", str(coefs), store=False)
    assert result.code == 0, result.err
    nests = result.out.split("\nnests\n", 1)[1]
    assert "boats  lambda_boats    0.4  launch, barge" in nests
    assert "covariance  none" in result.out
    result = cli(
        "publish", str(spec), "--coefficients", str(coefs), "--version", "v1", "--model", "ferry"
    )
    assert result.code == 2 and "the spec is named 'harbour', not 'ferry'" in result.err
