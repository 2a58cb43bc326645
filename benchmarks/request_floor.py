"""How close the service comes to the least a one-situation request must cost, under gunicorn.

    .venv/bin/python benchmarks/request_floor.py [--rounds 6] [--seconds 2]

Serves three apps with the project's gunicorn config (2 sync workers, multiprocess metrics
in a fresh directory) on 127.0.0.1: the empty Flask JSON endpoint, benchmarks/floor_app.py
(only the steps DESIGN.md requires of every scoring request, each in its cheapest form) and
the service itself, all on the demo store.  They take turns in every round under the same
load (8 client threads, the routed one-situation request of benchmarks/http_bench.py).
Reports throughput and server CPU per request, each as a ratio to the empty endpoint, with
the median and range over rounds of the paired ratios.  Writes the "floor" section of
docs/benchmarks.md.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import tempfile
from contextlib import ExitStack
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "benchmarks"))

import http_bench as hb  # noqa: E402
from _doc import write_section  # noqa: E402
from request_stages import bench_server, staged_server  # noqa: E402

THREADS = 8
NAMES = ("empty Flask JSON endpoint", "floor (benchmarks/floor_app.py)", "service")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=6)
    parser.add_argument("--seconds", type=float, default=2.0, help="load per server and round")
    args = parser.parse_args()
    one = json.dumps({"situations": hb.situations(1)}).encode()
    path = f"/v1/models/{hb.MODEL}/score"
    runs: dict[str, list[dict]] = {name: [] for name in NAMES}
    with tempfile.TemporaryDirectory(prefix="choicecast-floor-") as tmp, ExitStack() as stack:
        store = hb.demo_store(Path(tmp))
        ports = [hb.free_port() for _ in NAMES]
        masters = [
            stack.enter_context(hb.empty_server(ports[0])),
            stack.enter_context(bench_server(store, ports[1], "floor_app:app")),
            stack.enter_context(staged_server(store, None, ports[2])),
        ]
        paths = ["/empty", path, path]
        for port, p in zip(ports, paths, strict=True):
            hb.load(port, p, one, 1.5, THREADS)  # warm-up: every worker booted
        pids = [[m, *hb.worker_pids(m)] for m in masters]
        order = list(range(len(NAMES)))
        for i in range(args.rounds):
            for k in order if i % 2 == 0 else order[::-1]:
                result = hb.load(ports[k], paths[k], one, args.seconds, THREADS, pids[k])
                if result["errors"]:
                    raise RuntimeError(f"{NAMES[k]}: {result['errors']} errors")
                runs[NAMES[k]].append(result)
    empty = runs[NAMES[0]]
    rows = []
    for name in NAMES:
        rps = [r["rps"] / e["rps"] for r, e in zip(runs[name], empty, strict=True)]
        cpu = [e["cpu_us"] / r["cpu_us"] for r, e in zip(runs[name], empty, strict=True)]
        extra = [r["cpu_us"] - e["cpu_us"] for r, e in zip(runs[name], empty, strict=True)]
        rows.append(
            f"| {name} | {statistics.median(r['rps'] for r in runs[name]):,.0f} | "
            f"{statistics.median(r['cpu_us'] for r in runs[name]):.0f} | "
            f"{statistics.median(extra):+.0f} | "
            f"{statistics.median(rps):.2f} ({min(rps):.2f} to {max(rps):.2f}) | "
            f"{statistics.median(cpu):.2f} ({min(cpu):.2f} to {max(cpu):.2f}) |"
        )
    floor, service = runs[NAMES[1]], runs[NAMES[2]]
    of_floor = statistics.median(s["rps"] / f["rps"] for s, f in zip(service, floor, strict=True))
    work = statistics.median(
        (s["cpu_us"] - e["cpu_us"]) / (f["cpu_us"] - e["cpu_us"])
        for s, f, e in zip(service, floor, empty, strict=True)
    )
    text = "\n".join(
        [
            "## How close a one-situation request comes to its floor",
            "",
            f"Command: `.venv/bin/python benchmarks/request_floor.py --rounds {args.rounds}`. "
            f"{THREADS} client threads, {args.rounds} rounds of {args.seconds:g} s in which "
            "every server takes a turn; the project's gunicorn config, 2 sync workers, "
            "multiprocess metrics. The floor (benchmarks/floor_app.py) does only what "
            "DESIGN.md requires of every scoring request, each step in its cheapest form "
            "(hooks, JSON, the envelope schema, routing, arrays, two whole-array checks, "
            "the utilities and softmax in NumPy, the answer and its headers, four metric "
            "updates, the access line) and nothing a real service needs beyond that. "
            "Ratios are to the empty endpoint within each round: median (range).",
            "",
            "| server | requests/s | server CPU us / request | beyond the empty endpoint | "
            "throughput ratio | CPU ratio |",
            "| --- | ---: | ---: | ---: | ---: | ---: |",
            *rows,
            "",
            f"The service sustains {of_floor:.2f} of the floor's throughput; its server CPU "
            f"beyond the empty endpoint's is {work:.1f} times the floor's. The floor's ratios "
            "bound what a service that does the whole job could reach on this machine.",
        ]
    )
    print(text)
    write_section("floor", text)


if __name__ == "__main__":
    main()
