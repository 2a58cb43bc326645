"""The store loader deserialises nothing but JSON and Parquet, and never runs code from a store.

Hostile versions (a pickle in place of the Parquet file, a Parquet file carrying the pickle-based
Arrow extension type, a manifest listing unexpected files, stray scripts beside a good version)
are loaded in a child process with a Python audit hook (PEP 578) that records every
``pickle.find_class``, ``marshal.loads``, ``exec``, ``compile``, ``import``, process start and
file ``open``.  A hostile version must be refused or its extra files ignored, with none of those
events, and the payload's side effect (creating a marker directory) must never happen.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from model_store import ArtifactError, StoreError, open_store
from tests.support import artifacts
from tests.support.processes import REPO, clean_env

# Audit events that mean code or objects are being materialised from data (PEP 578 event table,
# Python docs "Audit events table").
FORBIDDEN = (
    "pickle.find_class",
    "marshal.loads",
    "marshal.load",
    "exec",
    "compile",
    "import",
    "os.system",
    "os.exec",
    "os.posix_spawn",
    "os.spawn",
    "subprocess.Popen",
    "ctypes.dlopen",
)

CHILD = r"""
import json, sys
store_path, versions = sys.argv[1], json.loads(sys.argv[2])
events = []
recording = [False]

def hook(event, args):
    if recording[0] and (event in FORBIDDEN or event == "open"):
        detail = str(args[0]) if args else ""
        events.append([event, detail[:200]])

FORBIDDEN = set(json.loads(sys.argv[3]))
sys.addaudithook(hook)
from model_store import open_store
store = open_store(store_path)
outcome = {}
def attempt(version):
    try:
        store.load_version("weekend", version)
        return "loaded"
    except Exception as exc:
        return f"refused: {type(exc).__name__}: {exc}"
# Warm-up: the good version once, so lazily imported reader modules are loaded already.
attempt("good")
for version in versions:
    recording[0] = True
    first = attempt(version)
    recording[0] = False
    outcome[version] = {"result": first, "events": list(events)}
    events.clear()
sys.stdout.write(json.dumps(outcome) + "\n")
sys.stdout.flush()
import os
os._exit(0)  # skip interpreter teardown (Arrow threads vs. the audit hook)
"""


@pytest.fixture()
def hostile_store(tmp_path: Path) -> tuple[Path, Path]:
    """A store with a good version and hostile ones; returns (store path, marker path)."""
    root = tmp_path / "store"
    marker = tmp_path / "unpickled-marker"
    store = open_store(str(root))
    artifacts.publish_good(store, "good")
    good = artifacts.good_coefficients_bytes()
    coef = artifacts.COEFFICIENTS_FILE
    artifacts.write_version(store, "pickled", {coef: artifacts.pickle_payload(str(marker))})
    artifacts.write_version(
        store, "ext-pickle", {coef: artifacts.parquet_with_pickled_extension(str(marker))}
    )
    artifacts.write_version(
        store, "listed-code", {coef: good, "loader.py": b"import os\nos.mkdir('x')\n"}
    )
    artifacts.write_version(
        store,
        "stray-files",
        {coef: good, "model.pkl": artifacts.pickle_payload(str(marker)), "__init__.py": b"1/0\n"},
        listed={coef: good},
    )
    return root, marker


def test_hostile_versions_are_refused_without_unpickling_or_running_code(hostile_store) -> None:
    root, marker = hostile_store
    versions = ["pickled", "ext-pickle", "listed-code", "stray-files"]
    done = subprocess.run(
        [sys.executable, "-c", CHILD, str(root), json.dumps(versions), json.dumps(FORBIDDEN)],
        cwd=REPO,
        env=clean_env(),
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode == 0, done.stderr
    outcome = json.loads(done.stdout.strip().splitlines()[-1])

    assert not marker.exists(), "a pickle payload from the store was executed"
    for version in versions:
        forbidden = [e for e in outcome[version]["events"] if e[0] != "open"]
        assert forbidden == [], f"{version}: {forbidden}"
    # A pickle where Parquet belongs: refused, naming the file.
    assert outcome["pickled"]["result"].startswith("refused: ArtifactError"), outcome
    assert "coefficients.parquet" in outcome["pickled"]["result"]
    # A Parquet file smuggling a pickled Arrow type: read as the plain float64 column it
    # stores (the extension metadata is never unpickled, as the events above show), or refused.
    assert outcome["ext-pickle"]["result"] == "loaded" or outcome["ext-pickle"][
        "result"
    ].startswith("refused: ArtifactError"), outcome["ext-pickle"]
    # A manifest listing anything but the two Parquet files is refused before any file is read.
    assert outcome["listed-code"]["result"].startswith("refused: ArtifactError")
    assert "loader.py" in outcome["listed-code"]["result"]
    assert not any("loader.py" in e[1] for e in outcome["listed-code"]["events"])
    # Files the manifest does not list are never even opened; the verified version loads.
    assert outcome["stray-files"]["result"] == "loaded"
    opened = [e[1] for e in outcome["stray-files"]["events"] if e[0] == "open"]
    assert not any(p.endswith(("model.pkl", "__init__.py")) for p in opened), opened


def test_checksums_bind_every_listed_file(tmp_path: Path) -> None:
    """A byte changed in a published file after the fact is refused (sha256 in the manifest)."""
    store = open_store(str(tmp_path / "store"))
    artifacts.publish_good(store, "v1")
    key = store.stored_key("weekend", "v1", "coefficients.parquet")
    data = bytearray(store.backend.get(key))
    data[len(data) // 2] ^= 0xFF
    artifacts.write_behind(store, key, bytes(data))
    with pytest.raises(ArtifactError, match="checksum"):
        store.load_version("weekend", "v1")


@pytest.mark.parametrize("name", ["v1\n", "v1\r", "../v1", "v1/..", ".hidden", "v 1", ""])
def test_version_names_that_could_escape_or_mislead_are_refused(tmp_path: Path, name: str) -> None:
    """Names are the whole of ``[A-Za-z_][A-Za-z0-9_.-]{0,63}``; in Python's ``re`` a ``$``
    also matches before a trailing newline (Python docs, ``re``), so ``v1\\n`` must still be
    refused.  Nothing is written for a refused name."""
    store = open_store(str(tmp_path / "store"))
    store.backend.ensure()
    with pytest.raises(StoreError):
        store.publish(
            artifacts.MODEL,
            name,
            artifacts.spec(),
            artifacts.coefficients(),
            published_by="reliability-tests",
        )
    assert list((tmp_path / "store").rglob("*")) == []
