"""A bounded HTTP load generator: fixed concurrency, fixed duration, keep-alive connections.

    python -m tests.support.loadgen --port 8000 --requests plan.json --duration 15 \\
        --concurrency 8 --out report.json
    python -m tests.support.loadgen --port 8000 --store ./var/store --model wrenmouth_commute

``plan.json`` is a list of requests ``{"method", "path", "headers", "body"}`` (``body`` a JSON
value, sent as ``application/json``); ``--model`` builds one from the store instead (valid
situations of the model's routed spec, as the reliability tests send).  Each of
``concurrency`` threads owns one ``http.client`` connection (reopened after an error or a
``Connection: close``) and sends the plan's requests in turn until the duration has passed or
the process gets SIGTERM; a request in flight then completes and the report is written.

The report counts statuses and connection errors, gives throughput and latency percentiles
(nearest-rank, common practice), and, for JSON score responses, every distinct answer:
``(request index, version, routing generation, probabilities of every situation)`` with how
often it was seen, so a test can check each one against the core and the routing history.
Nothing here asserts timings.
"""

from __future__ import annotations

import argparse
import http.client
import json
import math
import signal
import sys
import threading
import time
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any


@dataclass(frozen=True)
class PlannedRequest:
    method: str
    path: str
    body: bytes | None = None
    headers: dict[str, str] = field(default_factory=dict)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> PlannedRequest:
        headers = dict(data.get("headers") or {})
        body = None
        if data.get("body") is not None:
            body = json.dumps(data["body"]).encode()
            headers.setdefault("Content-Type", "application/json")
        return cls(data.get("method", "POST"), data["path"], body, headers)


@dataclass
class _Tally:
    latencies: list[float] = field(default_factory=list)
    statuses: Counter = field(default_factory=Counter)
    connection_errors: Counter = field(default_factory=Counter)
    answers: Counter = field(default_factory=Counter)
    unreadable: int = 0
    bad_samples: list[str] = field(default_factory=list)


def percentile(sorted_values: Sequence[float], q: float) -> float:
    """Nearest-rank percentile ``q`` in [0, 100] of already sorted values (common practice)."""
    if not sorted_values:
        return math.nan
    rank = max(1, math.ceil(q / 100.0 * len(sorted_values)))
    return sorted_values[rank - 1]


def _answer_key(index: int, payload: bytes) -> tuple | None:
    """(request index, version, generation, per-situation probabilities as item tuples)."""
    doc = json.loads(payload)
    situations = doc.get("situations")
    if not isinstance(situations, list):
        return None
    probabilities = tuple(tuple(sorted(s.get("probabilities", {}).items())) for s in situations)
    generation = (doc.get("routing") or {}).get("generation")
    return (index, doc.get("version"), generation, probabilities)


def _worker(
    host: str,
    port: int,
    plan: Sequence[PlannedRequest],
    offset: int,
    deadline: float,
    record_answers: bool,
    tally: _Tally,
    timeout: float,
    stop: threading.Event,
) -> None:
    conn: http.client.HTTPConnection | None = None
    k = offset
    while time.monotonic() < deadline and not stop.is_set():
        index = k % len(plan)
        k += 1
        request = plan[index]
        if conn is None:
            conn = http.client.HTTPConnection(host, port, timeout=timeout)
        started = time.perf_counter()
        try:
            conn.request(request.method, request.path, body=request.body, headers=request.headers)
            response = conn.getresponse()
            payload = response.read()
        except (OSError, http.client.HTTPException) as exc:
            tally.connection_errors[type(exc).__name__] += 1
            conn.close()
            conn = None
            time.sleep(0.01)  # do not spin while a server is gone
            continue
        tally.latencies.append(time.perf_counter() - started)
        tally.statuses[response.status] += 1
        if response.will_close:
            conn.close()
            conn = None
        if response.status >= 400 and len(tally.bad_samples) < 5:
            tally.bad_samples.append(f"{response.status} {payload[:500]!r}")
        if record_answers and response.status == 200:
            try:
                key = _answer_key(index, payload)
            except ValueError:
                key = None
            if key is None:
                tally.unreadable += 1
            else:
                tally.answers[key] += 1
    if conn is not None:
        conn.close()


def run_load(
    host: str,
    port: int,
    plan: Sequence[PlannedRequest],
    duration: float,
    concurrency: int,
    *,
    record_answers: bool = True,
    timeout: float = 30.0,
    stop: threading.Event | None = None,
) -> dict[str, Any]:
    """Run the plan for ``duration`` seconds (or until ``stop`` is set) on ``concurrency``
    threads; returns the report."""
    stop = stop or threading.Event()
    if not plan:
        raise ValueError("the plan has no requests")
    tallies = [_Tally() for _ in range(concurrency)]
    deadline = time.monotonic() + duration
    threads = [
        threading.Thread(
            target=_worker,
            args=(host, port, plan, i, deadline, record_answers, tallies[i], timeout, stop),
            daemon=True,
        )
        for i in range(concurrency)
    ]
    started = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join(duration + timeout + 5)
    elapsed = time.perf_counter() - started
    latencies = sorted(x for t in tallies for x in t.latencies)
    statuses: Counter = sum((t.statuses for t in tallies), Counter())
    errors: Counter = sum((t.connection_errors for t in tallies), Counter())
    answers: Counter = sum((t.answers for t in tallies), Counter())
    completed = len(latencies)
    ok = sum(n for s, n in statuses.items() if 200 <= s < 300)
    return {
        "duration_s": elapsed,
        "concurrency": concurrency,
        "completed": completed,
        "ok": ok,
        "statuses": {str(s): n for s, n in sorted(statuses.items())},
        "connection_errors": dict(errors),
        "unreadable_answers": sum(t.unreadable for t in tallies),
        "bad_samples": [s for t in tallies for s in t.bad_samples][:5],
        "throughput_rps": completed / elapsed if elapsed > 0 else 0.0,
        "latency_ms": {
            "p50": percentile(latencies, 50) * 1e3,
            "p90": percentile(latencies, 90) * 1e3,
            "p99": percentile(latencies, 99) * 1e3,
            "max": (latencies[-1] * 1e3) if latencies else math.nan,
        },
        "threads_alive": sum(t.is_alive() for t in threads),
        "answers": [
            {
                "request": index,
                "version": version,
                "generation": generation,
                "probabilities": [dict(p) for p in probabilities],
                "count": count,
            }
            for (index, version, generation, probabilities), count in sorted(
                answers.items(), key=lambda kv: (kv[0][0], str(kv[0][1]), str(kv[0][2]))
            )
        ],
    }


def _model_plan(store_uri: str, model: str, token: str | None) -> list[dict[str, Any]]:
    """12 requests of 1-3 valid situations each for the live version with the largest weight."""
    from model_store import open_store
    from tests.support.payloads import batches_for, score_plan

    store = open_store(store_uri)
    live = store.get_routing(model).live
    spec = store.load_version(model, max(live, key=lambda v: live[v])).spec
    return score_plan(model, batches_for(spec, 12, seed=100), token)


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--host", default="127.0.0.1")
    parser.add_argument("--port", type=int, required=True)
    plan_from = parser.add_mutually_exclusive_group(required=True)
    plan_from.add_argument("--requests", type=Path, help="JSON list of requests")
    plan_from.add_argument(
        "--model", help="score this routed model of --store with generated valid situations"
    )
    parser.add_argument("--store", help="store URI (with --model)")
    parser.add_argument("--token", help="bearer token to send (with --model)")
    parser.add_argument("--duration", type=float, default=10.0)
    parser.add_argument("--concurrency", type=int, default=8)
    parser.add_argument("--timeout", type=float, default=30.0, help="per request, seconds")
    parser.add_argument("--no-answers", action="store_true", help="do not record answers")
    parser.add_argument("--out", type=Path, help="write the report here (default: stdout)")
    args = parser.parse_args(argv)
    if args.host not in ("127.0.0.1", "localhost", "::1"):
        parser.error("the load generator only targets the local machine")
    if args.requests:
        plan_data = json.loads(args.requests.read_text())
    else:
        if not args.store:
            parser.error("--model needs --store")
        plan_data = _model_plan(args.store, args.model, args.token)
    plan = [PlannedRequest.from_dict(d) for d in plan_data]
    stop = threading.Event()
    # SIGTERM ends the run early (requests in flight complete) and the report is still written.
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    report = run_load(
        args.host,
        args.port,
        plan,
        args.duration,
        args.concurrency,
        record_answers=not args.no_answers,
        timeout=args.timeout,
        stop=stop,
    )
    text = json.dumps(report, indent=1)
    if args.out:
        args.out.write_text(text + "\n")
    else:
        sys.stdout.write(text + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
