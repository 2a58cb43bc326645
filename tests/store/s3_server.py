"""One moto S3 server per test session, shared by the store and CLI test folders.

Import it as ``tests.store.s3_server`` everywhere so that there is one module (one server).
The server listens on 127.0.0.1 at a free port and is stopped when its last user is done.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

BUCKET = "choicecast-test"
CREDENTIALS = {"AWS_ACCESS_KEY_ID": "test-key", "AWS_SECRET_ACCESS_KEY": "test-secret"}
_state: dict[str, Any] = {"server": None, "endpoint": None, "users": 0, "saved": {}}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextmanager
def shared_s3() -> Iterator[str]:
    """Yield the endpoint URL of the session's server (with a bucket BUCKET)."""
    if _state["users"] == 0:
        from moto.server import ThreadedMotoServer

        from model_store import open_store

        _state["saved"] = {k: os.environ.get(k) for k in CREDENTIALS}
        os.environ.update(CREDENTIALS)
        port = free_port()
        server = ThreadedMotoServer(ip_address="127.0.0.1", port=port, verbose=False)
        server.start()
        _state["server"], _state["endpoint"] = server, f"http://127.0.0.1:{port}"
        open_store(f"s3://{BUCKET}", endpoint_url=_state["endpoint"]).backend.ensure()
    _state["users"] += 1
    try:
        yield _state["endpoint"]
    finally:
        _state["users"] -= 1
        if _state["users"] == 0:
            _state["server"].stop()
            _state["server"] = None
            for k, v in _state["saved"].items():
                if v is None:
                    os.environ.pop(k, None)
                else:
                    os.environ[k] = v
