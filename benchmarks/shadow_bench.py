"""Shadow scoring cost, in process: a shadow that shares the live version's input contract
(it scores the live check's batch) against one that decodes and checks the request again.

    .venv/bin/python benchmarks/shadow_bench.py     # figures to docs/benchmarks.md ("shadow")

Demo store, model `wrenmouth_commute`: live v1, shadow v2 (a re-estimate of v1's
specification).  The second case is the same shadow scored as if its contract differed.
"""

from __future__ import annotations

import atexit
import json
import os
import platform
import shutil
import sys
import tempfile
import timeit
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
if "PROMETHEUS_MULTIPROC_DIR" not in os.environ:
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = tempfile.mkdtemp(prefix="choicecast-prom-")
    atexit.register(shutil.rmtree, os.environ["PROMETHEUS_MULTIPROC_DIR"], ignore_errors=True)

from benchmarks._doc import write_section  # noqa: E402
from benchmarks.http_bench import MODEL, demo_store, situations  # noqa: E402
from service.api import scoring_flow as flow  # noqa: E402
from service.api.app import create_app  # noqa: E402
from service.choice import check_batch, score  # noqa: E402


class _OtherContract:
    """The live model as the shadow sees it, but with a contract no version has."""

    input_contract = ("another contract",)

    def __init__(self, live) -> None:
        self.alternatives = live.alternatives


def main() -> None:
    root = Path(tempfile.mkdtemp(prefix="choicecast-shadow-"))
    atexit.register(shutil.rmtree, root, ignore_errors=True)
    store = demo_store(root)
    app = create_app({"store": store, "poll_seconds": 0, "access_log": False})
    reg = app.extensions["choicecast.registry"]
    live = reg.get(MODEL, "v1").compiled
    assert live.input_contract == reg.get(MODEL, "v2").compiled.input_contract
    rows = ["| situations | with the live check, us | decoding and checking again, us | ratio |",
            "| ---: | ---: | ---: | ---: |"]  # fmt: skip
    for n in (1, 1_000, 10_000):
        parsed = flow.ParsedRequest("rows", json.loads(json.dumps(situations(n))))
        check = check_batch(live, flow.decode(parsed, live).batch)
        p = score(live, check.batch).probabilities
        number = max(3, 5_000 // n)
        cost = {}
        for case, model in (("reuse", live), ("again", _OtherContract(live))):
            args = (reg, MODEL, "v1", "v2", parsed, model, check.batch, p)
            seconds = timeit.repeat(lambda a=args: flow.shadow_score(*a), number=number, repeat=5)
            cost[case] = min(seconds) / number * 1e6
        rows.append(
            f"| {n:,} | {cost['reuse']:.0f} | {cost['again']:.0f} "
            f"| {cost['again'] / cost['reuse']:.1f}x |"
        )
    text = "\n".join(
        [
            "## Shadow scoring",
            "",
            "Command: `.venv/bin/python benchmarks/shadow_bench.py` (in process, best of 5; "
            f"{platform.python_version()}, {os.cpu_count()} cores). One shadow scoring of a "
            "routed request (probabilities and the divergence metric), demo "
            f"`{MODEL}` v1 live and v2 shadow.",
            "",
            *rows,
        ]
    )
    print(text)
    write_section("shadow", text)


if __name__ == "__main__":
    main()
