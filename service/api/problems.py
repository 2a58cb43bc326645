"""Problem details (RFC 9457) for every error the service returns.

A problem document is ``application/problem+json`` with ``type``, ``title``, ``status``,
``detail`` and ``instance`` (the request path), plus ``errors``: a list of
``{"path": <JSON path of the offending field>, "message": ...}`` and the ``request_id``.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from flask import Flask, Response, g, request
from marshmallow import ValidationError
from werkzeug.exceptions import HTTPException

PROBLEM_MEDIA_TYPE = "application/problem+json"
TYPE_BASE = "urn:choicecast:problem:"

log = logging.getLogger("choicecast.errors")


@dataclass(frozen=True)
class FieldError:
    path: str
    message: str

    def as_dict(self) -> dict[str, str]:
        return {"path": self.path, "message": self.message}


@dataclass
class ApiError(Exception):
    """An error the caller can act on; rendered as a problem document."""

    status: int
    slug: str
    title: str
    detail: str
    errors: Sequence[FieldError] = field(default_factory=tuple)
    headers: dict[str, str] = field(default_factory=dict)

    def __str__(self) -> str:
        return f"{self.status} {self.title}: {self.detail}"


def bad_request(detail: str, errors: Iterable[FieldError] = ()) -> ApiError:
    return ApiError(400, "invalid-request", "Invalid request", detail, tuple(errors))


def not_found(detail: str) -> ApiError:
    return ApiError(404, "not-found", "Not found", detail)


def too_large(detail: str, errors: Iterable[FieldError] = ()) -> ApiError:
    return ApiError(413, "too-large", "Request too large", detail, tuple(errors))


def unsupported_media_type(detail: str) -> ApiError:
    return ApiError(415, "unsupported-media-type", "Unsupported media type", detail)


def unprocessable(detail: str, errors: Iterable[FieldError] = ()) -> ApiError:
    return ApiError(422, "cannot-score", "Input cannot be scored", detail, tuple(errors))


def unavailable(detail: str) -> ApiError:
    return ApiError(503, "unavailable", "Service unavailable", detail)


def marshmallow_errors(messages: object, root: str = "$") -> list[FieldError]:
    """Flatten marshmallow's nested error messages into JSON paths (``$.a.b[3].c``)."""
    out: list[FieldError] = []

    def walk(node: object, path: str, under_key: bool = False) -> None:
        if isinstance(node, dict):
            # A Dict field reports {key: {"key": [...], "value": ...}}: the entry's own path.
            if under_key and node and set(node) <= {"key", "value"}:
                for part in ("key", "value"):
                    if part in node:
                        walk(node[part], path)
                return
            for key, value in node.items():
                if isinstance(key, int):
                    walk(value, f"{path}[{key}]")
                elif key == "_schema":
                    walk(value, path)
                else:
                    walk(value, f"{path}.{key}", True)
        elif isinstance(node, list) and node and all(isinstance(m, str) for m in node):
            out.extend(FieldError(path, m) for m in node)
        elif isinstance(node, list):
            for item in node:
                walk(item, path)
        else:
            out.append(FieldError(path, str(node)))

    walk(messages, root)
    return out


def problem_response(
    status: int,
    slug: str,
    title: str,
    detail: str,
    errors: Sequence[FieldError] = (),
    headers: dict[str, str] | None = None,
) -> Response:
    body = {
        "type": TYPE_BASE + slug,
        "title": title,
        "status": status,
        "detail": detail,
        "instance": request.path if request else None,
        "errors": [e.as_dict() for e in errors],
        "request_id": g.get("request_id"),
    }
    response = Response(
        json.dumps(body, allow_nan=False), status=status, mimetype=PROBLEM_MEDIA_TYPE
    )
    for key, value in (headers or {}).items():
        response.headers[key] = value
    g.problem = slug
    return response


def register_handlers(app: Flask) -> None:
    """Map every exception to a problem document; nothing ever leaks a traceback."""

    @app.errorhandler(ApiError)
    def _api_error(exc: ApiError) -> Response:
        return problem_response(
            exc.status, exc.slug, exc.title, exc.detail, exc.errors, exc.headers
        )

    @app.errorhandler(ValidationError)
    def _validation_error(exc: ValidationError) -> Response:
        return problem_response(
            400,
            "invalid-request",
            "Invalid request",
            "the request body does not match the schema",
            marshmallow_errors(exc.messages),
        )

    @app.errorhandler(HTTPException)
    def _http_error(exc: HTTPException) -> Response:
        status = exc.code or 500
        slug = {
            400: "invalid-request",
            404: "not-found",
            405: "method-not-allowed",
            413: "too-large",
            415: "unsupported-media-type",
        }.get(status, "http-error")
        headers = {}
        if status == 405 and getattr(exc, "valid_methods", None):
            headers["Allow"] = ", ".join(exc.valid_methods)  # type: ignore[attr-defined]
        detail = exc.description or exc.name
        if status == 413:
            detail = "the request body is larger than the configured limit (max_body_bytes)"
        return problem_response(status, slug, exc.name, detail, (), headers)

    @app.errorhandler(Exception)
    def _unexpected(exc: Exception) -> Response:
        log.exception("unexpected error on %s %s", request.method, request.path)
        return problem_response(
            500,
            "internal",
            "Internal error",
            "an unexpected error occurred; the request id identifies it in the logs",
        )
