"""Fixtures of the HTTP tests: a seeded store, the Flask test client, and the real service
started once per session under gunicorn on 127.0.0.1 (stopped at the end)."""

from __future__ import annotations

import json
import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest
import requests

sys.path.insert(0, str(Path(__file__).parent))

from models import seed_store

REPO = Path(__file__).resolve().parents[2]


@dataclass(frozen=True)
class Server:
    url: str
    store: str
    score_token: str
    admin_token: str
    log: Path

    def headers(self, scope: str = "score") -> dict[str, str]:
        token = self.admin_token if scope == "admin" else self.score_token
        return {"Authorization": f"Bearer {token}"}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def serve_command(store: str, port: int, workers: int) -> list[str]:
    """``choicecast serve`` (the console script beside this Python)."""
    if not (REPO / "service" / "cli.py").exists():  # until the console command lands
        code = f"from service.api.server import run; run({store!r}, '127.0.0.1', {port}, {workers})"
        return [sys.executable, "-c", code]
    script = Path(sys.executable).with_name("choicecast")
    return [str(script), "serve", "--store", store, "--host", "127.0.0.1", "--port", str(port),
            "--workers", str(workers)]  # fmt: skip


def wait_ready(url: str, process: subprocess.Popen, seconds: float = 30.0) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"the server exited with {process.returncode}")
        try:
            if requests.get(f"{url}/readyz", timeout=2).status_code == 200:
                return
        except (requests.ConnectionError, requests.Timeout):
            pass
        time.sleep(0.1)
    raise RuntimeError(f"{url}/readyz did not answer 200 within {seconds} s")


def stop(process: subprocess.Popen) -> None:
    if process.poll() is None:
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=15)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait(timeout=5)


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
