"""Fixtures of the reliability tests: a fresh copy of the demo store per test, and tokens.

The demo store is seeded once per session with ``choicecast demo`` and copied for each test
(so a test may corrupt or re-route its copy freely).  Tokens are random per session, never
written to the repository.
"""

from __future__ import annotations

import secrets
import shutil
from pathlib import Path

import pytest

from tests.support.processes import seed_demo


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
