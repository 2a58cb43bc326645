"""Start and stop real processes on 127.0.0.1: ``choicecast serve`` (gunicorn), the
``choicecast`` CLI, and moto's S3-compatible server.

- Every process gets its own process group (``start_new_session``) and a log file holding its
  stdout and stderr; :meth:`Running.stop` sends SIGTERM to the group, then SIGKILL after a grace
  period, so gunicorn's workers never outlive a test.
- Every wait is a bounded loop (:func:`wait_until`).
- Nothing listens anywhere but 127.0.0.1.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import requests

REPO = Path(__file__).resolve().parents[2]
VENV_BIN = Path(sys.executable).parent
HOST = "127.0.0.1"

# Credentials moto accepts (any non-empty value); never real ones.
S3_TEST_ENV = {
    "AWS_ACCESS_KEY_ID": "choicecast-test-key",
    "AWS_SECRET_ACCESS_KEY": "choicecast-test-secret",
    "AWS_DEFAULT_REGION": "us-east-1",
}


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nobody listens on right now (bound by the OS, released)."""
    with socket.socket() as s:
        s.bind((HOST, 0))
        return s.getsockname()[1]


def wait_until(check: Callable[[], bool], timeout: float, interval: float = 0.05) -> bool:
    """Call ``check`` until it returns True or ``timeout`` seconds pass (exceptions count as
    False); returns whether it succeeded."""
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
    """A started process, its log file and (for servers) the URL it answers on."""

    name: str
    process: subprocess.Popen
    log: Path
    url: str = ""
    port: int = 0
    extra: dict = field(default_factory=dict)

    @property
    def pid(self) -> int:
        return self.process.pid

    def alive(self) -> bool:
        return self.process.poll() is None

    def log_text(self) -> str:
        return self.log.read_text(errors="replace") if self.log.exists() else ""

    def log_tail(self, lines: int = 60) -> str:
        return "\n".join(self.log_text().splitlines()[-lines:])

    def stop(self, grace: float = 15.0) -> None:
        """SIGTERM the process group, SIGKILL after ``grace`` seconds; waits for the leader."""
        if self.process.poll() is not None:
            _kill_group(self.process.pid, signal.SIGKILL)  # stray children of a dead leader
            return
        _kill_group(self.process.pid, signal.SIGTERM)
        try:
            self.process.wait(timeout=grace)
        except subprocess.TimeoutExpired:
            _kill_group(self.process.pid, signal.SIGKILL)
            self.process.wait(timeout=10)
        _kill_group(self.process.pid, signal.SIGKILL)

    def kill(self) -> None:
        """SIGKILL the whole group at once (an abrupt outage) and reap the leader."""
        _kill_group(self.process.pid, signal.SIGKILL)
        if self.process.poll() is None:
            self.process.wait(timeout=10)


def _kill_group(pgid: int, sig: int) -> None:
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(pgid, sig)


def start(
    name: str,
    command: Sequence[str],
    env: Mapping[str, str],
    log_dir: Path,
    cwd: Path = REPO,
) -> Running:
    """Start ``command`` in its own process group, output to ``log_dir/name.log``."""
    log_dir.mkdir(parents=True, exist_ok=True)
    log = log_dir / f"{name}.log"
    with log.open("ab") as out:
        process = subprocess.Popen(
            list(command),
            env=dict(env),
            cwd=cwd,
            stdout=out,
            stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL,
            start_new_session=True,
        )
    return Running(name, process, log)


# -- environment and the CLI --------------------------------------------------------------


def clean_env(extra: Mapping[str, str] | None = None) -> dict[str, str]:
    """This process's environment without any ``CHOICECAST_*``/AWS settings, plus ``extra``."""
    env = {
        k: v
        for k, v in os.environ.items()
        if not k.startswith(("CHOICECAST_", "AWS_", "PROMETHEUS_MULTIPROC"))
    }
    env["PYTHONUNBUFFERED"] = "1"
    env.update(extra or {})
    return env


def choicecast_command(*args: str) -> list[str]:
    """The console command, as installed in the virtual environment."""
    script = VENV_BIN / "choicecast"
    if script.exists():
        return [str(script), *args]
    return [sys.executable, "-m", "service.cli", *args]


def run_cli(
    *args: str,
    env: Mapping[str, str] | None = None,
    timeout: float = 120.0,
    cwd: Path | None = None,
) -> subprocess.CompletedProcess[str]:
    """Run ``choicecast ARGS`` to completion (bounded by ``timeout``), output captured; ``cwd``
    (default a scratch directory beside nothing) receives any relative output files."""
    return subprocess.run(
        choicecast_command(*args),
        env=dict(env) if env is not None else clean_env(),
        cwd=cwd or Path(tempfile.gettempdir()),
        capture_output=True,
        text=True,
        timeout=timeout,
        stdin=subprocess.DEVNULL,
    )


def cli_ok(
    *args: str,
    env: Mapping[str, str] | None = None,
    timeout: float = 120.0,
    cwd: Path | None = None,
) -> str:
    """Run the CLI and return its stdout; raise with its output if it fails."""
    done = run_cli(*args, env=env, timeout=timeout, cwd=cwd)
    if done.returncode != 0:
        raise AssertionError(
            f"choicecast {' '.join(args)} exited {done.returncode}\n"
            f"stdout:\n{done.stdout}\nstderr:\n{done.stderr}"
        )
    return done.stdout


# -- the service ----------------------------------------------------------------------------


def readiness(url: str, timeout: float = 3.0) -> tuple[int, dict]:
    """(status, body) of GET /readyz."""
    response = requests.get(f"{url}/readyz", timeout=timeout)
    try:
        body = response.json()
    except ValueError:
        body = {}
    return response.status_code, body


def start_service(
    store_uri: str,
    log_dir: Path,
    *,
    env: Mapping[str, str] | None = None,
    workers: int = 2,
    poll_seconds: float | None = 0.2,
    ready_timeout: float = 60.0,
    require_ready: bool = True,
    name: str = "service",
) -> Running:
    """``choicecast serve`` on a free port; returns once /readyz answers (200 unless
    ``require_ready`` is False).  ``env`` is added to a clean environment; ``poll_seconds``
    None leaves the service's own store polling interval."""
    port = free_port()
    polling = {} if poll_seconds is None else {"CHOICECAST_POLL_SECONDS": str(poll_seconds)}
    full_env = clean_env(
        {
            **polling,
            "PROMETHEUS_MULTIPROC_DIR": str(_fresh_dir(log_dir / f"{name}-metrics")),
            **(env or {}),
        }
    )
    server = start(
        name,
        choicecast_command(
            "serve",
            "--store",
            store_uri,
            "--host",
            HOST,
            "--port",
            str(port),
            "--workers",
            str(workers),
        ),
        full_env,
        log_dir,
    )
    server.url, server.port = f"http://{HOST}:{port}", port

    def ready() -> bool:
        if not server.alive():
            raise RuntimeError("exited")
        status, _ = readiness(server.url, timeout=2)
        return status == 200 or not require_ready

    if not wait_until(ready, ready_timeout, interval=0.1):
        status = server.process.poll()
        server.stop()
        raise RuntimeError(
            f"the service did not become ready (exit status {status}):\n{server.log_tail()}"
        )
    if not wait_until(lambda: len(worker_pids(server.pid)) == workers, ready_timeout):
        server.stop()
        raise RuntimeError(f"gunicorn did not start {workers} workers:\n{server.log_tail()}")
    return server


@contextmanager
def serving(store_uri: str, log_dir: Path, **options) -> Iterator[Running]:
    """:func:`start_service` as a context manager that always stops the service."""
    server = start_service(store_uri, log_dir, **options)
    try:
        yield server
    finally:
        server.stop()


def seed_demo(root: Path, env: Mapping[str, str] | None = None) -> str:
    """``choicecast demo --store ROOT`` (its population files land beside ``root``)."""
    root.parent.mkdir(parents=True, exist_ok=True)
    cli_ok("demo", "--store", str(root), env=env, cwd=root.parent)
    return str(root)


def _fresh_dir(path: Path) -> Path:
    path.mkdir(parents=True, exist_ok=True)
    for stale in path.glob("*.db"):
        stale.unlink()
    return path


def worker_pids(master: int) -> list[int]:
    """Pids of the live children of ``master`` (gunicorn's workers), read from /proc."""
    pids = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
        except OSError:
            continue
        # Fields after the parenthesised command: state, ppid, ...
        state, ppid = stat.rsplit(")", 1)[1].split()[:2]
        if int(ppid) == master and state != "Z":
            pids.append(int(entry.name))
    return sorted(pids)


def memory_kib(pid: int, field: str = "VmRSS") -> int:
    """A memory figure of ``pid`` in KiB from /proc/PID/status: ``VmRSS`` (resident now) or
    ``VmHWM`` (the peak resident size so far)."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(f"{field}:"):
            return int(line.split()[1])
    raise RuntimeError(f"no {field} for pid {pid}")


def wait_for_workers(master: int, count: int, exclude: set[int], timeout: float) -> list[int]:
    """Wait until ``master`` has ``count`` live workers, none of them in ``exclude``."""
    found: list[int] = []

    def replaced() -> bool:
        found[:] = worker_pids(master)
        return len(found) == count and not set(found) & exclude

    if not wait_until(replaced, timeout, interval=0.1):
        raise AssertionError(f"workers of {master} not replaced within {timeout}s: {found}")
    return found


# -- the S3-compatible server ---------------------------------------------------------------


def start_s3(log_dir: Path, port: int | None = None, timeout: float = 30.0) -> Running:
    """moto's standalone S3-compatible server on 127.0.0.1 (``port`` reuses a port, e.g. to
    bring a store back after an outage); returns once it answers."""
    port = port or free_port()
    server = start(
        f"s3-{port}",
        [sys.executable, "-m", "moto.server", "-H", HOST, "-p", str(port)],
        clean_env(S3_TEST_ENV),
        log_dir,
    )
    server.url, server.port = f"http://{HOST}:{port}", port

    def answers() -> bool:
        if not server.alive():
            raise RuntimeError("exited")
        return requests.get(server.url, timeout=1).status_code < 500

    if not wait_until(answers, timeout, interval=0.1):
        server.stop()
        raise RuntimeError(f"the S3 server did not start:\n{server.log_tail()}")
    return server


def s3_client(endpoint: str):
    """A boto3 client for the test server (test credentials, path-style addressing)."""
    import boto3
    from botocore.config import Config

    return boto3.session.Session().client(
        "s3",
        endpoint_url=endpoint,
        aws_access_key_id=S3_TEST_ENV["AWS_ACCESS_KEY_ID"],
        aws_secret_access_key=S3_TEST_ENV["AWS_SECRET_ACCESS_KEY"],
        region_name=S3_TEST_ENV["AWS_DEFAULT_REGION"],
        config=Config(s3={"addressing_style": "path"}, retries={"max_attempts": 2}),
    )


def s3_snapshot(endpoint: str, bucket: str) -> dict[str, bytes]:
    """Every object of ``bucket`` (to restore it into a fresh server later)."""
    client = s3_client(endpoint)
    out: dict[str, bytes] = {}
    for page in client.get_paginator("list_objects_v2").paginate(Bucket=bucket):
        for item in page.get("Contents", []):
            out[item["Key"]] = client.get_object(Bucket=bucket, Key=item["Key"])["Body"].read()
    return out


def s3_restore(endpoint: str, bucket: str, objects: Mapping[str, bytes]) -> None:
    """Create ``bucket`` and put ``objects`` back (what a restored object store holds)."""
    client = s3_client(endpoint)
    client.create_bucket(Bucket=bucket)
    for key, data in objects.items():
        client.put_object(Bucket=bucket, Key=key, Body=data)


def dump_json(path: Path, data: object) -> Path:
    path.write_text(json.dumps(data, indent=2) + "\n")
    return path


# -- the load generator in a second process -----------------------------------------------


def start_loadgen(
    port: int,
    plan: Sequence[Mapping],
    log_dir: Path,
    *,
    duration: float,
    concurrency: int = 8,
    name: str = "loadgen",
) -> tuple[Running, Path]:
    """Start :mod:`tests.support.loadgen` in its own process; returns it and its report path."""
    plan_path = dump_json(log_dir / f"{name}-plan.json", list(plan))
    report = log_dir / f"{name}-report.json"
    command = [
        sys.executable,
        "-m",
        "tests.support.loadgen",
        "--port",
        str(port),
        "--requests",
        str(plan_path),
        "--duration",
        str(duration),
        "--concurrency",
        str(concurrency),
        "--timeout",
        "20",
        "--out",
        str(report),
    ]
    return start(name, command, clean_env(), log_dir), report


def stop_loadgen(running: Running, report: Path, timeout: float = 60.0) -> dict:
    """End the load generator now (SIGTERM: requests in flight complete) and read its report."""
    if running.alive():
        running.process.send_signal(signal.SIGTERM)
    return load_report(running, report, timeout)


def load_report(running: Running, report: Path, timeout: float) -> dict:
    """Wait (bounded) for the load generator to finish and read its report."""
    try:
        running.process.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        running.stop(grace=2)
        raise AssertionError(f"the load generator did not finish:\n{running.log_tail()}") from None
    if running.process.returncode != 0 or not report.exists():
        raise AssertionError(f"the load generator failed:\n{running.log_tail()}")
    return json.loads(report.read_text())
