"""One S3-compatible test server per test session, shared by the store and CLI test folders.

Import it as ``tests.store.s3_server`` everywhere so that there is one module (one server).
The server is :func:`tests.support.processes.start_s3` (moto's standalone server in its own
process group, on 127.0.0.1 at a free port); it is stopped when its last user is done.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from tests.support.processes import S3_TEST_ENV, start_s3

BUCKET = "choicecast-test"
# The test server's credentials, set in this process for the store's own S3 clients.
CREDENTIALS = {k: S3_TEST_ENV[k] for k in ("AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY")}
_state: dict[str, Any] = {"server": None, "logs": None, "users": 0, "saved": {}}


@contextmanager
def shared_s3() -> Iterator[str]:
    """Yield the endpoint URL of the session's server (with a bucket BUCKET)."""
    if _state["users"] == 0:
        from model_store import open_store

        logs = Path(tempfile.mkdtemp(prefix="choicecast-s3-"))
        try:
            server = start_s3(logs)
        except BaseException:
            shutil.rmtree(logs, ignore_errors=True)
            raise
        _state["server"], _state["logs"] = server, logs
        _state["saved"] = {k: os.environ.get(k) for k in CREDENTIALS}
        os.environ.update(CREDENTIALS)
        try:
            open_store(f"s3://{BUCKET}", endpoint_url=server.url).backend.ensure()
        except BaseException:
            _stop()
            raise
    _state["users"] += 1
    try:
        yield _state["server"].url
    finally:
        _state["users"] -= 1
        if _state["users"] == 0:
            _stop()


def _stop() -> None:
    """Stop the server, remove its log directory and put the credentials back as they were."""
    _state["server"].stop()
    shutil.rmtree(_state["logs"], ignore_errors=True)
    _state["server"] = _state["logs"] = None
    for k, v in _state["saved"].items():
        if v is None:
            os.environ.pop(k, None)
        else:
            os.environ[k] = v
