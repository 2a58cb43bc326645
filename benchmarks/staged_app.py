"""The service with its scoring view stopped before one call, for benchmarks/request_stages.py.

``CHOICECAST_BENCH_STOP_BEFORE`` names a call of the scoring view (a name in its module, e.g.
``choose``); it is replaced by one that stops the request, and the stop is answered with a
constant 200 JSON body.  Every stopped copy pays the same for stopping, so the difference
between two copies is the work between their stops.  Unset, the service is unchanged.  Nothing
else differs from ``choicecast serve``: the same app factory, hooks, metrics and access log.
"""

from __future__ import annotations

import os
from typing import Any

from flask import Response

from service.api.app import create_app
from service.api.views import scoring


class Stop(Exception):
    """Raised in place of the call the view would make next."""


def _stop(*args: Any, **kwargs: Any) -> Any:
    raise Stop


stop_before = os.environ.get("CHOICECAST_BENCH_STOP_BEFORE")
if stop_before:
    if not callable(getattr(scoring, stop_before, None)):
        raise SystemExit(f"the scoring view makes no call named {stop_before!r}")
    setattr(scoring, stop_before, _stop)

app = create_app()
app.register_error_handler(Stop, lambda _: Response(b'{"ok":true}', mimetype="application/json"))
