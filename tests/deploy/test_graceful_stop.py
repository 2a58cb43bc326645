"""A pod's shutdown loses no request: SIGTERM to gunicorn (what Kubernetes sends after the
preStop sleep) lets the in-flight request finish within graceful_timeout, then the server
exits; new connections are no longer accepted.

This is gunicorn's documented TERM behaviour (graceful shutdown, waiting for workers to finish
their current requests up to graceful_timeout); the test checks that the service's own
configuration keeps it (a worker that ignored TERM or a graceful_timeout too short for a
large batch would fail here).
"""

from __future__ import annotations

import runpy
import signal
import threading
import time
from pathlib import Path

import pytest
import requests
from containerfile_reader import REPO

from model_store.demo import VERSIONS as DEMO_VERSIONS
from service.choice.spec import spec_from_dict
from tests.support.payloads import situations_for
from tests.support.processes import seed_demo, start_service, wait_until

pytestmark = pytest.mark.slow
MODEL = "wrenmouth_commute"
SITUATIONS = 20_000  # a batch that takes a few seconds as JSON rows on this machine


def test_sigterm_lets_the_in_flight_request_finish(tmp_path: Path) -> None:
    graceful = float(runpy.run_path(str(REPO / "deploy" / "gunicorn.conf.py"))["graceful_timeout"])
    store = seed_demo(tmp_path / "store")
    spec = spec_from_dict(next(d.spec for d in DEMO_VERSIONS if d.model == MODEL))
    body = {"situations": situations_for(spec, SITUATIONS, seed=3)}
    server = start_service(store, tmp_path / "logs", workers=1, poll_seconds=1.0, name="drain")
    outcome: dict[str, object] = {}

    def call() -> None:
        started = time.monotonic()
        try:
            response = requests.post(f"{server.url}/v1/models/{MODEL}/score", json=body, timeout=60)
            outcome["status"] = response.status_code
            outcome["situations"] = len(response.json().get("situations", []))
        except requests.RequestException as exc:
            outcome["error"] = repr(exc)
        outcome["seconds"] = time.monotonic() - started

    try:
        caller = threading.Thread(target=call, daemon=True)
        caller.start()
        # SIGTERM once the worker is busy with the request (its body is being read or scored).
        time.sleep(0.3)
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
