"""Fixtures of the reliability tests: a fresh copy of the demo store per test, and tokens.

The demo store is seeded once per session with ``choicecast demo`` and copied for each test
(so a test may corrupt or re-route its copy freely).  Tokens are random per session, never
written to the repository.
"""

from __future__ import annotations

import secrets
import shutil
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path

import pytest

from tests.support.processes import Running, seed_demo, start_loadgen


@pytest.fixture(scope="session")
def demo_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("demo-template") / "store"
    seed_demo(root)
    return root


@pytest.fixture()
def demo_store(demo_template: Path, tmp_path: Path) -> Path:
    """A private copy of the demo store (filesystem)."""
    root = tmp_path / "store"
    shutil.copytree(demo_template, root)
    return root


@pytest.fixture(scope="session")
def tokens() -> dict[str, str]:
    return {
        "score": "score-" + secrets.token_urlsafe(24),
        "admin": "admin-" + secrets.token_urlsafe(24),
    }


@pytest.fixture()
def logs(tmp_path: Path) -> Path:
    path = tmp_path / "logs"
    path.mkdir()
    return path


@pytest.fixture()
def load(logs: Path) -> Iterator[Callable[..., tuple[Running, Path]]]:
    """Start the load generator in its own process: ``load(port, plan, duration=...,
    concurrency=8)`` returns (process, report path); every one started is stopped at teardown,
    whatever the test did."""
    started: list[Running] = []

    def start(
        port: int, plan: Sequence[dict], *, duration: float, concurrency: int = 8
    ) -> tuple[Running, Path]:
        running, report = start_loadgen(
            port,
            plan,
            logs,
            duration=duration,
            concurrency=concurrency,
            name=f"loadgen-{len(started)}",
        )
        started.append(running)
        return running, report

    yield start
    for running in started:
        running.stop(grace=5)
