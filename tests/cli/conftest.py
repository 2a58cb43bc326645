"""Fixtures of the CLI tests: the ``choicecast`` command run in-process against a store on
each backend (S3 through the session's moto server on 127.0.0.1)."""

from __future__ import annotations

import json
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from service.cli import main
from tests.store.s3_server import BUCKET, shared_s3
from tests.store.store_cases import FERRY_SPEC, ferry_coefficients


@pytest.fixture(scope="session")
def s3_endpoint() -> Iterator[str]:
    with shared_s3() as endpoint:
        yield endpoint


@dataclass
class Outcome:
    code: int
    out: str
    err: str

    def json(self):
        return json.loads(self.out)


class Cli:
    """Runs ``choicecast`` with the store options of one backend appended."""

    def __init__(self, capsys: pytest.CaptureFixture, store_args: list[str]):
        self.capsys = capsys
        self.store_args = store_args

    def __call__(self, *args: str, store: bool = True) -> Outcome:
        self.capsys.readouterr()
        code = main([*args, *(self.store_args if store else [])])
        captured = self.capsys.readouterr()
        return Outcome(code, captured.out, captured.err)


@pytest.fixture(params=["filesystem", "s3"])
def cli(request: pytest.FixtureRequest, tmp_path: Path, capsys) -> Cli:
    if request.param == "filesystem":
        return Cli(capsys, ["--store", str(tmp_path / "store")])
    endpoint = request.getfixturevalue("s3_endpoint")
    return Cli(capsys, ["--store", f"s3://{BUCKET}/{uuid.uuid4().hex}", "--s3-endpoint", endpoint])


@pytest.fixture
def ferry_files(tmp_path: Path) -> dict[str, Path]:
    """SPEC.json, coefficients CSV and covariance JSON of the ferry model, as an estimation
    run would export them."""
    coefficients = ferry_coefficients()
    spec = tmp_path / "ferry.json"
    spec.write_text(json.dumps({**FERRY_SPEC, "estimation": {"sample_size": 900}}))
    rows = ["name,estimate,std_error"]
    for name, est, se in zip(
        coefficients.names, coefficients.estimates, coefficients.std_errors, strict=True
    ):
        rows.append(f"{name},{float(est)!r},{'' if np.isnan(se) else repr(float(se))}")
    coefs = tmp_path / "ferry.csv"
    coefs.write_text("\n".join(rows) + "\n")
    cov = tmp_path / "ferry-cov.json"
    assert coefficients.covariance is not None
    cov.write_text(
        json.dumps({"names": list(coefficients.names), "matrix": coefficients.covariance.tolist()})
    )
    return {"spec": spec, "coefficients": coefs, "covariance": cov}
