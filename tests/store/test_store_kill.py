"""A publishing process killed with SIGKILL at arbitrary moments: every visible version is
whole and verified, and publishing carries on afterwards."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from store_cases import publish_ferry

from model_store import open_store

WORKER = Path(__file__).with_name("publish_worker.py")


@pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="needs SIGKILL")
def test_sigkill_during_publishing_leaves_only_whole_versions(tmp_path):
    root = str(tmp_path / "store")
    store = open_store(root)
    rng = np.random.default_rng(3)
    start = 0
    for _ in range(3):
        proc = subprocess.Popen(
            [sys.executable, str(WORKER), root, str(start)],
            cwd=WORKER.parent,
            env={**os.environ, "PYTHONPATH": os.pathsep.join([str(WORKER.parent), os.getcwd()])},
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
        )
        try:
            deadline = time.monotonic() + 60
            while len(store.list_versions("ferry")) <= start and time.monotonic() < deadline:
                assert proc.poll() is None, proc.stderr.read().decode() if proc.stderr else ""
                time.sleep(0.01)
            time.sleep(float(rng.uniform(0.0, 0.05)))
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=30)
            if proc.stderr:
                proc.stderr.close()
        versions = store.list_versions("ferry")
        assert versions, "the worker published nothing before it was killed"
        for version in versions:
            store.load_version("ferry", version)  # raises unless whole and verified
        start = max(int(v[1:]) for v in versions) + 1
    # leftovers of the killed attempt never block the next publish of the same id
    publish_ferry(store, f"k{start}")
    store.load_version("ferry", f"k{start}")
    assert all(not k.split("/")[-1].startswith(".") for k in store.backend.list("models/"))
