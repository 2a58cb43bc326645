"""Where a one-situation request's server time goes, under gunicorn.

    .venv/bin/python benchmarks/request_stages.py [--rounds 6] [--seconds 2]

Serves the empty Flask JSON endpoint and one copy of the service per stage
(benchmarks/staged_app.py: the scoring view stopped after that stage), each as
``choicecast serve`` would (the project's gunicorn config, 2 sync workers, its own metrics
directory) on 127.0.0.1.  All take turns in every round under the same load (8 client
threads, the routed one-situation request of benchmarks/http_bench.py).  A step's cost is the
difference between its stage and the one before, taken within each round and then the median
over rounds.  Unlike an in-process count, this includes what the cold caches of a loaded
2-core machine add.  Writes the "stages" section of docs/benchmarks.md.
"""

from __future__ import annotations

import argparse
import itertools
import json
import os
import statistics
import sys
import tempfile
from contextlib import ExitStack
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "benchmarks"))

from _doc import write_section  # noqa: E402
from http_bench import (  # noqa: E402
    MODEL,
    demo_store,
    empty_server,
    free_port,
    load,
    serve,
    situations,
    worker_pids,
)

from service.api.server import environment  # noqa: E402

THREADS = 8
EMPTY = "empty Flask JSON endpoint"
STOP_BEFORE = {
    "stopped before parsing (hooks, auth, request metrics, access line)": "parse_score_request",
    "+ parse (body, JSON, envelope schema)": "choose",
    "+ routing and version lookup": "decode",
    "+ decode": "run_score",
    "+ check and score": "encode_rows",
    "+ encode the answer": "dumps",
}
"""Stage -> the call of the scoring view (views/scoring.py) that its copy stops before."""
FULL = "+ the rest: JSON text, response, headers, scoring metrics (the full request)"


def bench_server(store: str, port: int, app: str, env: dict[str, str] | None = None):
    """gunicorn serving ``app`` (``module:object`` under benchmarks/) in the environment
    ``choicecast serve`` builds (a fresh metrics directory, removed when the server exits),
    plus ``env``."""
    for key in ("CHOICECAST_SCORE_TOKENS", "CHOICECAST_ADMIN_TOKENS", "CHOICECAST_TOKENS_FILE"):
        os.environ.pop(key, None)
    os.environ.pop("PROMETHEUS_MULTIPROC_DIR", None)
    full = {**environment(store, {"poll_seconds": 5}), **(env or {})}
    full["PYTHONPATH"] = os.pathsep.join([str(REPO / "benchmarks"), str(REPO)])
    argv = [sys.executable, "-m", "gunicorn", "--config", str(REPO / "deploy" / "gunicorn.conf.py"),
            "--bind", f"127.0.0.1:{port}", "--workers", "2", app]  # fmt: skip
    return serve(argv, port, "/readyz", full)


def staged_server(store: str, stop_before: str | None, port: int):
    """The service stopped before ``stop_before`` (benchmarks/staged_app.py; None: whole)."""
    return bench_server(
        store, port, "staged_app:app", {"CHOICECAST_BENCH_STOP_BEFORE": stop_before or ""}
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=6)
    parser.add_argument("--seconds", type=float, default=2.0, help="load per server and round")
    args = parser.parse_args()
    one = json.dumps({"situations": situations(1)}).encode()
    score = f"/v1/models/{MODEL}/score"
    stages = [*STOP_BEFORE, FULL]
    cpu: dict[str, list[float]] = {name: [] for name in (EMPTY, *stages)}
    with tempfile.TemporaryDirectory(prefix="choicecast-stages-") as tmp, ExitStack() as stack:
        store = demo_store(Path(tmp))
        servers = {}
        port = free_port()
        servers[EMPTY] = (port, "/empty", stack.enter_context(empty_server(port)))
        for name in stages:
            port = free_port()
            server = staged_server(store, STOP_BEFORE.get(name), port)
            servers[name] = (port, score, stack.enter_context(server))
        for port, path, _ in servers.values():
            load(port, path, one, 1.5, THREADS)  # warm-up: every worker booted
        pids = {name: [m, *worker_pids(m)] for name, (_, _, m) in servers.items()}
        order = list(servers)
        for i in range(args.rounds):
            for name in order if i % 2 == 0 else order[::-1]:
                port, path, _ = servers[name]
                result = load(port, path, one, args.seconds, THREADS, pids[name])
                if result["errors"]:
                    raise RuntimeError(f"{name}: {result['errors']} errors")
                cpu[name].append(result["cpu_us"])
    names = [EMPTY, *stages]
    rows = [f"| {EMPTY} | {statistics.median(cpu[EMPTY]):.0f} | | |"]
    for before, name in itertools.pairwise(names):
        # Paired within each round: the copies ran one after another under the same conditions.
        added = [b - a for a, b in zip(cpu[before], cpu[name], strict=True)]
        low, high = min(added), max(added)
        noise = " (within the noise)" if low <= 0 <= high else ""
        rows.append(
            f"| {name} | {statistics.median(cpu[name]):.0f} | {statistics.median(added):+.0f}"
            f"{noise} | {low:+.0f} to {high:+.0f} |"
        )
    extra = [b - a for a, b in zip(cpu[EMPTY], cpu[FULL], strict=True)]
    ratio = statistics.median(a / b for a, b in zip(cpu[EMPTY], cpu[FULL], strict=True))
    text = "\n".join(
        [
            "## Where a one-situation request's time goes",
            "",
            f"Command: `.venv/bin/python benchmarks/request_stages.py --rounds {args.rounds}`. "
            "Server CPU time per request (user + system, gunicorn master and 2 sync workers) "
            f"at {THREADS} client threads, {args.rounds} rounds of {args.seconds:g} s in which "
            "every server takes a turn. Each service row is a copy of the service that stops "
            "after that step (benchmarks/staged_app.py); a step's cost is its row minus the "
            "row before, within each round, as the median and range over rounds. The empty "
            "endpoint reads, parses and answers the body itself; the first service row does "
            "neither, so its difference sets the service's hooks, auth, request metrics and "
            "access line against that work. Stopping costs a few microseconds that the last "
            "row does not pay, so the last step is understated by as much.",
            "",
            "| stage reached | server CPU us / request (median) | step adds (median) | "
            "step adds (range) |",
            "| --- | ---: | ---: | ---: |",
            *rows,
            "",
            f"The full request costs {statistics.median(extra):.0f} us more than the empty "
            f"endpoint ({ratio:.2f} of its throughput with the cores to themselves).",
        ]
    )
    print(text)
    write_section("stages", text)


if __name__ == "__main__":
    main()
