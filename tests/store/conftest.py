"""Fixtures of the store tests: one store per test on each backend.

The S3 backend is exercised over real HTTP against moto's standalone server, started once per
session on 127.0.0.1 at a free port and stopped at the end.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator

import pytest
from store_cases import BUCKET, FERRY_SPEC, free_port

from model_store import Store, open_store
from service.choice.spec import spec_from_dict


@pytest.fixture(scope="session")
def s3_endpoint() -> Iterator[str]:
    from moto.server import ThreadedMotoServer

    saved = {k: os.environ.get(k) for k in ("AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY")}
    os.environ["AWS_ACCESS_KEY_ID"] = "test-key"
    os.environ["AWS_SECRET_ACCESS_KEY"] = "test-secret"
    port = free_port()
    server = ThreadedMotoServer(ip_address="127.0.0.1", port=port, verbose=False)
    server.start()
    endpoint = f"http://127.0.0.1:{port}"
    try:
        open_store(f"s3://{BUCKET}", endpoint_url=endpoint).backend.ensure()
        yield endpoint
    finally:
        server.stop()
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


@pytest.fixture(params=["filesystem", "s3"])
def store(request: pytest.FixtureRequest, tmp_path) -> Store:
    if request.param == "filesystem":
        return open_store(str(tmp_path / "store"))
    endpoint = request.getfixturevalue("s3_endpoint")
    return open_store(f"s3://{BUCKET}/{uuid.uuid4().hex}", endpoint_url=endpoint)


@pytest.fixture
def ferry_spec():
    return spec_from_dict(FERRY_SPEC)
