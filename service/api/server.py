"""``choicecast serve``: exec gunicorn with deploy/gunicorn.conf.py (never the Flask dev server)."""

from __future__ import annotations

import os
import sys
import tempfile
from pathlib import Path
from typing import Any

DEFAULT_HOST = "127.0.0.1"
OWNED_METRICS_DIR = "CHOICECAST_OWNED_METRICS_DIR"
DEFAULT_PORT = 8000

# Options ``run`` accepts besides the bind and workers; each becomes CHOICECAST_<NAME>.
OPTIONS = (
    "s3_endpoint",
    "poll_seconds",
    "tokens_file",
    "max_body_bytes",
    "max_situations",
    "log_level",
    "access_log",
    "shadow",
    "timeout_seconds",
)


def gunicorn_config() -> str:
    """The config gunicorn loads: $CHOICECAST_GUNICORN_CONFIG, else the repository's
    deploy/gunicorn.conf.py (editable install), else the container's copy, else the
    packaged module with the same settings."""
    explicit = os.environ.get("CHOICECAST_GUNICORN_CONFIG")
    if explicit:
        return explicit
    repo = Path(__file__).resolve().parents[2] / "deploy" / "gunicorn.conf.py"
    for candidate in (repo, Path("/etc/choicecast/gunicorn.conf.py")):
        if candidate.is_file():
            return str(candidate)
    return "python:service.api.gunicorn_config"


def command(host: str, port: int, workers: int) -> list[str]:
    return [
        sys.executable,
        "-m",
        "gunicorn",
        "--config",
        gunicorn_config(),
        "--bind",
        f"{host}:{port}",
        "--workers",
        str(workers),
        "service.api.wsgi:app",
    ]


def environment(store_uri: str | None, options: dict[str, Any]) -> dict[str, str]:
    env = dict(os.environ)
    if store_uri:
        env["CHOICECAST_STORE"] = store_uri
    for name, value in options.items():
        if name not in OPTIONS:
            raise TypeError(f"unknown serve option {name!r}")
        if value is not None:
            env["CHOICECAST_" + name.upper()] = str(value)
    if not env.get("PROMETHEUS_MULTIPROC_DIR"):
        env["PROMETHEUS_MULTIPROC_DIR"] = tempfile.mkdtemp(prefix="choicecast-metrics-")
        env[OWNED_METRICS_DIR] = env["PROMETHEUS_MULTIPROC_DIR"]  # removed when gunicorn exits
    else:
        # Values of a previous run would be merged into this one's: start empty.
        directory = Path(env["PROMETHEUS_MULTIPROC_DIR"])
        directory.mkdir(parents=True, exist_ok=True)
        for stale in directory.glob("*.db"):
            stale.unlink()
    return env


def run(
    store_uri: str | None,
    host: str = DEFAULT_HOST,
    port: int = DEFAULT_PORT,
    workers: int = 2,
    **options: Any,
) -> None:
    """Replace this process with gunicorn serving the app (does not return)."""
    if workers < 1:
        raise SystemExit("choicecast serve: --workers must be at least 1")
    env = environment(store_uri, options)
    # Settings and tokens are checked here, so a bad one is one line, not a worker traceback.
    from .auth import load_tokens
    from .config import ConfigError, load_settings

    try:
        load_tokens(load_settings(environ=env))
    except ConfigError as exc:
        raise SystemExit(f"choicecast serve: {exc}") from None
    argv = command(host, port, workers)
    os.execve(argv[0], argv, env)
