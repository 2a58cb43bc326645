"""Sustained load from a second process against gunicorn with the demo store, and routing
changed through the CLI (canary, promote, rollback) while that load runs.

Bounded: a fixed duration and concurrency; no timing assertions (the figures go to
docs/reliability.md).  What must hold: zero failed requests, and every answer exactly the
core's probabilities for the version it names, that version live at the generation it names.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

from model_store import open_store
from tests.support.payloads import batches_for, score_plan, verify_answers
from tests.support.processes import (
    cli_ok,
    load_report,
    serving,
    stop_loadgen,
    worker_pids,
)

MODEL = "wrenmouth_commute"  # the demo's model with two versions (v1 90%, v2 10%)
CONCURRENCY = 8


def demo_batches(store_root: Path, count: int = 12) -> list[list[dict]]:
    spec = open_store(str(store_root)).load_version(MODEL, "v1").spec
    return batches_for(spec, count, seed=100)


def summary(report: dict) -> str:
    keys = ("completed", "throughput_rps", "latency_ms", "statuses", "connection_errors")
    return json.dumps({k: report[k] for k in keys})


def assert_no_failures(report: dict) -> None:
    assert report["connection_errors"] == {}, summary(report)
    assert set(report["statuses"]) == {"200"}, (summary(report), report["bad_samples"])
    assert report["unreadable_answers"] == 0
    assert report["threads_alive"] == 0


def test_sustained_load_has_zero_errors(demo_store: Path, logs: Path, load) -> None:
    batches = demo_batches(demo_store)
    with serving(str(demo_store), logs, workers=2, poll_seconds=1.0) as server:
        loadgen, path = load(
            server.port, score_plan(MODEL, batches), duration=12, concurrency=CONCURRENCY
        )
        report = load_report(loadgen, path, timeout=60)
        assert server.alive()
    print("load:", summary(report))
    assert_no_failures(report)
    assert report["completed"] > 0
    seen = verify_answers(report, batches, open_store(str(demo_store)), MODEL)
    # 90/10 canary of the demo: both versions answer.
    assert set(seen) == {"v1", "v2"}, seen


def test_rollout_under_load_fails_no_request(demo_store: Path, logs: Path, load) -> None:
    store_uri = str(demo_store)
    batches = demo_batches(demo_store)
    steps = [
        ("route", MODEL, "--live", "v1=50", "v2=50", "--reason", "canary to half"),
        ("promote", MODEL, "v2", "--reason", "v2 holds up"),
        ("rollback", MODEL, "--reason", "undo the promotion"),
        ("route", MODEL, "--live", "v1=100", "--shadow", "v2", "--reason", "shadow only"),
        ("promote", MODEL, "v2", "--reason", "promote again"),
        ("rollback", MODEL, "--reason", "and back"),
    ]
    store = open_store(store_uri)
    first = store.routing_generation(MODEL)
    with serving(store_uri, logs, workers=2, poll_seconds=0.2) as server:
        workers_before = worker_pids(server.pid)
        loadgen, path = load(
            server.port, score_plan(MODEL, batches), duration=120, concurrency=CONCURRENCY
        )
        time.sleep(1.5)
        for step in steps:
            cli_ok(*step, "--store", store_uri, "--by", "reliability-test")
            time.sleep(1.6)
        report = stop_loadgen(loadgen, path)
        assert worker_pids(server.pid) == workers_before, "a worker died during the rollout"
    print("rollout:", summary(report))
    assert_no_failures(report)
    assert store.routing_generation(MODEL) == first + len(steps)
    seen = verify_answers(report, batches, store, MODEL)
    assert set(seen) == {"v1", "v2"}, seen
    # Answers came from at least four of the generations the steps recorded (the replicas
    # followed the changes while the load ran).
    generations = {a["generation"] for a in report["answers"]}
    assert len(generations & set(range(first + 1, first + len(steps) + 1))) >= 4, generations
