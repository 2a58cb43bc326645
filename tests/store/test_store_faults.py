"""Bad inputs from an estimation run, and stores that cannot be reached."""

from __future__ import annotations

import contextlib
import json
import time

import numpy as np
import pytest
from store_cases import FERRY_NAMES, FERRY_SPEC, publish_ferry

from model_store import StoreError, StoreUnavailable, open_store
from model_store.inputs import read_coefficients, read_covariance, read_model_inputs
from service.choice.spec import SpecError, validate_model
from tests.store.s3_server import BUCKET
from tests.support.processes import free_port


def write(tmp_path, name: str, text: str):
    path = tmp_path / name
    path.write_text(text)
    return path


def coef_csv(tmp_path, rows=None, header="name,estimate,std_error"):
    rows = rows or [
        "asc_fast,0.8,0.1",
        "b_fare,-0.12,0.01",
        "b_minutes,-0.9,0.05",
        "asc_slow,0.3,0.08",
        "b_slow_income,0.004,",
    ]
    return write(tmp_path, "coefficients.csv", "\n".join([header, *rows]) + "\n")


def spec_file(tmp_path, **changes):
    spec = json.loads(json.dumps(FERRY_SPEC))
    spec.update(changes)
    return write(tmp_path, "spec.json", json.dumps(spec))


def problems_of(exc: SpecError) -> list[str]:
    return [p.path for p in exc.problems]


def test_inputs_in_csv_and_json_read_alike(tmp_path):
    names, est, se = read_coefficients(coef_csv(tmp_path))
    as_list = [
        {"name": n, "estimate": float(e), "std_error": None if np.isnan(s) else float(s)}
        for n, e, s in zip(names, est, se, strict=True)
    ]
    names2, est2, se2 = read_coefficients(write(tmp_path, "c.json", json.dumps(as_list)))
    assert names == names2 == list(FERRY_NAMES)
    np.testing.assert_array_equal(est, est2)
    np.testing.assert_array_equal(se, se2)
    names3, est3, se3 = read_coefficients(
        write(tmp_path, "m.json", json.dumps(dict(zip(names, est.tolist(), strict=True))))
    )
    assert names3 == names and se3 is None
    np.testing.assert_array_equal(est3, est)


def test_spec_with_estimation_metadata(tmp_path):
    path = spec_file(tmp_path, estimation={"sample_size": 800, "log_likelihood": -512.3})
    spec, coefficients, estimation = read_model_inputs(path, coef_csv(tmp_path))
    validate_model(spec, coefficients)
    assert estimation == {"sample_size": 800, "log_likelihood": -512.3}


@pytest.mark.parametrize(
    ("text", "path"),
    [
        ("{not json", "spec"),
        ("[]", "$"),
        (json.dumps({**FERRY_SPEC, "estimation": {"date": 5}}), "estimation.date"),
        (json.dumps({**FERRY_SPEC, "colour": "red"}), "colour"),
    ],
)
def test_malformed_spec_files(tmp_path, text, path):
    with pytest.raises(SpecError) as info:
        read_model_inputs(write(tmp_path, "spec.json", text), coef_csv(tmp_path))
    assert path in problems_of(info.value)


def test_duplicate_alternatives(tmp_path):
    alts = [*FERRY_SPEC["alternatives"], {"id": "slow_boat"}]
    with pytest.raises(SpecError) as info:
        read_model_inputs(spec_file(tmp_path, alternatives=alts), coef_csv(tmp_path))
    assert "alternatives[3].id" in problems_of(info.value)


def test_unknown_transform(tmp_path):
    utilities = json.loads(json.dumps(FERRY_SPEC["utilities"]))
    utilities["fast_boat"][2]["transform"] = "sqrt"
    with pytest.raises(SpecError) as info:
        read_model_inputs(spec_file(tmp_path, utilities=utilities), coef_csv(tmp_path))
    assert "utilities.fast_boat[2].transform" in problems_of(info.value)


@pytest.mark.parametrize(
    ("rows", "path"),
    [
        (["asc_fast,nan,0.1"], "coefficients[line 2].asc_fast.estimate"),
        (["asc_fast,inf,0.1"], "coefficients[line 2].asc_fast.estimate"),
        (["asc_fast,0.8,-inf"], "coefficients[line 2].asc_fast.std_error"),
        (["asc_fast,abc,0.1"], "coefficients[line 2].asc_fast.estimate"),
        (["asc_fast,0.8"], "coefficients[line 2]"),
        (["asc_fast,0.8,0.1", "asc_fast,0.7,0.1"], "coefficients[line 3].name"),
        ([",0.8,0.1"], "coefficients[line 2].name"),
    ],
)
def test_malformed_coefficient_rows(tmp_path, rows, path):
    with pytest.raises(SpecError) as info:
        read_coefficients(coef_csv(tmp_path, rows))
    assert path in problems_of(info.value)


def test_bad_coefficient_header_and_json(tmp_path):
    with pytest.raises(SpecError, match=r"coefficients\.header"):
        read_coefficients(coef_csv(tmp_path, header="coef,value"))
    with pytest.raises(SpecError, match=r"coefficients\.asc_fast\.estimate: must be finite"):
        read_coefficients(write(tmp_path, "c.json", '{"asc_fast": NaN}'))
    with pytest.raises(SpecError, match=r"coefficients\[0\]\.estimate: is required"):
        read_coefficients(write(tmp_path, "c.json", '[{"name": "asc_fast"}]'))
    with pytest.raises(SpecError, match="not valid JSON"):
        read_coefficients(write(tmp_path, "c.json", '{"asc_fast": 0.'))
    with pytest.raises(SpecError, match="not found"):
        read_coefficients(tmp_path / "absent.csv")


def test_missing_and_extra_coefficients(tmp_path):
    rows = ["asc_fast,0.8,0.1", "b_fare,-0.12,0.01", "b_minutes,-0.9,0.05", "asc_slow,0.3,0.08"]
    spec, coefficients, _ = read_model_inputs(
        spec_file(tmp_path), coef_csv(tmp_path, [*rows, "b_extra,1,"])
    )
    with pytest.raises(SpecError) as info:
        validate_model(spec, coefficients)
    assert set(problems_of(info.value)) == {
        "coefficients.b_slow_income",
        "coefficients.b_extra",
    }


def nested_spec(tmp_path, scale_value: float):
    spec = {
        "name": "ferry_nested",
        "family": "nested",
        "alternatives": [{"id": "a"}, {"id": "b"}, {"id": "c"}],
        "attributes": [{"name": "fare", "role": "cost"}],
        "utilities": {
            "a": [{"coefficient": "b_fare", "attribute": "fare"}],
            "b": [{"coefficient": "asc_b"}, {"coefficient": "b_fare", "attribute": "fare"}],
            "c": [{"coefficient": "asc_c"}, {"coefficient": "b_fare", "attribute": "fare"}],
        },
        "nests": [
            {"id": "boats", "scale": "lambda_boats", "alternatives": ["a", "b"]},
            {"id": "home", "scale": "lambda_home", "alternatives": ["c"]},
        ],
    }
    coefs = f"name,estimate\nb_fare,-0.1\nasc_b,0.2\nasc_c,0.1\nlambda_boats,{scale_value}\nlambda_home,1\n"
    return write(tmp_path, "n.json", json.dumps(spec)), write(tmp_path, "n.csv", coefs)


@pytest.mark.parametrize("scale", [0.0, -0.5, 1.3])
def test_nest_scale_outside_unit_interval(tmp_path, scale):
    # (0, 1] is the range consistent with utility maximisation (Train 2009, sec. 4.2.1; from memory)
    spec, coefficients, _ = read_model_inputs(*nested_spec(tmp_path, scale))
    with pytest.raises(SpecError) as info:
        validate_model(spec, coefficients)
    assert problems_of(info.value) == ["nests[0].scale"]


def test_covariance_files(tmp_path):
    names = list(FERRY_NAMES)
    rng = np.random.default_rng(7)
    jac = rng.normal(size=(8, 5))
    psd = jac.T @ jac  # J^T J is positive semi-definite (common practice)
    lines = ["name," + ",".join(names)]
    lines += [
        n + "," + ",".join(repr(float(v)) for v in row) for n, row in zip(names, psd, strict=True)
    ]
    csv_names, matrix = read_covariance(write(tmp_path, "cov.csv", "\n".join(lines)))
    np.testing.assert_array_equal(matrix, psd)
    json_path = write(tmp_path, "cov.json", json.dumps({"names": names, "matrix": psd.tolist()}))
    assert read_covariance(json_path)[0] == csv_names == names
    spec, coefficients, _ = read_model_inputs(spec_file(tmp_path), coef_csv(tmp_path), json_path)
    validate_model(spec, coefficients)


def test_non_psd_and_malformed_covariance(tmp_path):
    names = list(FERRY_NAMES)
    bad = np.eye(5)
    bad[0, 1] = bad[1, 0] = 2.0  # eigenvalues of [[1,2],[2,1]] are 3 and -1
    path = write(tmp_path, "cov.json", json.dumps({"names": names, "matrix": bad.tolist()}))
    spec, coefficients, _ = read_model_inputs(spec_file(tmp_path), coef_csv(tmp_path), path)
    with pytest.raises(SpecError, match="covariance: must be positive semi-definite"):
        validate_model(spec, coefficients)
    asym = np.eye(5)
    asym[0, 1] = 0.5
    path = write(tmp_path, "cov.json", json.dumps({"names": names, "matrix": asym.tolist()}))
    spec, coefficients, _ = read_model_inputs(spec_file(tmp_path), coef_csv(tmp_path), path)
    with pytest.raises(SpecError, match="covariance: must be symmetric"):
        validate_model(spec, coefficients)
    text = "name,asc_fast,b_fare\nasc_fast,1,nan\nb_fare,0,1\n"
    with pytest.raises(SpecError, match=r"covariance\[line 2\]\.b_fare: must be finite"):
        read_covariance(write(tmp_path, "cov.csv", text))
    with pytest.raises(SpecError, match=r"covariance\[line 3\]: needs 2 values"):
        read_covariance(write(tmp_path, "cov.csv", "name,a,b\na,1,0\nb,0\n"))
    short = json.dumps({"names": names[:4], "matrix": np.eye(4).tolist()})
    with pytest.raises(SpecError, match=r"covariance\.b_slow_income: coefficient missing"):
        read_model_inputs(spec_file(tmp_path), coef_csv(tmp_path), write(tmp_path, "c.json", short))


@pytest.mark.timeout(60)  # a refused connection must not be retried forever (a hang fails)
def test_unreachable_s3_endpoint_fails_fast_with_a_clear_error(monkeypatch):
    monkeypatch.setenv("AWS_ACCESS_KEY_ID", "k")
    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", "s")
    monkeypatch.setenv("CHOICECAST_S3_CONNECT_TIMEOUT", "1")
    store = open_store("s3://nowhere/x", endpoint_url=f"http://127.0.0.1:{free_port()}")
    with pytest.raises(StoreUnavailable, match=r"store s3://nowhere/x at http://127\.0\.0\.1"):
        store.list_versions("ferry")
    with pytest.raises(StoreUnavailable):
        store.check()


def test_missing_bucket_is_reported(s3_endpoint):
    store = open_store("s3://no-such-bucket/p", endpoint_url=s3_endpoint)
    with pytest.raises(StoreUnavailable, match="bucket 'no-such-bucket' does not exist"):
        store.check()
    with pytest.raises(StoreUnavailable, match="does not exist"):
        publish_ferry(store, "v1")


def test_filesystem_store_that_is_a_file(tmp_path):
    blocker = tmp_path / "store"
    blocker.write_text("not a directory")
    store = open_store(str(blocker))
    with pytest.raises(StoreUnavailable, match="not a directory"):
        store.check()
    with pytest.raises(StoreUnavailable):
        publish_ferry(store, "v1")


def test_bad_store_uris():
    with pytest.raises(StoreError, match="unsupported URI scheme"):
        open_store("ftp://host/x")
    with pytest.raises(StoreError, match="names no bucket"):
        open_store("s3:///prefix")


def test_store_uri_defaults(monkeypatch, tmp_path):
    monkeypatch.delenv("CHOICECAST_STORE", raising=False)
    assert open_store().uri == "var/store"
    monkeypatch.setenv("CHOICECAST_STORE", str(tmp_path / "s"))
    assert open_store().uri == str(tmp_path / "s")
    assert open_store(f"file://{tmp_path}/t").uri == f"{tmp_path}/t"


def test_s3_store_opened_before_a_fork_works_in_the_child(s3_endpoint):
    """A gunicorn-style fork after opening: the child gets its own client (boto3 clients and
    their connection pools must not be shared across processes; boto3 documentation)."""
    import os

    store = open_store(f"s3://{BUCKET}/fork-{os.getpid()}", endpoint_url=s3_endpoint)
    publish_ferry(store, "v1")
    parent_client = store.backend.client
    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:  # child: report and leave at once, whatever happens
        try:
            fresh = store.backend.client is not parent_client
            ok = fresh and store.list_versions("ferry") == ["v1"]
            os.write(write, b"ok" if ok else b"bad")
        finally:
            os._exit(0)
    os.close(write)
    reaped = False
    try:
        deadline = time.monotonic() + 60
        while not reaped:
            reaped = os.waitpid(pid, os.WNOHANG) != (0, 0)
            assert reaped or time.monotonic() < deadline, "the child did not finish"
            time.sleep(0.02)
        assert os.read(read, 10) == b"ok"
    finally:
        os.close(read)
        if not reaped:  # only our own child, and only while it is still ours
            with contextlib.suppress(ChildProcessError, ProcessLookupError):
                os.kill(pid, 9)
                os.waitpid(pid, 0)
    assert store.backend.client is parent_client
