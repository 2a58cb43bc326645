"""Fixtures of the store tests: one store per test on each backend.

The S3 backend is exercised over real HTTP against moto's standalone server, started once per
session on 127.0.0.1 at a free port and stopped at the end.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterator

import pytest
from store_cases import FERRY_SPEC

from model_store import Store, open_store
from service.choice.spec import spec_from_dict
from tests.store.s3_server import BUCKET, shared_s3


@pytest.fixture(scope="session")
def s3_endpoint() -> Iterator[str]:
    with shared_s3() as endpoint:
        yield endpoint


@pytest.fixture(params=["filesystem", "s3"])
def store(request: pytest.FixtureRequest, tmp_path) -> Store:
    if request.param == "filesystem":
        return open_store(str(tmp_path / "store"))
    endpoint = request.getfixturevalue("s3_endpoint")
    return open_store(f"s3://{BUCKET}/{uuid.uuid4().hex}", endpoint_url=endpoint)


@pytest.fixture
def ferry_spec():
    return spec_from_dict(FERRY_SPEC)
