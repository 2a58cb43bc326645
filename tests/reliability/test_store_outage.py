"""The S3-compatible object store goes away while the service is under load, then returns.

moto's standalone server holds the demo store.  Mid-run it is killed (every connection
refused); the replicas keep serving their last good state and report degraded readiness.  A
new server then comes up on the same port with the same objects (a restored store); readiness
recovers and a routing change made after the outage reaches the replicas.
"""

from __future__ import annotations

import time
from pathlib import Path

from model_store import open_store
from tests.support.payloads import batches_for, score_plan, verify_answers
from tests.support.processes import (
    S3_TEST_ENV,
    clean_env,
    cli_ok,
    readiness,
    s3_restore,
    s3_snapshot,
    serving,
    start_s3,
    stop_loadgen,
    wait_until,
)

MODEL = "wrenmouth_commute"
BUCKET = "choicecast-outage"
URI = f"s3://{BUCKET}/demo"


def test_object_store_outage_and_recovery(tmp_path: Path, logs: Path, load, monkeypatch) -> None:
    s3 = start_s3(logs)
    try:
        env = {**S3_TEST_ENV, "CHOICECAST_S3_ENDPOINT": s3.url}
        for key, value in env.items():
            monkeypatch.setenv(key, value)
        cli_ok("demo", "--store", URI, env=clean_env(env), cwd=tmp_path)
        store = open_store(URI, endpoint_url=s3.url)
        spec = store.load_version(MODEL, "v1").spec
        batches = batches_for(spec, 8, seed=500, max_size=2)
        generation = store.routing_generation(MODEL)
        service_env = {
            **env,
            "CHOICECAST_S3_CONNECT_TIMEOUT": "0.5",
            "CHOICECAST_S3_READ_TIMEOUT": "1",
        }
        with serving(URI, logs, env=service_env, workers=2, poll_seconds=0.2) as server:
            loadgen, path = load(server.port, score_plan(MODEL, batches), duration=120)
            time.sleep(2)
            objects = s3_snapshot(s3.url, BUCKET)
            s3.kill()

            def degraded() -> bool:
                status, body = readiness(server.url)
                return status == 503 and any("unreachable" in r for r in body["reasons"])

            assert wait_until(degraded, 15), readiness(server.url)
            time.sleep(2)  # serve a while from the last good state
            s3 = start_s3(logs, port=s3.port)
            s3_restore(s3.url, BUCKET, objects)
            assert wait_until(lambda: readiness(server.url)[0] == 200, 20), readiness(server.url)
            cli_ok(
                "route",
                MODEL,
                "--live",
                "v2=100",
                "--reason",
                "after the outage",
                "--store",
                URI,
                env=clean_env(env),
            )

            def followed() -> bool:
                # Ten answers in a row (from either worker) show the new generation.
                return all(
                    readiness(server.url)[1]["models"][MODEL]["generation"] == generation + 1
                    for _ in range(10)
                )

            assert wait_until(followed, 10), readiness(server.url)
            time.sleep(1.0)  # answers from the new routing
            report = stop_loadgen(loadgen, path)
        print("outage:", report["statuses"], report["connection_errors"])
        assert report["connection_errors"] == {}
        assert set(report["statuses"]) == {"200"}, report["bad_samples"]
        seen = verify_answers(report, batches, open_store(URI, endpoint_url=s3.url), MODEL)
        assert seen.keys() <= {"v1", "v2"}
        answered = {a["generation"] for a in report["answers"]}
        assert answered == {generation, generation + 1}, answered  # before and after
    finally:
        s3.stop()
