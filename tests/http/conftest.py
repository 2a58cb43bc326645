"""Fixtures of the HTTP tests: a seeded store, the Flask test client, and the real service
started once per session under gunicorn on 127.0.0.1 (stopped at the end)."""

from __future__ import annotations

import json
import secrets
import shutil
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))

from http_models import seed_store
from http_server import Server

from tests.support.processes import start_service


@pytest.fixture(scope="session")
def store_uri(tmp_path_factory: pytest.TempPathFactory) -> str:
    return seed_store(tmp_path_factory.mktemp("http-store") / "store")


@pytest.fixture
def fresh_store(tmp_path: Path) -> str:
    return seed_store(tmp_path / "store")


@pytest.fixture
def client(store_uri: str):
    from service.api import create_app

    app = create_app({"store": store_uri, "poll_seconds": 0, "access_log": False})
    return app.test_client()


@pytest.fixture(scope="session")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    """The service under gunicorn (2 workers) on its own store, polling every 0.3 s."""
    root = tmp_path_factory.mktemp("http-server")
    store = seed_store(root / "store")
    score_token, admin_token = secrets.token_urlsafe(24), secrets.token_urlsafe(24)
    tokens = root / "tokens.json"
    tokens.write_text(json.dumps({"score": [score_token], "admin": [admin_token]}))
    service = start_service(
        store,
        root,
        env={"CHOICECAST_TOKENS_FILE": str(tokens)},
        workers=2,
        poll_seconds=0.3,
        name="server",
    )
    try:
        yield Server(service.url, store, score_token, admin_token, service.log)
    finally:
        service.stop()
        shutil.rmtree(root / "server-metrics", ignore_errors=True)
