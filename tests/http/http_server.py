"""Starting and stopping the real service (`choicecast serve`, gunicorn) on 127.0.0.1."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import requests

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
