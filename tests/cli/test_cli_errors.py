"""User errors get a message naming the field and exit status 2; failures exit 1; never a
traceback. One test runs the installed console script to prove the entry point."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from service.cli import main
from tests.store.store_cases import FERRY_SPEC
from tests.support.processes import free_port

CHOICECAST = Path(sys.executable).parent / "choicecast"


def run(capsys, *args):
    code = main(list(args))
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err
    return code, captured.out, captured.err


def test_console_script_reports_bad_input_without_traceback(tmp_path):
    spec = tmp_path / "spec.json"
    spec.write_text("{broken")
    coefs = tmp_path / "c.csv"
    coefs.write_text("name,estimate\n")
    proc = subprocess.run(
        [str(CHOICECAST), "validate", str(spec), "--coefficients", str(coefs)],
        capture_output=True,
        text=True,
        timeout=60,
        env={**os.environ, "CHOICECAST_STORE": str(tmp_path / "store")},
    )
    assert proc.returncode == 2
    assert "spec: not valid JSON" in proc.stderr
    assert "Traceback" not in proc.stderr


@pytest.mark.parametrize(
    ("spec_change", "coefficients", "expected"),
    [
        (
            {},
            "name,estimate\nasc_fast,nan\n",
            "coefficients[line 2].asc_fast.estimate: must be finite",
        ),
        (
            {"alternatives": [{"id": "a"}, {"id": "a"}]},
            "name,estimate\nx,1\n",
            "alternatives[1].id: duplicate alternative id 'a'",
        ),
        ({}, "name,estimate\nasc_fast,1\n", "coefficients.b_fare: used by the model but missing"),
        ({}, "colour,estimate\n", "coefficients.header"),
    ],
)
def test_validate_names_the_field(capsys, tmp_path, spec_change, coefficients, expected):
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({**FERRY_SPEC, **spec_change}))
    coefs = tmp_path / "c.csv"
    coefs.write_text(coefficients)
    code, out, err = run(capsys, "validate", str(spec), "--coefficients", str(coefs))
    assert code == 2
    assert expected in err
    assert out == ""


def test_non_psd_covariance_is_named(capsys, ferry_files, tmp_path):
    names = json.loads(ferry_files["covariance"].read_text())["names"]
    matrix = [[1.0 if i == j else 0.0 for j in range(5)] for i in range(5)]
    matrix[0][1] = matrix[1][0] = 3.0
    cov = tmp_path / "bad-cov.json"
    cov.write_text(json.dumps({"names": names, "matrix": matrix}))
    code, _, err = run(
        capsys, "validate", str(ferry_files["spec"]), "--coefficients",
        str(ferry_files["coefficients"]), "--covariance", str(cov),
    )  # fmt: skip
    assert code == 2 and "covariance: must be positive semi-definite" in err


def test_unreachable_store_is_a_failure(capsys, monkeypatch):
    monkeypatch.setenv("AWS_ACCESS_KEY_ID", "k")
    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", "s")
    monkeypatch.setenv("CHOICECAST_S3_CONNECT_TIMEOUT", "1")
    endpoint = f"http://127.0.0.1:{free_port()}"
    code, _, err = run(capsys, "list", "--store", "s3://b/p", "--s3-endpoint", endpoint)
    assert code == 1
    assert f"store s3://b/p at {endpoint}" in err


def test_unknown_names_and_bad_options(capsys, tmp_path):
    store = ["--store", str(tmp_path / "store")]
    code, _, err = run(capsys, "versions", "nope", *store)
    assert code == 2 and "model 'nope' not found" in err
    code, _, err = run(capsys, "route", "nope", "--live", "v1", "--reason", "r", *store)
    assert code == 2 and "--live: 'v1' must be VERSION=WEIGHT" in err
    code, _, err = run(capsys, "show", "bad/name", *store)
    assert code == 2 and "model: 'bad/name' is not a valid name" in err
    code, _, err = run(capsys, "list", "--store", "ftp://x")
    assert code == 2 and "unsupported URI scheme" in err
    with pytest.raises(SystemExit) as info:
        main(["route", "m"])  # argparse: --live and --reason are required
    assert info.value.code == 2


def test_serve_hands_its_options_to_the_server(monkeypatch):
    import service.api.server as server

    calls = []
    monkeypatch.setattr(server, "run", lambda *a, **kw: calls.append((a, kw)))
    assert (
        main(
            [
                "serve",
                "--store",
                "s3://m/p",
                "--s3-endpoint",
                "http://127.0.0.1:9",
                "--port",
                "8123",
            ]
        )
        == 0
    )
    ((args, kwargs),) = calls
    assert args == ("s3://m/p",)
    assert kwargs["port"] == 8123 and kwargs["workers"] == 2 and kwargs["host"] == "127.0.0.1"
    assert kwargs["s3_endpoint"] == "http://127.0.0.1:9"


def test_bad_population_rows_are_named(cli, ferry_files, tmp_path):
    from cli_cases import publish

    publish(cli, ferry_files, "v1")
    bad = tmp_path / "bad.csv"
    bad.write_text(
        "situation,alternative,fare,minutes,income\n"
        "1,fast_boat,3,10,50\n1,ferry,3,10,50\n"
        "2,fast_boat,3,0,50\n2,stay_home,,,50\n"
    )
    result = cli("compare", "ferry", "v1", "v1", "--population", str(bad))
    assert result.code == 2
    assert "population[row 1].alternative: not an alternative of the model" in result.err
    bad.write_text(
        "situation,alternative,fare,minutes,income\n2,fast_boat,3,0,50\n2,stay_home,,,50\n"
    )
    result = cli("compare", "ferry", "v1", "v1", "--population", str(bad))
    assert result.code == 2
    assert (
        "population[situation 2].attributes.fast_boat.minutes: must be > 0 under log" in result.err
    )
    assert "Traceback" not in result.err


def test_validate_json_lists_problems_for_pipelines(capsys, tmp_path):
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps(FERRY_SPEC))
    coefs = tmp_path / "c.json"
    coefs.write_text('{"asc_fast": 1, "b_fare": "cheap"}')
    code = main(["validate", str(spec), "--coefficients", str(coefs), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 2 and report["valid"] is False
    assert {"path": "coefficients.b_fare.estimate", "message": "must be a number, not 'cheap'"} in (
        report["problems"]
    )


def test_validate_lists_the_problems_of_every_input_file_at_once(capsys, tmp_path):
    """A coefficient that cannot be read does not hide the covariance's own problem."""
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps(FERRY_SPEC))
    names = ["asc_fast", "b_fare", "b_minutes", "asc_slow", "b_slow_income"]
    coefs = tmp_path / "c.csv"
    coefs.write_text(
        "name,estimate,std_error\nasc_fast,0.5,0.1\nb_fare,nan,0.01\nb_minutes,-1.2,0.2\n"
        "asc_slow,0.1,0.1\nb_slow_income,0.02,0.01\n"
    )
    rows = [[1.0 if i == j else 0.0 for j in range(5)] for i in range(5)]
    rows[1][1] = -1.0  # an eigenvalue of -1: not a covariance matrix
    cov = tmp_path / "cov.csv"
    cov.write_text(
        "name,"
        + ",".join(names)
        + "\n"
        + "".join(f"{n}," + ",".join(map(str, r)) + "\n" for n, r in zip(names, rows, strict=True))
    )
    code, _, err = run(
        capsys, "validate", str(spec), "--coefficients", str(coefs), "--covariance", str(cov)
    )
    assert code == 2
    assert err.splitlines()[1:] == [
        "  coefficients[line 3].b_fare.estimate: must be finite, not 'nan'",
        "  covariance: must be positive semi-definite (smallest eigenvalue -1)",
    ]
