"""Faults while serving: corrupt and partially written versions in the store, a routing record
naming a corrupt version forced into the store, and gunicorn workers killed under load.

Nothing wrong is ever served: every answer is checked against the core for the version it
names, and that version was live at the routing generation the answer names.
"""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

import requests

from model_store import open_store
from tests.support import artifacts
from tests.support.payloads import batches_for, score_plan, verify_answers
from tests.support.processes import (
    cli_ok,
    readiness,
    run_cli,
    serving,
    stop_loadgen,
    wait_for_workers,
    wait_until,
    worker_pids,
)

MODEL = "wrenmouth_commute"


def demo_batches(store_root: Path, count: int = 8) -> list[list[dict]]:
    spec = open_store(str(store_root)).load_version(MODEL, "v1").spec
    return batches_for(spec, count, seed=300, max_size=2)


def test_corrupt_and_partial_versions_are_never_routed(demo_store: Path, logs: Path, load) -> None:
    store_uri = str(demo_store)
    store = open_store(store_uri)
    good = artifacts.original_coefficients(store, MODEL, "v1")
    # v3: whole manifest, truncated data file (a torn write); v4: data without a manifest (an
    # interrupted publish).
    artifacts.plant_version(store, MODEL, "v1", "v3", data=good[: len(good) // 2])
    artifacts.plant_version(store, MODEL, "v1", "v4", data=good, manifest=False)
    generation = store.routing_generation(MODEL)
    assert "v4" not in store.list_versions(MODEL)

    for live, culprit in ((["v3=100"], "v3"), (["v1=90", "v3=10"], "v3"), (["v4=100"], "v4")):
        done = run_cli("route", MODEL, "--live", *live, "--reason", "try it", "--store", store_uri)
        assert done.returncode != 0, done.stdout
        assert culprit in done.stderr + done.stdout
    assert store.routing_generation(MODEL) == generation  # nothing recorded

    batches = demo_batches(demo_store)
    with serving(store_uri, logs, workers=2, poll_seconds=0.2) as server:
        loadgen, path = load(server.port, score_plan(MODEL, batches), duration=120)
        time.sleep(1.5)
        forced = artifacts.force_routing(store, {"v1": 50.0, "v3": 50.0}, model=MODEL)

        def degraded() -> bool:
            status, body = readiness(server.url)
            return status == 503 and any("v3" in r for r in body.get("reasons", []))

        assert wait_until(degraded, 10), readiness(server.url)
        # Both workers keep the last good routing (each answers with it).
        for _ in range(6):
            shown = requests.get(f"{server.url}/v1/models/{MODEL}", timeout=5).json()
            assert shown["routing"]["generation"] == generation, shown["routing"]
        pinned = requests.post(
            f"{server.url}/v1/models/{MODEL}/versions/v3/score",
            json={"situations": batches[0]},
            timeout=5,
        )
        assert pinned.status_code >= 400
        assert pinned.headers["Content-Type"].startswith("application/problem+json")
        assert "checksum" in pinned.json()["detail"]

        time.sleep(1.5)
        cli_ok("route", MODEL, "--live", "v1=100", "--reason", "repair", "--store", store_uri)
        assert wait_until(lambda: readiness(server.url)[0] == 200, 10), readiness(server.url)
        time.sleep(1.0)  # answers from the repaired routing
        report = stop_loadgen(loadgen, path)

    assert report["connection_errors"] == {}
    assert set(report["statuses"]) == {"200"}, report["bad_samples"]
    seen = verify_answers(report, batches, store, MODEL)
    assert "v3" not in seen
    answered = {a["generation"] for a in report["answers"]}
    assert answered <= {generation, forced + 1}, answered
    assert forced + 1 in answered  # the repair reached the replicas while the load ran


def test_killed_workers_are_replaced_and_no_wrong_answer_is_served(
    demo_store: Path, logs: Path, load
) -> None:
    batches = demo_batches(demo_store)
    with serving(str(demo_store), logs, workers=2, poll_seconds=1.0) as server:
        original = worker_pids(server.pid)
        loadgen, path = load(server.port, score_plan(MODEL, batches), duration=120)
        killed: set[int] = set()
        for victim in original:
            time.sleep(2.5)
            os.kill(victim, signal.SIGKILL)
            killed.add(victim)
            wait_for_workers(server.pid, 2, exclude=killed, timeout=30)
        time.sleep(2.0)  # served by the replacements
        report = stop_loadgen(loadgen, path)
        assert server.alive()
        assert readiness(server.url)[0] == 200
        assert not set(worker_pids(server.pid)) & killed
    print("worker kill:", report["statuses"], report["connection_errors"])
    # A request in flight on a killed worker may see its connection drop (retryable); every
    # response that arrives is a correct 200.
    assert set(report["statuses"]) == {"200"}, report["bad_samples"]
    assert set(report["connection_errors"]) <= {
        "RemoteDisconnected",
        "ConnectionResetError",
        "BrokenPipeError",
        "ConnectionRefusedError",
        "IncompleteRead",
    }, report["connection_errors"]
    verify_answers(report, batches, open_store(str(demo_store)), MODEL)


def test_routing_history_going_backwards_keeps_the_last_good_state(
    demo_store: Path, logs: Path
) -> None:
    """A store restored from an older copy lists an older routing generation (or none): the
    history is append-only, so the replicas keep the newest state they saw and say so."""
    store_uri = str(demo_store)
    store = open_store(store_uri)
    batches = demo_batches(demo_store, count=2)
    with serving(store_uri, logs, workers=2, poll_seconds=0.2) as server:
        cli_ok("route", MODEL, "--live", "v2=100", "--reason", "all on v2", "--store", store_uri)
        newest = store.routing_generation(MODEL)

        def generation_everywhere(expected: int) -> bool:
            return all(
                readiness(server.url)[1]["models"][MODEL]["generation"] == expected
                for _ in range(10)
            )

        assert wait_until(lambda: generation_everywhere(newest), 10)
        records = sorted((demo_store / "models" / MODEL / "routing").glob("*.json"))
        saved = {path: path.read_bytes() for path in records}
        for lost in (records[-1:], records):  # the newest record gone, then all of them
            for path in lost:
                path.unlink(missing_ok=True)

            def degraded() -> bool:
                status, body = readiness(server.url)
                return status == 503 and any("generation" in r for r in body["reasons"])

            assert wait_until(degraded, 10), readiness(server.url)
            for _ in range(10):
                r = requests.post(
                    f"{server.url}/v1/models/{MODEL}/score",
                    json={"situations": batches[0]},
                    timeout=5,
                )
                assert r.status_code == 200, r.text
                assert r.json()["version"] == "v2"
                assert r.json()["routing"]["generation"] == newest
        for path, data in saved.items():
            path.write_bytes(data)
        assert wait_until(lambda: readiness(server.url)[0] == 200, 10), readiness(server.url)
