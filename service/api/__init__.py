"""The HTTP shell: app factory, schemas, codecs, problem details, auth, metrics.

    from service.api import create_app
    app = create_app({"store": "/path/to/store"})

``create_app`` is imported on first use: ``service.api.server`` must be importable without
loading the metrics (prometheus_client reads PROMETHEUS_MULTIPROC_DIR when they are created,
and ``server.run`` sets it up first).
"""

from typing import Any

__all__ = ["create_app"]


def __getattr__(name: str) -> Any:
    if name == "create_app":
        from service.api.app import create_app

        return create_app
    raise AttributeError(name)
