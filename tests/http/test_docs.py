"""The examples of docs/api.md and of the README, run as written against the demo store under
`choicecast serve`.

Shell examples (curl) must exit 0 and print JSON objects without an error status (but the one
error example of docs/api.md); Python examples must print exactly what the document says.
"""

from __future__ import annotations

import json
import os
import re
import secrets
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.support.processes import REPO, cli_ok, serving

DOC = REPO / "docs" / "api.md"
README = REPO / "README.md"
BASE = "http://127.0.0.1:8000"
BLOCK = re.compile(r"```(sh|python)\n(.*?)```(?:\n\nprints\n\n((?:    [^\n]*\n|\n)+))?", re.S)


def blocks(kind: str, doc: Path = DOC) -> list[tuple[str, str | None]]:
    out = []
    for lang, code, prints in BLOCK.findall(doc.read_text()):
        if lang == kind:
            expected = None
            if prints:
                expected = "\n".join(line[4:] for line in prints.rstrip("\n").split("\n")) + "\n"
            out.append((code, expected))
    return out


def json_documents(text: str) -> list[dict]:
    decoder, docs, i = json.JSONDecoder(), [], 0
    while i < len(text):
        if text[i].isspace():
            i += 1
            continue
        doc, i = decoder.raw_decode(text, i)
        docs.append(doc)
    return docs


def demo_server(root: Path, env_extra: dict[str, str]) -> Iterator[str]:
    """The demo store under ``choicecast serve`` (2 workers, the service's own polling
    interval), with ``env_extra`` (token settings) added to a clean environment."""
    store = root / "store"
    cli_ok("demo", "--store", str(store), "--populations", str(root / "pop"), cwd=root)
    with serving(str(store), root, env=env_extra, workers=2, poll_seconds=None, name="server") as s:
        yield s.url


@pytest.fixture(scope="module")
def open_demo(tmp_path_factory) -> Iterator[str]:
    yield from demo_server(tmp_path_factory.mktemp("docs-open"), {})


ADMIN_TOKEN = secrets.token_urlsafe(24)


@pytest.fixture(scope="module")
def admin_demo(tmp_path_factory) -> Iterator[str]:
    yield from demo_server(
        tmp_path_factory.mktemp("docs-admin"), {"CHOICECAST_ADMIN_TOKENS": ADMIN_TOKEN}
    )


def run(args: list[str], env: dict[str, str]) -> str:
    done = subprocess.run(args, capture_output=True, text=True, timeout=60, env=env, cwd=REPO)
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_the_document_has_examples():
    assert len(blocks("sh")) >= 5 and len(blocks("python")) >= 2


def test_shell_examples(open_demo, admin_demo):
    env = {**os.environ, "CHOICECAST_ADMIN_TOKEN": ADMIN_TOKEN}
    for code, _ in blocks("sh"):
        url = admin_demo if "CHOICECAST_ADMIN_TOKEN" in code else open_demo
        out = run(["bash", "-euo", "pipefail", "-c", code.replace(BASE, url)], env)
        docs = json_documents(out)
        assert docs, code
        for doc in docs:
            # Only the error example answers a problem document, and it is the 422 shown.
            assert doc.get("status", 422) == 422, doc
            if "status" in doc:
                assert [e["path"] for e in doc["errors"]] == [
                    "$.situations[0].attributes.ferry",
                    "$.situations[0].attributes.car.minutes",
                    "$.situations[0].context.rain_mm",
                ]
    history = json_documents(run(["curl", "-s", f"{admin_demo}/v1/models/wrenmouth_commute/routing/history",
                                  "-H", f"Authorization: Bearer {ADMIN_TOKEN}"], env))[0]  # fmt: skip
    assert [e["action"] for e in history["entries"]] == ["route", "route", "promote", "rollback"]


def test_python_examples_print_what_the_document_says(open_demo):
    for code, expected in blocks("python"):
        out = run([sys.executable, "-c", code.replace(BASE, open_demo)], dict(os.environ))
        assert expected is not None
        assert out == expected


def test_readme_examples(open_demo):
    env = dict(os.environ)
    shell, python = blocks("sh", README), blocks("python", README)
    assert shell and python
    for code, _ in shell:
        docs = json_documents(
            run(["bash", "-euo", "pipefail", "-c", code.replace(BASE, open_demo)], env)
        )
        assert docs and all("status" not in d and "version" in d for d in docs), docs
    for code, expected in python:
        out = run([sys.executable, "-c", code.replace(BASE, open_demo)], env)
        assert expected is None or out == expected
