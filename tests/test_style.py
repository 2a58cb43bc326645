"""The code base stays ruff-clean (lint and format), as the contributor guide requires."""

import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
RUFF = shutil.which("ruff", path=str(Path(sys.executable).parent)) or "ruff"


def test_ruff_lint_is_clean():
    result = subprocess.run([RUFF, "check", "."], cwd=ROOT, capture_output=True, text=True)
    assert result.returncode == 0, result.stdout + result.stderr


def test_ruff_format_is_clean():
    result = subprocess.run(
        [RUFF, "format", "--check", "."], cwd=ROOT, capture_output=True, text=True
    )
    assert result.returncode == 0, result.stdout + result.stderr
