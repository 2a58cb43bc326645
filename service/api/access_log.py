"""Request ids, one JSON access-log line per request, and the request metrics.

``X-Request-ID`` is honoured when it is 1-128 characters of ``[A-Za-z0-9._:-]``; otherwise a
new id is generated.  The id is echoed in the response header and every problem document.
Log lines never contain tokens or request bodies.
"""

from __future__ import annotations

import json
import logging
import os
import re
import sys
import time

from flask import Flask, Response, g, request

from service.choice.spec import NAME_PATTERN

from . import metrics

REQUEST_ID = re.compile(r"^[A-Za-z0-9._:-]{1,128}$")
access = logging.getLogger("choicecast.access")


def new_request_id() -> str:
    """32 random hex digits (unpredictable, so they say nothing of a worker's traffic)."""
    return os.urandom(16).hex()


_LINE = json.JSONEncoder(separators=(",", ":"), default=str)


class JsonFormatter(logging.Formatter):
    """Access records are already dicts; other records become {ts, level, logger, message}."""

    def format(self, record: logging.LogRecord) -> str:
        if isinstance(record.msg, dict):
            return _LINE.encode(record.msg)
        entry = {
            "ts": round(record.created, 3),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        if record.exc_info:
            entry["exception"] = self.formatException(record.exc_info)
        return json.dumps(entry, separators=(",", ":"))


class StdoutHandler(logging.StreamHandler):
    """Writes to whatever ``sys.stdout`` is at the time (one JSON object per line)."""

    @property  # type: ignore[override]
    def stream(self):
        return sys.stdout

    @stream.setter
    def stream(self, value) -> None:
        pass


def configure_logging(level: str) -> None:
    root = logging.getLogger("choicecast")
    if not any(getattr(h, "_choicecast", False) for h in root.handlers):
        handler = StdoutHandler()
        handler.setFormatter(JsonFormatter())
        handler._choicecast = True  # type: ignore[attr-defined]
        root.addHandler(handler)
        root.propagate = False
    root.setLevel(level.upper())


def install(app: Flask, log_requests: bool) -> None:
    @app.before_request
    def _start() -> None:
        ctx = g._get_current_object()  # type: ignore[attr-defined]
        ctx.started = time.perf_counter()
        offered = request.environ.get("HTTP_X_REQUEST_ID", "")  # the header, unparsed
        ctx.request_id = offered if REQUEST_ID.match(offered) else new_request_id()

    @app.after_request
    def _finish(response: Response) -> Response:
        # Plain objects once: every proxied lookup of ``g``/``request`` costs a context lookup.
        ctx = g._get_current_object().__dict__  # type: ignore[attr-defined]
        req = request._get_current_object()  # type: ignore[attr-defined]
        elapsed = time.perf_counter() - ctx.get("started", time.perf_counter())
        request_id = ctx.get("request_id") or new_request_id()
        response.headers["X-Request-ID"] = request_id
        rule = req.url_rule
        route = rule.rule if rule is not None else "unmatched"
        status = response.status_code
        # Metric labels and the version header only ever name a known model and a version
        # that was found: names from the path are the caller's, and each new label value is
        # a new time series (unbounded cardinality) or a header a response cannot carry.
        model = ctx.get("model", "")
        if model and model not in app.extensions["choicecast.registry"].known_models():
            model = ""
        version = ctx.get("version", "") if model and status != 404 else ""
        if (
            version
            and "X-Model-Version" not in response.headers
            and NAME_PATTERN.fullmatch(version)
        ):
            # A refusal after routing still says which version judged the input.
            response.headers["X-Model-Version"] = version
        metrics.child(metrics.REQUESTS, model, version, route, str(status)).inc()
        metrics.child(metrics.LATENCY, route).observe(elapsed)
        if status in (400, 413, 415, 422):
            metrics.child(metrics.VALIDATION_FAILURES, model, str(status)).inc()
        if log_requests:
            entry = {
                "ts": round(time.time(), 3),
                "type": "access",
                "request_id": request_id,
                "method": req.method,
                "path": req.path,
                "route": route,
                "status": status,
                "duration_ms": round(elapsed * 1000, 3),
                "bytes_in": req.content_length or 0,
                "bytes_out": response.content_length or 0,
                "remote": req.remote_addr,
                "pid": os.getpid(),
            }
            for key in ("model", "version", "decision", "generation", "situations", "problem"):
                value = ctx.get(key)
                if value is not None:
                    entry[key] = value
            write_access_line(entry)
        return response


def write_access_line(entry: dict) -> None:
    """The request's JSON line on ``sys.stdout``, when the ``choicecast`` logger passes INFO.
    Written directly rather than through a LogRecord: the record, the caller lookup and the
    handler chain would cost more than the rest of the line.  One ``write`` of a whole line
    (lines of concurrent threads never interleave), flushed as the log handler would be; like
    the log handler, a failing stdout never fails the request."""
    if access.isEnabledFor(logging.INFO):
        try:
            out = sys.stdout
            out.write(_LINE.encode(entry) + "\n")
            out.flush()
        except (OSError, ValueError, AttributeError):
            pass  # a closed, full or missing stdout loses the line, never the answer
