"""The ops walkthrough as a user runs it: validate, publish, route (canary), compare, promote,
roll back, history; on the filesystem and on S3."""

from __future__ import annotations

import json

import numpy as np
import pytest
from cli_cases import ALTS, ferry_population, ferry_utilities, logit_shares, publish

from model_store import open_store
from tests.store.store_cases import FERRY_NAMES, ferry_coefficients
from tests.support.artifacts import write_behind


def test_validate_prints_the_model_and_writes_nothing(cli, ferry_files, tmp_path):
    result = cli(
        "validate",
        str(ferry_files["spec"]),
        "--coefficients",
        str(ferry_files["coefficients"]),
        "--covariance",
        str(ferry_files["covariance"]),
        store=False,
    )
    assert result.code == 0, result.err
    out = result.out
    for text in (
        "model ferry  (family multinomial",
        "fast_boat",
        "asc_fast + b_fare * fare + b_minutes * log(minutes)",
        "b_slow_income * income",
        "[1, 40]",
        "covariance  5 x 5",
        "sample_size 900",
        "nothing was written",
    ):
        assert text in out
    # the t statistic is estimate / std error (common practice): -0.12 / 0.01
    assert any(
        line.split()[:1] == ["b_fare"] and line.split()[-1] == "-12" for line in out.splitlines()
    )
    assert not (tmp_path / "store").exists()


def test_rollout_walkthrough(cli, ferry_files, tmp_path):
    assert publish(cli, ferry_files, "v1").code == 0
    shifted = tmp_path / "v2.json"
    est = ferry_coefficients().estimates.copy()
    est[0] += 0.4  # the fast boat becomes more attractive
    shifted.write_text(json.dumps(dict(zip(FERRY_NAMES, est.tolist(), strict=True))))
    result = publish(cli, ferry_files, "v2", shifted, "--parent", "v1")
    assert result.code == 0, result.err
    assert "published ferry v2" in result.out

    versions = cli("versions", "ferry", "--json").json()
    assert [v["version"] for v in versions] == ["v1", "v2"]
    assert versions[1]["parent"] == "v1" and versions[1]["published_by"] == "ana"

    result = cli(
        "route", "ferry", "--live", "v1=90", "v2=10", "--reason", "canary v2", "--by", "bo"
    )
    assert result.code == 0, result.err
    assert "generation 1" in result.out and "v1 90%, v2 10%" in result.out

    population = ferry_population(tmp_path / "population.parquet")
    result = cli("compare", "ferry", "v1", "v2", "--population", str(population), "--json")
    assert result.code == 0, result.err
    report = result.json()
    for version, estimates in (("v1", ferry_coefficients().estimates), ("v2", est)):
        v, w = ferry_utilities(dict(zip(FERRY_NAMES, estimates, strict=True)), population)
        expected = logit_shares(v, w)
        got = [report["shares"][version][a] for a in ALTS]
        np.testing.assert_allclose(got, expected, rtol=1e-10)
    assert report["shares"]["v2"]["fast_boat"] > report["shares"]["v1"]["fast_boat"]
    assert 0 < report["mean_abs_dp"] < report["max_abs_dp"] < 1
    # own aggregate fare elasticity of an MNL is b_fare * x * (1 - P) on average: negative
    assert report["cost_elasticities"]["v1"]["fast_boat"]["fast_boat"] < 0
    text = cli("compare", "ferry", "v1", "v2", "--population", str(population)).out
    assert "share v1" in text and "aggregate own elasticity with respect to fare" in text

    promoted = cli("promote", "ferry", "v2", "--json")
    assert promoted.code == 0, promoted.err
    assert promoted.json()["live"] == {"v2": 1.0} and promoted.json()["generation"] == 2
    result = cli("rollback", "ferry", "--reason", "fast boat share too high", "--by", "cy")
    assert result.code == 0, result.err
    assert "back to the state of generation 1" in result.out
    history = cli("history", "ferry", "--json").json()
    assert [h["action"] for h in history] == ["route", "promote", "rollback"]
    assert [h["changed_by"] for h in history][::2] == ["bo", "cy"]
    assert history[2]["live"] == {"v1": 90.0, "v2": 10.0}
    assert history[2]["reason"] == "fast boat share too high"
    table = cli("history", "ferry").out
    assert "rollback" in table and "canary v2" in table

    shown = cli("show", "ferry", "--json").json()
    assert shown["routing"]["generation"] == 3
    detail = cli("show", "ferry", "v2", "--json").json()
    assert detail["manifest"]["parent"] == "v1"
    assert detail["coefficients"]["estimates"][0] == pytest.approx(est[0])
    listing = cli("list", "--json").json()
    assert listing == [
        {"model": "ferry", "versions": 2, "live": "v1 90%, v2 10%", "shadow": None, "generation": 3}
    ]


def test_republishing_is_refused_and_changes_nothing(cli, ferry_files, tmp_path):
    assert publish(cli, ferry_files, "v1").code == 0
    before = cli("show", "ferry", "v1", "--json").json()
    other = tmp_path / "other.json"
    other.write_text(json.dumps(dict(zip(FERRY_NAMES, [1.0, -0.2, -1.0, 0.5, 0.01], strict=True))))
    result = publish(cli, ferry_files, "v1", other)
    assert result.code == 2
    assert "version 'v1' of model 'ferry' is already published" in result.err
    assert cli("show", "ferry", "v1", "--json").json() == before


def test_stale_generation_is_refused(cli, ferry_files):
    publish(cli, ferry_files, "v1")
    publish(cli, ferry_files, "v2")
    assert cli("route", "ferry", "--live", "v1=1", "--reason", "a").code == 0
    assert (
        cli("route", "ferry", "--live", "v2=1", "--reason", "b", "--expect-generation", "1").code
        == 0
    )
    result = cli("route", "ferry", "--live", "v1=1", "--reason", "c", "--expect-generation", "1")
    assert result.code == 1
    assert "computed from generation 1 but the current generation is 2" in result.err
    assert len(cli("history", "ferry", "--json").json()) == 2


def test_corrupt_version_is_refused_by_show_and_route(cli, ferry_files):
    publish(cli, ferry_files, "v1")
    store = open_store(cli.store_args[1], *cli.store_args[3:4])
    key = store.stored_key("ferry", "v1", "coefficients.parquet")
    data = store.backend.get(key)
    write_behind(store, key, data[:-7])  # truncated behind the store's back
    result = cli("show", "ferry", "v1")
    assert result.code == 1
    assert "ferry/v1/coefficients.parquet: checksum mismatch" in result.err
    result = cli("route", "ferry", "--live", "v1=1", "--reason", "x")
    assert result.code == 2 and "does not load" in result.err
    assert "Traceback" not in result.err
