"""docs/artifact-format.md stays true: its example files validate and its export snippet
writes an artifact the store loads and verifies."""

from __future__ import annotations

import json
import runpy
from pathlib import Path

import numpy as np

from model_store import open_store
from model_store.artifact import parse_manifest
from model_store.inputs import read_model_inputs
from service.choice.spec import validate_model

DOC = Path(__file__).resolve().parents[2] / "docs" / "artifact-format.md"


def blocks(kind: str) -> list[str]:
    """The fenced code blocks of the page whose info string is ``kind``."""
    found: list[str] = []
    current: list[str] | None = None
    for line in DOC.read_text().splitlines():
        if current is None and line.startswith("```"):
            current = [] if line[3:].strip() == kind else None
            if current is None:
                current = ["<skip>"]
        elif current is not None and line.startswith("```"):
            if current[:1] != ["<skip>"]:
                found.append("\n".join(current) + "\n")
            current = None
        elif current is not None:
            current.append(line)
    return found


def test_worked_example_files_validate(tmp_path):
    spec_text = blocks("json")[0]
    plain = [b for b in blocks("") if b.startswith("name,")]
    coefficients, covariance = plain[0], plain[1]
    (tmp_path / "ferry.json").write_text(spec_text)
    (tmp_path / "c.csv").write_text(coefficients)
    (tmp_path / "v.csv").write_text(covariance)
    spec, coefs, estimation = read_model_inputs(
        tmp_path / "ferry.json", tmp_path / "c.csv", tmp_path / "v.csv"
    )
    validate_model(spec, coefs)
    assert estimation["sample_size"] == 1200
    assert np.isnan(coefs.std_errors[-1])


def test_export_snippet_writes_a_loadable_version(tmp_path, monkeypatch):
    (tmp_path / "ferry.json").write_text(blocks("json")[0])
    monkeypatch.chdir(tmp_path)
    runpy.run_path(str(_snippet(tmp_path)))
    store = open_store(str(tmp_path / "store"))
    loaded = store.load_version("ferry", "v1")
    assert loaded.manifest["published_by"] == "estimation-run-17"
    assert json.loads((tmp_path / "ferry.json").read_text())["name"] == loaded.spec.name
    # the snippet stores the file under its content-addressed name, as publish does
    key = store.stored_key("ferry", "v1", "coefficients.parquet")
    digest = loaded.manifest["files"]["coefficients.parquet"]
    assert key == f"models/ferry/versions/v1/coefficients.{digest[:16]}.parquet"
    assert store.backend.list("models/ferry/versions/v1/") == sorted(
        [key, "models/ferry/versions/v1/manifest.json"]
    )


def test_worked_example_manifest_is_one_the_store_accepts():
    """The example manifest's envelope parses, and its stored names follow from its digests
    (the names quoted in the prose too)."""
    manifest = parse_manifest(blocks("json")[1].encode())
    for name, digest in manifest["files"].items():
        stored = manifest["stored_as"][name]
        assert stored == f"{name.split('.')[0]}.{digest[:16]}.parquet"
        assert f"`{stored}`" in DOC.read_text()


def _snippet(tmp_path: Path) -> Path:
    path = tmp_path / "snippet.py"
    path.write_text(blocks("python")[0])
    return path
