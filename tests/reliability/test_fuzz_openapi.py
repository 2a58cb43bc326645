"""Fuzzing the served OpenAPI document with schemathesis (CLI, in its own process) against the
real service under gunicorn: every operation, a fixed number of examples, deterministic
generation.  Checks: no 5xx (``not_a_server_error``) and every response valid against the
schema documented for its status (``response_schema_conformance``).

Two runs: one with generated model/version names (unknown names, traversal attempts, odd
characters), one with the path names pinned to a routed demo model so generated bodies reach
the decoders and the core.  Requests carry an admin token, so routing endpoints are fuzzed too
(on this test's copy of the store).  CI runs ``EXAMPLES`` per operation; docs/reliability.md
records larger runs (``CHOICECAST_FUZZ_EXAMPLES``, ``CHOICECAST_FUZZ_SEED``).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from tests.support.processes import VENV_BIN, clean_env, serving

EXAMPLES = int(os.environ.get("CHOICECAST_FUZZ_EXAMPLES", "8"))
SEED = os.environ.get("CHOICECAST_FUZZ_SEED")
"""Set it for a seeded random run instead of the deterministic one (other inputs)."""
CHECKS = "not_a_server_error,response_schema_conformance"


def schemathesis(url: str, token: str, workdir: Path, name: str, config: str | None) -> dict:
    """Run ``schemathesis run`` to completion (bounded) and return its JSON report."""
    report = workdir / f"{name}.json"
    command = [str(VENV_BIN / "schemathesis")]
    if config:
        (workdir / f"{name}.toml").write_text(config)
        command.append(f"--config-file={workdir / f'{name}.toml'}")
    command += [
        "run",
        f"{url}/openapi.json",
        "--checks",
        CHECKS,
        "--max-examples",
        str(EXAMPLES),
        *(["--seed", SEED] if SEED else ["--generation-deterministic"]),
        "--request-timeout",
        "20",
        "--no-color",
        "--report",
        "json",
        "--report-json-path",
        str(report),
        "-H",
        f"Authorization: Bearer {token}",
    ]
    done = subprocess.run(
        command,
        cwd=workdir,
        env=clean_env(),
        capture_output=True,
        text=True,
        timeout=60 + 30 * EXAMPLES,
        stdin=subprocess.DEVNULL,
    )
    sys.stdout.write(done.stdout[-3000:])
    assert report.exists(), done.stdout[-5000:] + done.stderr[-3000:]
    result = json.loads(report.read_text())
    result["output"] = done.stdout[-20000:]
    result["returncode"] = done.returncode
    return result


@pytest.fixture()
def fuzz_target(demo_store: Path, logs: Path, tokens: dict[str, str]):
    env = {
        "CHOICECAST_SCORE_TOKENS": tokens["score"],
        "CHOICECAST_ADMIN_TOKENS": tokens["admin"],
        "CHOICECAST_MAX_BODY_BYTES": "2000000",
        "CHOICECAST_MAX_SITUATIONS": "1000",
    }
    with serving(str(demo_store), logs, env=env, workers=2, poll_seconds=0.5) as server:
        yield server


@pytest.mark.parametrize(
    "name, config",
    [
        ("generated-names", None),
        (
            "pinned-names",
            '[parameters]\n"path.name" = "wrenmouth_commute"\n"path.version" = "v1"\n',
        ),
    ],
    ids=["generated-names", "pinned-names"],
)
def test_every_operation_survives_fuzzing(
    fuzz_target, tokens: dict[str, str], tmp_path: Path, name: str, config: str | None
) -> None:
    result = schemathesis(fuzz_target.url, tokens["admin"], tmp_path, name, config)
    operations = result["operations"]
    assert operations["total"] >= 14, operations  # the contract's endpoints, at least
    assert operations["tested"] == operations["total"], operations
    assert result["errors"] == [], result["output"]
    assert result["failures"] == [], result["output"]
    assert result["returncode"] == 0, result["output"]
    assert result["test_cases"]["generated"] >= operations["total"] * EXAMPLES // 2
    assert fuzz_target.alive()
    # Nothing the fuzzer sent made the service log an unexpected error.
    log = fuzz_target.log_text()
    assert '"level":"ERROR"' not in log and "Traceback" not in log
