"""What the HTTP tests know of the real service they started: its URL, store and tokens.

Starting and stopping it (``choicecast serve`` under gunicorn on 127.0.0.1) is
:func:`tests.support.processes.start_service` and :meth:`~tests.support.processes.Running.stop`.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path


@dataclass(frozen=True)
class Server:
    url: str
    store: str
    score_token: str
    admin_token: str
    log: Path

    def headers(self, scope: str = "score") -> dict[str, str]:
        token = self.admin_token if scope == "admin" else self.score_token
        return {"Authorization": f"Bearer {token}"}
