"""The service with its scoring view stopped after one step, for benchmarks/request_stages.py.

``CHOICECAST_BENCH_STAGE`` names the last step that runs (a key of :data:`NEXT_CALL`, or
``full``).  The view's next call is replaced by one that stops the request, and the stop is
answered with a constant 200 JSON body, so every stage pays the same for stopping and the
difference between two stages is the work of the step between them.  Nothing else changes:
the same app factory, hooks, metrics and access log.
"""

from __future__ import annotations

import os
from typing import Any

from flask import Response

from service.api.app import create_app
from service.api.views import scoring

NEXT_CALL = {
    "hooks, request metrics and access line": "parse_score_request",
    "parse (body, JSON, envelope schema)": "choose",
    "routing and version lookup": "decode",
    "decode": "run_score",
    "check and score": "encode_rows",
    "encode the answer": "dumps",
}
"""Stage -> the name, in the scoring view's module, of the call that follows it."""


class Stop(Exception):
    """Raised in place of the next step."""


def _stop(*args: Any, **kwargs: Any) -> Any:
    raise Stop


stage = os.environ.get("CHOICECAST_BENCH_STAGE", "full")
if stage != "full":
    setattr(scoring, NEXT_CALL[stage], _stop)

app = create_app()
app.register_error_handler(Stop, lambda _: Response(b'{"ok":true}', mimetype="application/json"))
