"""Instructions per one-situation request, counted by valgrind (callgrind), in process.

    .venv/bin/python benchmarks/request_instructions.py [--baseline COMMIT]

Time on a shared 2-core machine is noisy; an instruction count is not (the same total run
after run, whatever else the machine does).  Each count is the difference between a run of
REQUESTS requests and a run of none (start-up cancels out), through Flask's test client: the
empty Flask JSON endpoint of benchmarks/http_bench.py, and the routed one-situation scoring
request on the demo store, with the access log on and metrics in multiprocess mode (as under
gunicorn).  gunicorn's own HTTP work is the same for both and is not counted.  Writes the
"instructions" section of docs/benchmarks.md.  Needs valgrind (Debian package).
"""

from __future__ import annotations

import argparse
import atexit
import contextlib
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
REQUESTS = 300
WARM_UP = 50
NO_ASLR = ["setarch", "-R"] if shutil.which("setarch") else []


def child(target: str, store: str, count: int) -> None:
    """The measured loop (run under valgrind): WARM_UP requests, then ``count`` more."""
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = tempfile.mkdtemp(prefix="choicecast-prom-")
    atexit.register(shutil.rmtree, os.environ["PROMETHEUS_MULTIPROC_DIR"], ignore_errors=True)
    sys.path.insert(0, str(REPO / "benchmarks"))
    from http_bench import MODEL, empty_app, situations

    body = json.dumps({"situations": situations(1)}).encode()
    if target == "empty":
        client, url = empty_app.test_client(), "/empty"
    else:
        from service.api.app import create_app

        client = create_app({"store": store, "poll_seconds": 0}).test_client()
        url = f"/v1/models/{MODEL}/score"
    with open(os.devnull, "w") as sink, contextlib.redirect_stdout(sink):  # the access lines
        for _ in range(WARM_UP + count):
            response = client.post(url, data=body, content_type="application/json")
            assert response.status_code == 200, response.get_data(as_text=True)


def instructions(target: str, store: str, count: int, tree: Path) -> int:
    # One BLAS thread: idle OpenBLAS threads spin, and callgrind counts their spinning (it
    # made counts differ by up to 7 % between runs).  No address randomisation either.
    env = {
        **os.environ,
        "PYTHONHASHSEED": "0",
        "PYTHONPATH": str(tree),
        "OPENBLAS_NUM_THREADS": "1",
    }
    run = subprocess.run(
        [*NO_ASLR, "valgrind", "--tool=callgrind", "--callgrind-out-file=/dev/null", sys.executable,
         str(Path(__file__).resolve()), "--child", target, store, str(count)],
        capture_output=True, text=True, env=env, cwd=tree, check=True,
    )  # fmt: skip
    return int(re.search(r"Collected : (\d+)", run.stderr).group(1))


def per_request(target: str, store: str, tree: Path) -> float:
    return (
        instructions(target, store, REQUESTS, tree) - instructions(target, store, 0, tree)
    ) / REQUESTS


def main() -> None:
    if sys.argv[1:2] == ["--child"]:
        child(sys.argv[2], sys.argv[3], int(sys.argv[4]))
        return
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--baseline", metavar="COMMIT", help="also count COMMIT's code")
    args = parser.parse_args()
    sys.path.insert(0, str(REPO / "benchmarks"))
    from _doc import write_section
    from http_bench import demo_store, export_commit

    tmp = Path(tempfile.mkdtemp(prefix="choicecast-instr-"))
    try:
        store = demo_store(tmp / "current")
        counts = {"empty Flask JSON endpoint": per_request("empty", store, REPO)}
        counts["one-situation scoring request"] = per_request("service", store, REPO)
        if args.baseline:
            tree = export_commit(args.baseline, tmp / "baseline")
            shutil.copytree(REPO / "benchmarks", tree / "benchmarks")
            base_store = demo_store(tmp / "baseline-store", tree)
            counts[f"the same request, code of commit `{args.baseline}`"] = per_request(
                "service", base_store, tree
            )
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    empty = counts["empty Flask JSON endpoint"]
    rows = [f"| {name} | {n / 1e6:.2f} M | {n / empty:.2f} |" for name, n in counts.items()]
    text = "\n".join(
        [
            "## Instructions per request",
            "",
            "Command: `.venv/bin/python benchmarks/request_instructions.py"
            + (f" --baseline {args.baseline}" if args.baseline else "")
            + f"`. Instructions counted by callgrind over {REQUESTS} requests through Flask's "
            "test client, minus a run of none (PYTHONHASHSEED=0, one BLAS thread, no address "
            "randomisation); gunicorn's HTTP work, the "
            "same for every endpoint, is not counted.",
            "",
            "| request | instructions / request | vs empty endpoint |",
            "| --- | ---: | ---: |",
            *rows,
        ]
    )
    print(text)
    write_section("instructions", text)


if __name__ == "__main__":
    main()
