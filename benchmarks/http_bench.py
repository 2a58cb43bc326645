"""HTTP benchmark: the service under gunicorn against an empty Flask JSON endpoint, and the
per-situation cost of JSON rows, JSON columns and Arrow at 10k and 100k situations.

    .venv/bin/python benchmarks/http_bench.py            # figures to docs/benchmarks.md
    .venv/bin/python benchmarks/http_bench.py --quick    # shorter, prints only
    .venv/bin/python benchmarks/http_bench.py --baseline COMMIT   # also serve COMMIT's code,
                                                        # in the same turns (before/after)

Everything runs on 127.0.0.1 with the project's gunicorn config (deploy/gunicorn.conf.py,
2 sync workers); each server is stopped when its part is done.  The load generator is a few
threads with http.client, each sending requests back to back for a fixed time.
"""

from __future__ import annotations

import argparse
import atexit
import http.client
import json
import os
import platform
import re
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Iterator
from contextlib import ExitStack, contextmanager
from pathlib import Path

import numpy as np
import pyarrow as pa
from flask import Flask, jsonify, request

REPO = Path(__file__).resolve().parents[1]
DOC = REPO / "docs" / "benchmarks.md"
BEGIN, END = "<!-- http:begin -->", "<!-- http:end -->"
MODEL = "wrenmouth_commute"
ALTERNATIVES = ("car", "tram", "bicycle", "walk")
ARROW = "application/vnd.apache.arrow.stream"
ROUNDS = 4
"""The one-situation comparison alternates the two servers this many times."""
NOTE_ONE_SITUATION = (
    "The one-situation bar is not met (or is met only with the client's share of the cores: "
    "the server CPU ratio is below 0.7). Beyond the empty endpoint, a one-row request pays "
    "fixed work over many small steps. The largest is checking and scoring, about a third of the "
    "extra under gunicorn: about 11 NumPy operations in `check_batch` and 35 in `score` (a "
    "third of them views), each about a microsecond on one-row arrays when warm and several "
    "once a loaded machine has cooled the caches. Then parsing (the envelope schema), "
    "decoding the record, encoding the answer, five metric updates in multiprocess mode and "
    "the access line. "
    '"Where a one-situation request\'s time goes" below measures each step under gunicorn, '
    'and "Instructions per request" counts the work without the noise of timing. '
    '"How close a one-situation request comes to its floor" serves an app that does only '
    "the steps every scoring request requires, each in its cheapest form: it reaches only "
    "about 0.7 to 0.9 itself (0.6 to 0.7 by server CPU), so the bar leaves little or no room "
    "for the rest of the job."
)

# The empty endpoint the service is compared with (served by the same gunicorn config).
empty_app = Flask("empty")


@empty_app.post("/empty")
def empty() -> object:
    request.get_json()
    return jsonify({"ok": True})


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_ready(port: int, path: str, process: subprocess.Popen, seconds: float = 60) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"server exited with {process.returncode}")
        try:
            conn = http.client.HTTPConnection("127.0.0.1", port, timeout=2)
            conn.request("GET", path)
            if conn.getresponse().status in (200, 405):
                return
        except OSError:
            time.sleep(0.1)
    raise RuntimeError("server did not become ready")


@contextmanager
def serve(
    argv: list[str], port: int, ready_path: str, env: dict[str, str], cwd: Path = REPO
) -> Iterator[int]:
    process = subprocess.Popen(
        argv, cwd=cwd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        start_new_session=True,
    )  # fmt: skip
    try:
        wait_ready(port, ready_path, process)
        yield process.pid
    finally:
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait(timeout=5)


def tree_env(tree: Path) -> dict[str, str]:
    """The environment that runs the code of ``tree`` (this repository, or an exported
    baseline commit, which then comes first on the import path)."""
    env = dict(os.environ)
    if tree != REPO:
        env["PYTHONPATH"] = str(tree)
    return env


def service(store: str, port: int, workers: int = 2, tree: Path = REPO):
    env = {**tree_env(tree), "CHOICECAST_POLL_SECONDS": "5"}
    for key in ("CHOICECAST_SCORE_TOKENS", "CHOICECAST_ADMIN_TOKENS", "CHOICECAST_TOKENS_FILE"):
        env.pop(key, None)
    env.pop("PROMETHEUS_MULTIPROC_DIR", None)
    argv = [str(Path(sys.executable).with_name("choicecast")), "serve", "--store", store,
            "--host", "127.0.0.1", "--port", str(port), "--workers", str(workers)]  # fmt: skip
    return serve(argv, port, "/readyz", env, cwd=tree)


def demo_store(root: Path, tree: Path = REPO) -> str:
    """A demo store written by the code of ``tree``."""
    root.mkdir(parents=True, exist_ok=True)
    subprocess.run(
        [str(Path(sys.executable).with_name("choicecast")), "demo", "--store", str(root / "store"),
         "--populations", str(root / "populations")],
        check=True, stdout=subprocess.DEVNULL, cwd=tree, env=tree_env(tree),
    )  # fmt: skip
    return str(root / "store")


def export_commit(ref: str, dest: Path) -> Path:
    """The service, store and deploy files of commit ``ref`` (read from git) under ``dest``."""
    dest.mkdir(parents=True)
    archive = subprocess.run(
        ["git", "archive", ref, "service", "model_store", "deploy"],
        cwd=REPO, check=True, capture_output=True,
    ).stdout  # fmt: skip
    subprocess.run(["tar", "-x", "-C", str(dest)], input=archive, check=True)
    return dest


def empty_server(port: int):
    argv = [sys.executable, "-m", "gunicorn", "--config", str(REPO / "deploy" / "gunicorn.conf.py"),
            "--bind", f"127.0.0.1:{port}", "--workers", "2", "benchmarks.http_bench:empty_app"]  # fmt: skip
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    return serve(argv, port, "/empty", env)


def situations(n: int, seed: int = 1) -> list[dict]:
    """Invented commuting situations within the demo model's estimation ranges."""
    rng = np.random.default_rng(seed)
    cost = rng.uniform(0.5, 12.0, (n, 4)).round(2)
    minutes = rng.uniform(4.0, 80.0, (n, 4)).round(1)
    age = rng.uniform(18, 80, n).round()
    rain = rng.uniform(0, 20, n).round(1)
    out = []
    for i in range(n):
        attrs = {
            a: {"cost": float(cost[i, j]), "minutes": float(minutes[i, j])}
            for j, a in enumerate(ALTERNATIVES)
        }
        out.append({"id": f"s{i}", "attributes": attrs,
                    "context": {"age": float(age[i]), "rain_mm": float(rain[i])}})  # fmt: skip
    return out


def columns_of(rows: list[dict]) -> dict:
    return {
        "id": [s["id"] for s in rows],
        "attributes": {
            a: {k: [s["attributes"][a][k] for s in rows] for k in ("cost", "minutes")}
            for a in ALTERNATIVES
        },
        "context": {k: [s["context"][k] for s in rows] for k in ("age", "rain_mm")},
    }


def arrow_of(rows: list[dict]) -> bytes:
    n = len(rows)
    table = pa.table(
        {
            "situation": np.repeat([s["id"] for s in rows], 4),
            "alternative": np.tile(ALTERNATIVES, n),
            "cost": [s["attributes"][a]["cost"] for s in rows for a in ALTERNATIVES],
            "minutes": [s["attributes"][a]["minutes"] for s in rows for a in ALTERNATIVES],
            "age": np.repeat([s["context"]["age"] for s in rows], 4),
            "rain_mm": np.repeat([s["context"]["rain_mm"] for s in rows], 4),
        }
    )
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def post(
    port: int, path: str, body: bytes, content_type: str, timeout: float = 120
) -> tuple[int, bytes]:
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=timeout)
    try:
        conn.request("POST", path, body=body, headers={"Content-Type": content_type})
        response = conn.getresponse()
        return response.status, response.read()
    finally:
        conn.close()


def cpu_seconds(pids: list[int]) -> float:
    """User + system CPU time consumed so far by ``pids`` (from /proc/<pid>/stat)."""
    total = 0
    for pid in pids:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
        total += int(fields[11]) + int(fields[12])
    return total / os.sysconf("SC_CLK_TCK")


def load(
    port: int, path: str, body: bytes, seconds: float, threads: int, pids: list[int] = ()
) -> dict[str, float]:
    """Back-to-back requests from ``threads`` threads for ``seconds``: rate, latencies and the
    server's CPU time per request (``pids``: the gunicorn master and workers)."""
    cpu_before = cpu_seconds(list(pids))
    machine_before = machine_times()
    latencies: list[float] = []
    errors = [0]
    stop = time.monotonic() + seconds
    lock = threading.Lock()

    def worker() -> None:
        mine: list[float] = []
        bad = 0
        while time.monotonic() < stop:
            started = time.perf_counter()
            status, _ = post(port, path, body, "application/json", timeout=10)
            mine.append(time.perf_counter() - started)
            bad += status != 200
        with lock:
            latencies.extend(mine)
            errors[0] += bad

    started = time.monotonic()
    pool = [threading.Thread(target=worker) for _ in range(threads)]
    for t in pool:
        t.start()
    for t in pool:
        t.join()
    elapsed = time.monotonic() - started
    cpu = cpu_seconds(list(pids)) - cpu_before
    busy, total = (
        after - before for after, before in zip(machine_times(), machine_before, strict=True)
    )
    return {**summary([(latencies, errors[0], elapsed, cpu)]), "busy": busy / max(total, 1)}


def machine_times() -> tuple[int, int]:
    """(busy, total) CPU ticks of the whole machine so far (/proc/stat; idle and iowait are
    not busy)."""
    ticks = [int(v) for v in Path("/proc/stat").read_text().split("\n", 1)[0].split()[1:]]
    return sum(ticks) - ticks[3] - ticks[4], sum(ticks)


def summary(runs: list[tuple[list[float], int, float, float]]) -> dict[str, float]:
    """Rate, latencies and server CPU per request over runs of (latencies s, errors,
    elapsed s, server CPU s)."""
    lat = np.array([x for r in runs for x in r[0]]) * 1000
    elapsed, cpu = sum(r[2] for r in runs), sum(r[3] for r in runs)
    return {
        "cpu_us": cpu / max(len(lat), 1) * 1e6,
        "requests": len(lat),
        "errors": sum(r[1] for r in runs),
        "rps": len(lat) / elapsed,
        "p50_ms": float(np.percentile(lat, 50)),
        "p99_ms": float(np.percentile(lat, 99)),
        "runs": runs,  # type: ignore[dict-item]
    }


def worker_pids(master: int) -> list[int]:
    path = Path(f"/proc/{master}/task/{master}/children")
    return [int(p) for p in path.read_text().split()] if path.exists() else []


def peak_rss_mb(pids: list[int]) -> float:
    """Largest VmHWM (peak resident set) among ``pids``, in MiB."""
    peak = 0
    for pid in pids:
        text = Path(f"/proc/{pid}/status").read_text()
        peak = max(peak, int(re.search(r"VmHWM:\s+(\d+) kB", text).group(1)))
    return peak / 1024


def timed(port: int, path: str, body: bytes, content_type: str, repeats: int) -> float:
    """Median wall time of one request (seconds); every answer must be 200."""
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        status, data = post(port, path, body, content_type)
        times.append(time.perf_counter() - started)
        if status != 200:
            raise RuntimeError(f"{path} answered {status}: {data[:300]!r}")
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short run; do not write the doc")
    parser.add_argument("--seconds", type=float, default=8.0, help="load duration per endpoint")
    parser.add_argument(
        "--concurrency",
        default="4,8,16",
        help="client threads, comma-separated: each level is measured on every server",
    )
    parser.add_argument(
        "--baseline",
        metavar="COMMIT",
        help="also serve the code of COMMIT in the same turns (a before/after comparison)",
    )
    args = parser.parse_args()
    seconds = 2.0 if args.quick else args.seconds
    levels = [int(c) for c in args.concurrency.split(",")]
    sizes = (10_000,) if args.quick else (10_000, 100_000)
    repeats = 1 if args.quick else 3

    load_before = os.getloadavg()[0]
    tmp = Path(tempfile.mkdtemp(prefix="choicecast-bench-"))
    atexit.register(shutil.rmtree, tmp, ignore_errors=True)
    store = demo_store(tmp / "current")
    baseline = export_commit(args.baseline, tmp / "baseline") if args.baseline else None

    one = json.dumps({"situations": situations(1)}).encode()
    routed = f"/v1/models/{MODEL}/score"
    pinned = f"/v1/models/{MODEL}/versions/v1/score"

    # Both servers run at once (an idle server costs nothing) and take turns under load, so
    # that load from other processes on the machine falls on both alike.
    with ExitStack() as stack:
        servers = {"empty": (free_port(), "/empty"), "service": (free_port(), routed)}
        masters = {
            "empty": stack.enter_context(empty_server(servers["empty"][0])),
            "service": stack.enter_context(service(store, servers["service"][0])),
        }
        if baseline is not None:
            servers["baseline"] = (free_port(), routed)
            base_store = demo_store(tmp / "baseline-store", baseline)
            masters["baseline"] = stack.enter_context(
                service(base_store, servers["baseline"][0], tree=baseline)
            )
        # Warm-up long enough that every worker has booted (its start-up CPU is not measured).
        for port, path in servers.values():
            load(port, path, one, 2.0, levels[0])
        pids = {k: [m, *worker_pids(m)] for k, m in masters.items()}
        by_level: dict[int, dict[str, dict]] = {}
        turn_ratios: dict[int, list[float]] = {}
        for threads in levels:
            turns: list[dict[str, dict]] = []
            for i in range(ROUNDS):
                order = list(servers) if i % 2 == 0 else list(servers)[::-1]
                turns.append(
                    {
                        k: load(*servers[k], one, seconds / ROUNDS, threads, pids[k])  # type: ignore[misc]
                        for k in order
                    }
                )
            by_level[threads] = {
                k: {
                    **summary([r for t in turns for r in t[k]["runs"]]),
                    "busy": statistics.mean(t[k]["busy"] for t in turns),
                }
                for k in servers
            }
            turn_ratios[threads] = sorted(t["service"]["rps"] / t["empty"]["rps"] for t in turns)
    # Throughput is the rate a server sustains at its best concurrency (capacity).
    best = {k: max(levels, key=lambda c: by_level[c][k]["rps"]) for k in servers}
    stats = {k: by_level[best[k]][k] for k in servers}
    empty_stats, service_stats = stats["empty"], stats["service"]

    batch: dict[tuple[str, int], dict[str, float]] = {}
    for n in sizes:
        rows = situations(n, seed=n)
        bodies = {
            "JSON rows": (json.dumps({"situations": rows}).encode(), "application/json"),
            "JSON columns": (
                json.dumps({"columns": columns_of(rows)}).encode(),
                "application/json",
            ),
            "Arrow IPC": (arrow_of(rows), ARROW),
        }
        port = free_port()
        with service(store, port):
            for form, (body, ctype) in bodies.items():
                timed(port, pinned, body, ctype, 1)  # warm-up (and a check of the answer)
                seconds_per_request = timed(port, pinned, body, ctype, repeats)
                batch[(form, n)] = {
                    "bytes": len(body),
                    "seconds": seconds_per_request,
                    "us_per_situation": seconds_per_request / n * 1e6,
                }
    peak: dict[str, float] = {}
    n_peak = sizes[-1]
    rows = situations(n_peak, seed=n_peak)
    for form, (body, ctype) in {
        "JSON rows": (json.dumps({"situations": rows}).encode(), "application/json"),
        "JSON columns": (json.dumps({"columns": columns_of(rows)}).encode(), "application/json"),
        "Arrow IPC": (arrow_of(rows), ARROW),
    }.items():
        port = free_port()
        with service(store, port, workers=1) as master:
            pids = worker_pids(master)
            idle = peak_rss_mb(pids)
            timed(port, pinned, body, ctype, 1)
            peak[form] = peak_rss_mb(pids)
            peak[f"{form} idle"] = idle

    ratio = service_stats["rps"] / empty_stats["rps"]
    cpu_ratio = empty_stats["cpu_us"] / service_stats["cpu_us"]
    same_level = {c: by_level[c]["service"]["rps"] / by_level[c]["empty"]["rps"] for c in levels}
    names = {"empty": "empty Flask JSON endpoint", "service": f"`POST {routed}`"}
    if baseline is not None:
        names["baseline"] = f"the same request, code of commit `{args.baseline}` (before)"
    level_rows = [
        f"| {c} | {names[k]} | {r['rps']:.0f} | {r['p50_ms']:.2f} | {r['p99_ms']:.2f} "
        f"| {r['cpu_us']:.0f} | {r['busy']:.0%} | {r['errors']} |"
        for c in levels
        for k in servers
        for r in (by_level[c][k],)
    ]
    lines = [
        "## HTTP service",
        "",
        "Command: `.venv/bin/python benchmarks/http_bench.py"
        + (f" --baseline {args.baseline}" if args.baseline else "")
        + "` (one run; "
        f"{time.strftime('%Y-%m-%d', time.gmtime())}, {platform.python_version()}, "
        f"{os.cpu_count()} cores). Every server uses deploy/gunicorn.conf.py with 2 sync workers "
        f"on 127.0.0.1; the load generator (same machine, so it shares the 2 cores) is "
        "one process of threads sending requests back to back with http.client (sync workers "
        "close each connection). Model: demo `wrenmouth_commute` "
        "(4 alternatives, 2 attributes, 2 context variables). Load average of the machine "
        f"(1 min) when the run started: {load_before:.1f}, when it ended: {os.getloadavg()[0]:.1f} "
        "(other work on the same 2 cores slows every figure; compare the rows of one table).",
        "",
        "### One situation vs an empty Flask JSON endpoint",
        "",
        f"The servers run side by side and take turns at each client concurrency: {ROUNDS} "
        f"rounds of {seconds / ROUNDS:g} s each, after a 2 s warm-up of each (every worker "
        "booted), so load from other processes falls on all alike. A server's throughput is "
        "the rate it sustains at its best concurrency: a server that leaves the machine idle "
        "at some concurrency (the busy column, the share of both cores in use by any process) "
        "is waiting on round trips there, not working at capacity.",
        "",
        "| client threads | endpoint | requests/s | p50 ms | p99 ms | server CPU us / request "
        "| machine busy | errors |",
        "| ---: | --- | ---: | ---: | ---: | ---: | ---: | ---: |",
        *level_rows,
        "",
        "The request is routed and returns probabilities, with the access log on; the empty "
        'endpoint parses the same body and returns `{"ok": true}`.',
        *baseline_rows(stats, args.baseline),
        "",
        f"Throughput ratio service / empty endpoint, each at its best concurrency "
        f"({best['service']} and {best['empty']} threads): **{ratio:.2f}** (target >= 0.7). "
        "At the same concurrency: "
        + ", ".join(
            f"{c} threads {same_level[c]:.2f} (rounds {turn_ratios[c][0]:.2f} to "
            f"{turn_ratios[c][-1]:.2f})"
            for c in levels
        )
        + f". Ratio of server CPU per request (empty / service), the throughput ratio the "
        f"servers would reach with the cores to themselves: **{cpu_ratio:.2f}**.",
        "",
        NOTE_ONE_SITUATION if ratio < 0.7 or cpu_ratio < 0.7 else "",
        "",
        "### Per-situation cost of a batch (pinned version, probabilities)",
        "",
        "Median of 3 requests, wall time at the client (upload, parse, check, score, encode, download).",
        "",
        "| form | situations | body MB | seconds | us / situation | vs Arrow |",
        "| --- | ---: | ---: | ---: | ---: | ---: |",
    ]
    for n in sizes:
        arrow_cost = batch[("Arrow IPC", n)]["us_per_situation"]
        for form in ("JSON rows", "JSON columns", "Arrow IPC"):
            b = batch[(form, n)]
            lines.append(
                f"| {form} | {n:,} | {b['bytes'] / 1e6:.1f} | {b['seconds']:.3f} "
                f"| {b['us_per_situation']:.2f} | {b['us_per_situation'] / arrow_cost:.1f}x |"
            )
    lines += [
        "",
        f"### Peak memory of one {n_peak:,}-situation request",
        "",
        "A fresh 1-worker server per form; peak resident set (VmHWM) of the worker.",
        "",
        "| form | idle worker MiB | peak MiB |",
        "| --- | ---: | ---: |",
    ]
    for form in ("JSON rows", "JSON columns", "Arrow IPC"):
        lines.append(f"| {form} | {peak[f'{form} idle']:.0f} | {peak[form]:.0f} |")
    text = "\n".join(lines) + "\n"
    print(text)
    if not args.quick:
        write_section(text)


def baseline_rows(stats: dict[str, dict], ref: str | None) -> list[str]:
    """The baseline's table row and its before/after line (nothing without a baseline)."""
    if ref is None:
        return []
    b, s, e = stats["baseline"], stats["service"], stats["empty"]
    before, after = b["cpu_us"] - e["cpu_us"], s["cpu_us"] - e["cpu_us"]
    return [
        "",
        f"Before / after (commit `{ref}` / this tree, same turns, each at its best "
        "concurrency): throughput ratio to the "
        f"empty endpoint {b['rps'] / e['rps']:.2f} / {s['rps'] / e['rps']:.2f}; server CPU "
        f"per request beyond the empty endpoint's {before:.0f} / {after:.0f} us "
        f"({(after - before) / before:+.0%}).",
    ]


def write_section(text: str) -> None:
    doc = DOC.read_text() if DOC.exists() else "# Benchmarks\n"
    if BEGIN in doc and END in doc:
        head, rest = doc.split(BEGIN, 1)
        _, tail = rest.split(END, 1)
        doc = f"{head}{BEGIN}\n{text}{END}{tail}"
    else:
        doc = f"{doc.rstrip()}\n\n{BEGIN}\n{text}{END}\n"
    DOC.write_text(doc)


if __name__ == "__main__":
    main()
