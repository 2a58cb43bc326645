"""Fixtures of the HTTP tests: a seeded store, the Flask test client, and the real service
started once per session under gunicorn on 127.0.0.1 (stopped at the end)."""

from __future__ import annotations

import json
import os
import secrets
import shutil
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))

from http_models import seed_store
from http_server import REPO, Server, free_port, serve_command, stop, wait_ready


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
    port = free_port()
    env = {
        **os.environ,
        "CHOICECAST_TOKENS_FILE": str(tokens),
        "CHOICECAST_POLL_SECONDS": "0.3",
        "PROMETHEUS_MULTIPROC_DIR": str(root / "metrics"),
    }
    env.pop("CHOICECAST_SCORE_TOKENS", None)
    env.pop("CHOICECAST_ADMIN_TOKENS", None)
    log = root / "server.log"
    with log.open("wb") as out:
        process = subprocess.Popen(
            serve_command(store, port, 2),
            cwd=REPO,
            env=env,
            stdout=out,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
    url = f"http://127.0.0.1:{port}"
    try:
        wait_ready(url, process)
        yield Server(url, store, score_token, admin_token, log)
    finally:
        stop(process)
        shutil.rmtree(root / "metrics", ignore_errors=True)
