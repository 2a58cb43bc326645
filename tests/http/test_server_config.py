"""How `choicecast serve` starts gunicorn: the config it finds, the command and environment."""

from __future__ import annotations

import runpy
from pathlib import Path

import pytest

from service.api import server

REPO = Path(__file__).resolve().parents[2]


def test_the_repository_config_is_used_and_keeps_workers_separate(monkeypatch):
    monkeypatch.delenv("CHOICECAST_GUNICORN_CONFIG", raising=False)
    assert server.gunicorn_config() == str(REPO / "deploy" / "gunicorn.conf.py")
    settings = runpy.run_path(str(REPO / "deploy" / "gunicorn.conf.py"))
    assert settings["preload_app"] is False  # each worker builds its app after the fork
    assert settings["worker_class"] == "sync" and settings["accesslog"] is None
    for hook in ("child_exit", "post_worker_init", "on_exit"):
        assert callable(settings[hook])
    monkeypatch.setenv("CHOICECAST_GUNICORN_CONFIG", "/elsewhere.conf.py")
    assert server.gunicorn_config() == "/elsewhere.conf.py"


def test_command_binds_loopback_by_default_and_runs_gunicorn():
    argv = server.command(server.DEFAULT_HOST, server.DEFAULT_PORT, 2)
    assert argv[1:3] == ["-m", "gunicorn"]
    assert argv[argv.index("--bind") + 1] == "127.0.0.1:8000"
    assert argv[-1] == "service.api.wsgi:app"


def test_environment_passes_options_and_prepares_metrics(tmp_path, monkeypatch):
    monkeypatch.setenv("PROMETHEUS_MULTIPROC_DIR", str(tmp_path / "m"))
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "counter_1.db").write_bytes(b"old")
    env = server.environment("/data/store", {"poll_seconds": 2.5, "tokens_file": None})
    assert env["CHOICECAST_STORE"] == "/data/store" and env["CHOICECAST_POLL_SECONDS"] == "2.5"
    assert "CHOICECAST_TOKENS_FILE" not in env or env["CHOICECAST_TOKENS_FILE"] != "None"
    assert not list((tmp_path / "m").glob("*.db"))  # a previous run's values are not merged in
    with pytest.raises(TypeError):
        server.environment(None, {"colour": "red"})


def test_serve_refuses_a_bad_setting_in_one_line_before_gunicorn_starts(tmp_path, monkeypatch):
    import subprocess
    import sys

    env = {
        "PATH": "/usr/bin:/bin",
        "CHOICECAST_SCORE_TOKENS": "short",
        "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics"),
    }
    cli = Path(sys.executable).with_name("choicecast")
    done = subprocess.run(
        [str(cli), "serve", "--store", str(tmp_path / "store"), "--port", "1"],
        env=env, capture_output=True, text=True, timeout=60,
    )  # fmt: skip
    assert done.returncode != 0
    assert done.stderr.strip() == ("choicecast serve: tokens must be at least 16 characters long")
