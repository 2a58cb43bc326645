"""Bearer tokens with two scopes, ``score`` and ``admin``.

Tokens come from ``CHOICECAST_SCORE_TOKENS`` / ``CHOICECAST_ADMIN_TOKENS`` (comma separated)
and/or a JSON file named by ``CHOICECAST_TOKENS_FILE``: ``{"score": [...], "admin": [...]}``.
An admin token also grants ``score``.  Comparison is constant time (``hmac.compare_digest``).

Rules: with no token configured at all, scoring is open; admin endpoints need an admin token,
so they are refused (403) until one is configured.  Tokens are never logged.
"""

from __future__ import annotations

import hmac
import json
from dataclasses import dataclass
from pathlib import Path

from flask import request

from .config import ConfigError, Settings
from .problems import ApiError

SCOPES = ("score", "admin")


@dataclass(frozen=True)
class Tokens:
    score: tuple[bytes, ...] = ()
    admin: tuple[bytes, ...] = ()

    @property
    def any(self) -> bool:
        return bool(self.score or self.admin)

    def scopes_of(self, presented: str) -> frozenset[str]:
        """Scopes granted to a presented token (every candidate compared, constant time)."""
        raw = presented.encode("utf-8", "surrogateescape")
        is_admin = False
        for token in self.admin:
            is_admin |= hmac.compare_digest(raw, token)
        is_score = is_admin
        for token in self.score:
            is_score |= hmac.compare_digest(raw, token)
        return frozenset(s for s, ok in (("admin", is_admin), ("score", is_score)) if ok)


def load_tokens(settings: Settings) -> Tokens:
    score = list(settings.score_tokens)
    admin = list(settings.admin_tokens)
    if settings.tokens_file:
        path = Path(settings.tokens_file)
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise ConfigError(f"CHOICECAST_TOKENS_FILE: cannot read {path}: {exc}") from None
        if not isinstance(data, dict) or set(data) - set(SCOPES):
            raise ConfigError(
                'CHOICECAST_TOKENS_FILE: expected {"score": [...], "admin": [...]} (JSON)'
            )
        for scope, target in (("score", score), ("admin", admin)):
            items = data.get(scope, [])
            if not isinstance(items, list) or not all(isinstance(t, str) and t for t in items):
                raise ConfigError(f"CHOICECAST_TOKENS_FILE: {scope} must be a list of strings")
            target.extend(items)
    for token in score + admin:
        if len(token) < 16:
            raise ConfigError("tokens must be at least 16 characters long")
    return Tokens(score=tuple(t.encode() for t in score), admin=tuple(t.encode() for t in admin))


def _presented() -> str | None:
    header = request.headers.get("Authorization", "")
    scheme, _, value = header.partition(" ")
    if scheme.lower() != "bearer" or not value.strip():
        return None
    return value.strip()


def require(tokens: Tokens, scope: str) -> None:
    """Raise a 401/403 problem unless the request carries a token granting ``scope``."""
    if scope == "score" and not tokens.any:
        return
    if scope == "admin" and not tokens.admin:
        raise ApiError(
            403,
            "forbidden",
            "Forbidden",
            "admin endpoints are disabled: no admin token is configured",
        )
    presented = _presented()
    if presented is None:
        raise ApiError(
            401,
            "unauthorized",
            "Unauthorized",
            f"this endpoint needs a bearer token with scope {scope!r}",
            headers={"WWW-Authenticate": f'Bearer realm="choicecast", scope="{scope}"'},
        )
    if scope not in tokens.scopes_of(presented):
        raise ApiError(403, "forbidden", "Forbidden", f"the token does not grant scope {scope!r}")
