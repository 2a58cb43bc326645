"""Where a one-situation request's server time goes, under gunicorn.

    .venv/bin/python benchmarks/request_stages.py [--rounds 6] [--seconds 2]

Serves the empty Flask JSON endpoint and one copy of the service per stage
(benchmarks/staged_app.py: the scoring view stopped after that stage), all with the project's
gunicorn config, 2 sync workers each, on 127.0.0.1.  They take turns under the same load (8
client threads, the routed one-situation request of benchmarks/http_bench.py); each figure is
the median over rounds of the server's CPU time per request, and each step's cost is the
difference from the stage before it.  Unlike an in-process count, this includes what the
cold caches of a loaded 2-core machine add.  Writes the "stages" section of docs/benchmarks.md.
"""

from __future__ import annotations

import argparse
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
from staged_app import NEXT_CALL  # noqa: E402

THREADS = 8
EMPTY = "empty Flask JSON endpoint"


def staged_server(store: str, stage: str, port: int):
    env = {
        **os.environ,
        "CHOICECAST_STORE": store,
        "CHOICECAST_POLL_SECONDS": "5",
        "CHOICECAST_BENCH_STAGE": stage,
        "PYTHONPATH": os.pathsep.join([str(REPO / "benchmarks"), str(REPO)]),
    }
    for key in ("CHOICECAST_SCORE_TOKENS", "CHOICECAST_ADMIN_TOKENS", "CHOICECAST_TOKENS_FILE"):
        env.pop(key, None)
    argv = [sys.executable, "-m", "gunicorn", "--config", str(REPO / "deploy" / "gunicorn.conf.py"),
            "--bind", f"127.0.0.1:{port}", "--workers", "2", "staged_app:app"]  # fmt: skip
    return serve(argv, port, "/readyz", env)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=6)
    parser.add_argument("--seconds", type=float, default=2.0, help="load per server and round")
    args = parser.parse_args()
    one = json.dumps({"situations": situations(1)}).encode()
    score = f"/v1/models/{MODEL}/score"
    stages = [*NEXT_CALL, "full"]
    cpu: dict[str, list[float]] = {name: [] for name in (EMPTY, *stages)}
    with tempfile.TemporaryDirectory(prefix="choicecast-stages-") as tmp, ExitStack() as stack:
        store = demo_store(Path(tmp))
        servers = {}
        port = free_port()
        servers[EMPTY] = (port, "/empty", stack.enter_context(empty_server(port)))
        for name in stages:
            port = free_port()
            servers[name] = (port, score, stack.enter_context(staged_server(store, name, port)))
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
    median = {name: statistics.median(v) for name, v in cpu.items()}
    rows, before = [], median[EMPTY]
    for name in (EMPTY, *stages):
        added = "" if name == EMPTY else f"{median[name] - before:+.0f}"
        spread = f"{min(cpu[name]):.0f}-{max(cpu[name]):.0f}"
        rows.append(f"| {name} | {median[name]:.0f} | {spread} | {added} |")
        before = median[name]
    extra = median["full"] - median[EMPTY]
    text = "\n".join(
        [
            "## Where a one-situation request's time goes",
            "",
            f"Command: `.venv/bin/python benchmarks/request_stages.py --rounds {args.rounds}`. "
            "Server CPU time per request (user + system, gunicorn master and 2 sync workers), "
            f"median of {args.rounds} rounds of {args.seconds:g} s at {THREADS} client threads; "
            "each service row is a copy of the service whose scoring view stops after that "
            "step (benchmarks/staged_app.py), so a row's last column is what its step adds. "
            "The empty endpoint reads, parses and answers the body itself; the first service "
            "row does neither, so its difference sets the service's hooks, request metrics and "
            "access line against that work.",
            "",
            "| stage reached | server CPU us / request | range over rounds | added |",
            "| --- | ---: | ---: | ---: |",
            *rows,
            "",
            f"The full request costs {extra:.0f} us more than the empty endpoint "
            f"({median[EMPTY] / median['full']:.2f} of its throughput with the cores to "
            "themselves).",
        ]
    )
    print(text)
    write_section("stages", text)


if __name__ == "__main__":
    main()
