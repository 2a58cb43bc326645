"""A pod's shutdown loses no request: SIGTERM to gunicorn (what Kubernetes sends after the
preStop sleep) lets the in-flight request finish within graceful_timeout, then the server
exits; new connections are no longer accepted.

This is gunicorn's documented TERM behaviour (graceful shutdown, waiting for workers to finish
their current requests up to graceful_timeout); the test checks that the service's own
configuration keeps it (a worker that ignored TERM or a graceful_timeout too short for a
large batch would fail here).
"""

from __future__ import annotations

import contextlib
import http.client
import json
import os
import runpy
import signal
import threading
from pathlib import Path

import pytest
import requests
from containerfile_reader import REPO

from model_store.demo import VERSIONS as DEMO_VERSIONS
from service.choice.spec import spec_from_dict
from tests.support.payloads import situations_for
from tests.support.processes import seed_demo, start_service, wait_until, worker_pids

pytestmark = pytest.mark.slow
MODEL = "wrenmouth_commute"
SITUATIONS = 20_000  # a batch that takes a few seconds as JSON rows on this machine


def sockets_of(pid: int) -> int:
    """How many sockets the process has open (from /proc/PID/fd)."""
    count = 0
    for fd in Path(f"/proc/{pid}/fd").iterdir():
        with contextlib.suppress(OSError):
            count += os.readlink(fd).startswith("socket:")
    return count


def test_sigterm_lets_the_in_flight_request_finish(tmp_path: Path) -> None:
    graceful = float(runpy.run_path(str(REPO / "deploy" / "gunicorn.conf.py"))["graceful_timeout"])
    store = seed_demo(tmp_path / "store")
    spec = spec_from_dict(next(d.spec for d in DEMO_VERSIONS if d.model == MODEL))
    body = {"situations": situations_for(spec, SITUATIONS, seed=3)}
    server = start_service(store, tmp_path / "logs", workers=1, poll_seconds=1.0, name="drain")
    payload = json.dumps(body).encode()
    worker = worker_pids(server.pid)[0]
    idle_sockets = sockets_of(worker)
    outcome: dict[str, object] = {}

    def call() -> None:
        connection = http.client.HTTPConnection("127.0.0.1", server.port, timeout=60)
        try:
            connection.request(
                "POST",
                f"/v1/models/{MODEL}/score",
                body=payload,
                headers={"Content-Type": "application/json"},
            )
            response = connection.getresponse()
            outcome["status"] = response.status
            outcome["situations"] = len(json.loads(response.read()).get("situations", []))
        except (OSError, http.client.HTTPException, ValueError) as exc:
            outcome["error"] = repr(exc)
        finally:
            connection.close()

    try:
        caller = threading.Thread(target=call, daemon=True)
        caller.start()
        # SIGTERM once the worker has accepted the connection (a new socket among its files),
        # i.e. the request is in flight; connections not yet accepted are the preStop sleep's
        # job (no new ones arrive once the pod has left the endpoints).
        assert wait_until(lambda: sockets_of(worker) > idle_sockets, 30, interval=0.01)
        assert caller.is_alive(), f"the request finished too soon to test: {outcome}"
        server.process.send_signal(signal.SIGTERM)
        caller.join(timeout=graceful + 30)
        assert outcome.get("status") == 200, (outcome, server.log_tail())
        assert outcome["situations"] == SITUATIONS
        # The server then exits by itself, well within the grace period it was given.
        assert wait_until(lambda: not server.alive(), graceful + 10, interval=0.1)
        with pytest.raises(requests.ConnectionError):
            requests.get(f"{server.url}/livez", timeout=2)
    finally:
        server.stop()
