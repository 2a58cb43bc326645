"""Start and stop the processes of a local cluster: an S3-compatible store and service replicas.

Everything listens on 127.0.0.1 at a free port, every wait is bounded, and every process is
stopped (SIGTERM, then SIGKILL after a grace period) by the fixture that started it.
"""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import requests

VENV_BIN = Path(sys.executable).parent


def free_port() -> int:
    """A TCP port nobody listens on right now (bound by the OS, then released)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_until(check: Callable[[], bool], timeout: float, interval: float = 0.05) -> bool:
    """Call ``check`` until it returns True or ``timeout`` seconds pass; exceptions count as
    False. Returns whether it succeeded."""
    deadline = time.monotonic() + timeout
    while True:
        try:
            if check():
                return True
        except Exception:
            pass
        if time.monotonic() >= deadline:
            return False
        time.sleep(interval)


@dataclass
class Running:
    """A started process with its log file."""

    name: str
    process: subprocess.Popen
    log: Path
    url: str = ""
    extra: dict = field(default_factory=dict)

    def alive(self) -> bool:
        return self.process.poll() is None

    def log_tail(self, lines: int = 40) -> str:
        text = self.log.read_text(errors="replace") if self.log.exists() else ""
        return "\n".join(text.splitlines()[-lines:])

    def stop(self, grace: float = 15.0) -> None:
        """SIGTERM the process group (gunicorn and its workers), SIGKILL after ``grace``."""
        if self.process.poll() is not None:
            return
        try:
            os.killpg(self.process.pid, signal.SIGTERM)
        except ProcessLookupError:
            return
        try:
            self.process.wait(timeout=grace)
        except subprocess.TimeoutExpired:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(self.process.pid, signal.SIGKILL)
            self.process.wait(timeout=10)


def start(name: str, command: Sequence[str], env: dict[str, str], log_dir: Path) -> Running:
    """Start ``command`` in its own process group, output to ``log_dir/name.log``."""
    log = log_dir / f"{name}.log"
    with log.open("wb") as out:
        process = subprocess.Popen(
            list(command),
            env=env,
            stdout=out,
            stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL,
            start_new_session=True,
        )
    return Running(name, process, log)


def start_s3(log_dir: Path, env: dict[str, str], timeout: float = 30.0) -> Running:
    """moto's standalone S3-compatible server on 127.0.0.1; returns once it answers."""
    port = free_port()
    server = start(
        "s3",
        [str(VENV_BIN / "python"), "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)],
        env,
        log_dir,
    )
    server.url = f"http://127.0.0.1:{port}"
    if not wait_until(lambda: requests.get(server.url, timeout=1).status_code < 500, timeout):
        server.stop()
        raise RuntimeError(f"the S3 server did not start:\n{server.log_tail()}")
    return server
