"""The Flask app factory."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from flask import Flask

from . import access_log, problems
from .auth import load_tokens
from .config import load_settings
from .registry import Registry


def _store_opener(store_uri: str | None, endpoint: str | None):
    def open_() -> Any:
        from model_store import open_store

        return open_store(store_uri, endpoint_url=endpoint)

    return open_


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """Build the service from ``CHOICECAST_*`` variables, overridden by ``config``.

    ``config`` keys are setting names (``store``, ``poll_seconds``, ...); docs/api.md lists them.
    The first routing snapshot is loaded here; the poller thread starts with the first request
    of each worker process (so it is started after gunicorn forks).
    """
    from service.choice import compile_model

    settings = load_settings(config)
    access_log.configure_logging(settings.log_level)
    app = Flask("choicecast")
    app.config["MAX_CONTENT_LENGTH"] = settings.max_body_bytes
    app.json.sort_keys = False  # type: ignore[attr-defined]
    app.extensions["choicecast.settings"] = settings
    app.extensions["choicecast.tokens"] = load_tokens(settings)
    registry = Registry(
        _store_opener(settings.store, settings.s3_endpoint),
        compile_model,
        settings.poll_seconds,
    )
    app.extensions["choicecast.registry"] = registry

    problems.register_handlers(app)
    access_log.install(app, settings.access_log)

    @app.before_request
    def _poller() -> None:
        registry.ensure_poller()

    from .views import admin, health, models, openapi, scenarios, scoring
    from .views import metrics as metrics_view

    for module in (health, metrics_view, openapi, models, scoring, scenarios, admin):
        app.register_blueprint(module.blueprint)

    registry.refresh()
    return app
