"""Several replicas sharing one S3-compatible store converge on routing changes.

The set-up is the production one in miniature: moto's S3-compatible server on 127.0.0.1 holds
the demo store; each replica runs the image's own serve command (ENTRYPOINT + CMD of
deploy/Containerfile, bound to 127.0.0.1 at a free port, one worker) with the ConfigMap's
settings and a tokens file as the Deployment mounts it. While samplers score continuously
against every replica, routing is changed through the CLI (widen the canary, promote,
roll back, shadow only), then a replica is started late.

What must hold (the product contract of stateless replicas, DESIGN.md "Routing and rollout"):
- every replica serves a new routing generation within the poll interval (plus a margin for
  the poll itself and process scheduling on a loaded 2-core machine);
- a replica started late serves the same state as the others from its first ready answer;
- no response is ever scored by a version that was not live at the generation it names, and
  that generation was in force, or the one just replaced, when the request was made (the
  switch window: one poll interval plus the margin); a shadow version never answers;
- no request fails while routing changes.

Bounded: every wait has a timeout, the samplers stop by themselves, and every process is
stopped by the fixture that started it. No timing is asserted beyond the convergence bound.
"""

from __future__ import annotations

import contextlib
import json
import secrets
import subprocess
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import botocore.exceptions
import pytest
import requests
from containerfile_reader import CONTAINERFILE, exec_form, healthcheck_command, instructions
from k8s_manifests import one
from prometheus_client.parser import text_string_to_metric_families

from model_store.demo import VERSIONS as DEMO_VERSIONS
from model_store.routing import record_key
from service.choice.spec import spec_from_dict
from tests.support.payloads import situations_for
from tests.support.processes import (
    S3_TEST_ENV,
    VENV_BIN,
    Running,
    clean_env,
    cli_ok,
    free_port,
    readiness,
    s3_client,
    start,
    start_s3,
    wait_until,
)

pytestmark = pytest.mark.slow

MODEL = "wrenmouth_commute"  # the demo's model with two versions, routed v1 90% / v2 10%
BUCKET = "choicecast-replicas"
PREFIX = "production"
POLL_SECONDS = 1.0
# Allowance beyond the poll interval: one poll's own duration (list + read the routing, load a
# version) and scheduling delays with three replicas, samplers and the S3 server on 2 cores.
MARGIN_SECONDS = 2.5
SAMPLERS_PER_REPLICA = 2
# Pause between one sampler's requests: a steady, realistic load (at most ~10 requests/s per
# sampler) rather than saturation, which is the load test's subject (tests/reliability).
SAMPLE_PAUSE_SECONDS = 0.1
STEPS = (
    ("route", MODEL, "--live", "v1=50", "v2=50", "--reason", "widen the canary"),
    ("promote", MODEL, "v2", "--reason", "v2 holds up"),
    ("rollback", MODEL, "--reason", "undo the promotion"),
    ("route", MODEL, "--live", "v1=100", "--shadow", "v2", "--reason", "shadow only"),
)


@dataclass(frozen=True)
class Sample:
    replica: str
    sent: float
    received: float
    status: int
    version: str | None
    generation: int | None
    key: str | None


@dataclass(frozen=True)
class Change:
    generation: int
    started: float
    """Before the CLI ran: the earliest moment the new record could exist."""
    finished: float
    """After the CLI returned: the record exists."""
    written: float | None
    """When the record was first seen in the store (within 20 ms of being written)."""
    seen_after: dict[str, float]
    """Per replica, seconds from `written` to its first /readyz naming the generation."""


@dataclass
class Cluster:
    prefix: str
    store_uri: str
    env: dict[str, str]
    token: str
    logs: Path
    replicas: dict[str, Running] = field(default_factory=dict)


@dataclass
class Record:
    """What the scenario observed, checked by the tests below."""

    history: dict[int, dict[str, Any]]
    first_generation: int
    changes: list[Change]
    samples: list[Sample]
    late_state: dict[str, Any]
    early_states: dict[str, dict[str, Any]]
    store_generations: dict[str, int]
    healthcheck: tuple[int, int]
    metric_generations: dict[str, float]
    """Per replica, the `choicecast_routing_generation` gauge of the model at the end."""


def image_command(port: int) -> list[str]:
    """The image's ENTRYPOINT + CMD with the bind moved to 127.0.0.1:port, workers to 1."""
    steps = instructions(CONTAINERFILE.read_text())
    final = [s for s in steps if s.stage == max(t.stage for t in steps)]
    entrypoint = exec_form(next(s.argument for s in final if s.keyword == "ENTRYPOINT"))
    args = exec_form(next(s.argument for s in final if s.keyword == "CMD"))
    for option, value in (("--host", "127.0.0.1"), ("--port", str(port)), ("--workers", "1")):
        args[args.index(option) + 1] = value
    return [str(VENV_BIN / entrypoint[0]), *entrypoint[1:], *args]


def launch_replica(cluster: Cluster, name: str) -> Running:
    """Start a replica with the image's command (returns at once; see :func:`wait_ready`)."""
    port = free_port()
    env = {**cluster.env, "PROMETHEUS_MULTIPROC_DIR": str(cluster.logs / f"{name}-metrics")}
    replica = start(name, image_command(port), env, cluster.logs)
    replica.url, replica.port = f"http://127.0.0.1:{port}", port
    cluster.replicas[name] = replica
    return replica


def wait_ready(replica: Running, timeout: float = 90.0) -> Running:
    """Wait (bounded) until the replica's /readyz answers 200."""

    def ready() -> bool:
        if not replica.alive():
            raise RuntimeError("exited")
        return readiness(replica.url, timeout=2)[0] == 200

    if not wait_until(ready, timeout, interval=0.1):
        raise RuntimeError(f"replica {replica.name} did not become ready:\n{replica.log_tail()}")
    return replica


def model_state(replica: Running) -> dict[str, Any]:
    status, body = readiness(replica.url)
    assert status == 200, body
    return body["models"]


def cluster_env(s3_url: str, tokens_file: Path) -> dict[str, str]:
    """The ConfigMap's settings, pointed at the test store, with the Deployment's tokens file."""
    settings = dict(one("ConfigMap")["data"])
    settings.update(
        {
            "CHOICECAST_STORE": f"s3://{BUCKET}/{PREFIX}",
            "CHOICECAST_S3_ENDPOINT": s3_url,
            "CHOICECAST_POLL_SECONDS": str(POLL_SECONDS),
            "CHOICECAST_TOKENS_FILE": str(tokens_file),
            "CHOICECAST_ACCESS_LOG": "false",
            **S3_TEST_ENV,
        }
    )
    return clean_env(settings)


class Samplers:
    """Threads scoring continuously against the replicas, each until told to stop."""

    def __init__(self, bodies: list[dict[str, Any]], token: str, limit: float = 120.0):
        self.bodies = bodies
        self.headers = {"Authorization": f"Bearer {token}"}
        self.samples: list[Sample] = []
        self.errors: list[str] = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self._deadline = time.monotonic() + limit

    def add(self, replica: Running, count: int) -> None:
        for i in range(count):
            thread = threading.Thread(target=self._run, args=(replica, i), daemon=True)
            thread.start()
            self._threads.append(thread)

    def _run(self, replica: Running, offset: int) -> None:
        session = requests.Session()
        url = f"{replica.url}/v1/models/{MODEL}/score"
        i = offset
        while not self._stop.wait(SAMPLE_PAUSE_SECONDS) and time.monotonic() < self._deadline:
            body = self.bodies[i % len(self.bodies)]
            i += 1
            sent = time.monotonic()
            try:
                response = session.post(url, json=body, headers=self.headers, timeout=10)
            except requests.RequestException as exc:
                with self._lock:
                    self.errors.append(f"{replica.name}: {exc}")
                continue
            received = time.monotonic()
            generation = response.headers.get("X-Routing-Generation")
            sample = Sample(
                replica.name,
                sent,
                received,
                response.status_code,
                response.headers.get("X-Model-Version"),
                int(generation) if generation is not None else None,
                body.get("routing_key"),
            )
            if response.status_code == 200:
                answer = response.json()
                named = (answer["version"], answer["routing"]["generation"])
                if named != (sample.version, sample.generation):
                    with self._lock:
                        self.errors.append(f"{replica.name}: body {named} but headers {sample}")
            with self._lock:
                self.samples.append(sample)

    def stop(self) -> None:
        self._stop.set()
        for thread in self._threads:
            thread.join(timeout=15)


class Watcher(threading.Thread):
    """Watches, from before a change is made, for its record to appear in the store and for
    each replica's /readyz to name its generation; notes the moment of each (bounded)."""

    def __init__(self, cluster: Cluster, replicas: dict[str, Running], generation: int):
        super().__init__(daemon=True)
        self.replicas = replicas
        self.generation = generation
        self.client = s3_client(cluster.env["CHOICECAST_S3_ENDPOINT"])
        self.key = f"{cluster.prefix}/{record_key(MODEL, generation)}"
        self.written: float | None = None
        self.seen: dict[str, float] = {}
        self.deadline = time.monotonic() + 60.0

    def _exists(self) -> bool:
        try:
            self.client.head_object(Bucket=BUCKET, Key=self.key)
        except botocore.exceptions.ClientError:
            return False
        return True

    def run(self) -> None:
        while time.monotonic() < self.deadline:
            now = time.monotonic()
            if self.written is None and self._exists():
                self.written = now
            for name, replica in self.replicas.items():
                if name not in self.seen:
                    with contextlib.suppress(requests.RequestException, AssertionError):
                        if model_state(replica).get(MODEL, {}).get("generation") == self.generation:
                            self.seen[name] = time.monotonic()
            if self.written is not None and len(self.seen) == len(self.replicas):
                return
            time.sleep(0.02)


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Cluster]:
    logs = tmp_path_factory.mktemp("replicas")
    token = "score-" + secrets.token_urlsafe(24)
    tokens_file = logs / "tokens.json"
    tokens_file.write_text(json.dumps({"score": [token], "admin": []}))
    s3 = start_s3(logs)
    env = cluster_env(s3.url, tokens_file)
    cluster = Cluster(PREFIX, env["CHOICECAST_STORE"], env, token, logs)
    try:
        cli_ok("demo", "--store", cluster.store_uri, "--populations", str(logs / "pop"),
               env=cluster.env, cwd=logs)  # fmt: skip
        yield cluster
    finally:
        for replica in cluster.replicas.values():
            replica.stop()
        s3.stop()


def show(cluster: Cluster) -> dict[str, Any]:
    out = cli_ok("show", MODEL, "--store", cluster.store_uri, "--json", env=cluster.env)
    return json.loads(out)["routing"]


@pytest.fixture(scope="module")
def record(cluster: Cluster) -> Record:
    t0 = time.monotonic()
    first = show(cluster)["generation"]
    early = {name: launch_replica(cluster, name) for name in ("replica-a", "replica-b")}
    for replica in early.values():
        wait_ready(replica)
    bodies = _bodies()
    samplers = Samplers(bodies, cluster.token)
    samplers.add(early["replica-a"], SAMPLERS_PER_REPLICA)
    samplers.add(early["replica-b"], SAMPLERS_PER_REPLICA)
    changes: list[Change] = []
    try:
        time.sleep(1.0)
        for number, step in enumerate(STEPS, start=1):
            # Each change appends one record (checked against the history afterwards).
            generation = first + number
            watcher = Watcher(cluster, early, generation)
            watcher.start()
            started = time.monotonic()
            cli_ok(*step, "--store", cluster.store_uri, "--by", "replica-test", env=cluster.env)
            finished = time.monotonic()
            watcher.join(timeout=70)
            written = watcher.written
            base = written if written is not None else started
            seen = {name: t - base for name, t in watcher.seen.items()}
            changes.append(Change(generation, started, finished, written, seen))
            time.sleep(1.0)
        early_states = {name: model_state(r) for name, r in early.items()}
        late = wait_ready(launch_replica(cluster, "replica-late"))
        late_state = model_state(late)
        samplers.add(late, SAMPLERS_PER_REPLICA)
        time.sleep(2.0)
    finally:
        samplers.stop()
    assert not samplers.errors, samplers.errors[:5]
    history = {
        state["generation"]: state
        for state in json.loads(
            cli_ok("history", MODEL, "--store", cluster.store_uri, "--json", env=cluster.env)
        )
    }
    listing = json.loads(cli_ok("list", "--store", cluster.store_uri, "--json", env=cluster.env))
    print(f"scenario: {time.monotonic() - t0:.1f} s, {len(samplers.samples)} answers sampled")
    return Record(
        history=history,
        first_generation=first,
        changes=changes,
        samples=samplers.samples,
        late_state=late_state,
        early_states=early_states,
        store_generations=_generations(listing),
        healthcheck=_run_healthcheck(early["replica-a"]),
        metric_generations={
            name: _metric_generation(replica) for name, replica in cluster.replicas.items()
        },
    )


def _metric_generation(replica: Running) -> float:
    """The replica's `choicecast_routing_generation{model=MODEL}` from /metrics."""
    text = requests.get(f"{replica.url}/metrics", timeout=5).text
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            if sample.name == "choicecast_routing_generation" and sample.labels == {"model": MODEL}:
                return sample.value
    raise AssertionError(f"{replica.name}: no choicecast_routing_generation for {MODEL}")


def _bodies() -> list[dict[str, Any]]:
    """Scoring bodies for the model (one to three situations), half with a routing key."""
    spec = spec_from_dict(next(d.spec for d in DEMO_VERSIONS if d.model == MODEL))
    bodies = []
    for i in range(12):
        body: dict[str, Any] = {"situations": situations_for(spec, 1 + i % 3, seed=i)}
        if i % 2 == 0:
            body["routing_key"] = f"customer-{i}"
        bodies.append(body)
    return bodies


def _generations(listing: list[dict[str, Any]]) -> dict[str, int]:
    return {m["model"]: m["generation"] for m in listing}


def _run_healthcheck(replica: Running) -> tuple[int, int]:
    """Exit status of the image's HEALTHCHECK command against the replica, and against a port
    nobody listens on."""
    check = next(s for s in instructions(CONTAINERFILE.read_text()) if s.keyword == "HEALTHCHECK")
    command = healthcheck_command(check.argument)
    command = [str(VENV_BIN / "python"), *command[1:]]

    def run(port: int) -> int:
        env = {**clean_env(), "CHOICECAST_PORT": str(port)}
        return subprocess.run(command, env=env, capture_output=True, timeout=30).returncode

    return run(replica.port), run(free_port())


# -- the checks ------------------------------------------------------------------------------


def test_every_replica_picks_up_each_change_within_the_poll_interval(record: Record) -> None:
    for change in record.changes:
        print(f"generation {change.generation}: seen after", change.seen_after)
    # One record per change, in order, and the last is the store's current state.
    assert max(record.history) == record.changes[-1].generation
    actions = [record.history[c.generation]["action"] for c in record.changes]
    assert actions == [step[0] for step in STEPS]
    for change in record.changes:
        assert change.written is not None, f"record of generation {change.generation} not seen"
        assert set(change.seen_after) == {"replica-a", "replica-b"}, change
        for name, seconds in change.seen_after.items():
            assert seconds <= POLL_SECONDS + MARGIN_SECONDS, (change.generation, name, seconds)


def test_a_late_replica_serves_the_same_state(record: Record) -> None:
    for state in record.early_states.values():
        assert state == record.late_state
    assert record.late_state[MODEL]["generation"] == record.changes[-1].generation
    # ... which is the store's state for every model, as the CLI reads it.
    assert {m: s["generation"] for m, s in record.late_state.items()} == {
        m: g for m, g in record.store_generations.items() if g > 0
    }
    last = record.history[record.changes[-1].generation]
    assert record.late_state[MODEL]["live"] == {v: w for v, w in last["live"].items() if w > 0}
    assert record.late_state[MODEL]["shadow"] == last["shadow"]
    assert any(s.replica == "replica-late" for s in record.samples)


def test_every_replica_reports_the_generation_it_serves_in_metrics(record: Record) -> None:
    # What docs/production.md tells operators to watch: one generation across all pods.
    last = record.changes[-1].generation
    assert record.metric_generations == dict.fromkeys(record.metric_generations, float(last))
    assert len(record.metric_generations) == 3


def test_no_request_fails_while_routing_changes(record: Record) -> None:
    assert len(record.samples) > 100, len(record.samples)
    statuses = {s.status for s in record.samples}
    assert statuses == {200}, statuses
    assert all(s.version and s.generation is not None for s in record.samples)


def test_every_answer_comes_from_a_version_routed_at_that_time(record: Record) -> None:
    starts = {c.generation: c.started for c in record.changes}
    replaced_at = {c.generation - 1: c.written or c.finished for c in record.changes}
    window = POLL_SECONDS + MARGIN_SECONDS
    for s in record.samples:
        state = record.history[s.generation]
        live = {v for v, w in state["live"].items() if w > 0}
        assert s.version in live, f"{s} answered by a version not live at {s.generation}"
        # The generation existed when the answer was produced ...
        assert starts.get(s.generation, float("-inf")) <= s.received, s
        # ... and was in force, or just replaced, when the request was sent.
        if s.generation in replaced_at:
            assert s.sent <= replaced_at[s.generation] + window, s


def test_a_routing_key_meets_the_same_version_on_every_replica(record: Record) -> None:
    # Sticky assignment is a pure function of (model, key, weights), so replicas agree
    # without sharing anything but the store (DESIGN.md, "Routing and rollout").
    versions: dict[tuple[int, str], set[str]] = {}
    replicas: dict[tuple[int, str], set[str]] = {}
    for s in record.samples:
        if s.key is not None:
            versions.setdefault((s.generation, s.key), set()).add(s.version)
            replicas.setdefault((s.generation, s.key), set()).add(s.replica)
    assert versions
    for group, seen in versions.items():
        assert len(seen) == 1, (group, seen, replicas[group])
    # Control: the same key was answered by more than one replica, and keys split the canary.
    assert any(len(r) > 1 for r in replicas.values())
    canary = record.changes[0].generation
    assert {v for (g, _), vs in versions.items() if g == canary for v in vs} == {"v1", "v2"}


def test_a_shadow_version_never_answers(record: Record) -> None:
    last = record.changes[-1]
    assert record.history[last.generation]["shadow"] == "v2"
    settled = last.finished + POLL_SECONDS + MARGIN_SECONDS
    after = [s for s in record.samples if s.sent > settled]
    assert after, "no sample after the shadow-only change settled"
    assert {s.version for s in after} == {"v1"}


def test_both_versions_answered_during_the_canary(record: Record) -> None:
    # Control: the samples are able to show a mixture (the check above is not vacuous).
    canary = record.changes[0]
    during = [s for s in record.samples if s.generation == canary.generation]
    assert {s.version for s in during} == {"v1", "v2"}


def test_the_image_healthcheck_command_probes_the_service(record: Record) -> None:
    healthy, closed = record.healthcheck
    assert healthy == 0
    assert closed != 0
