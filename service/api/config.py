"""Service settings, read once from the environment (or a mapping given to the app factory).

Every setting has an environment variable ``CHOICECAST_<NAME>``; docs/api.md lists them all.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

ENV_PREFIX = "CHOICECAST_"


class ConfigError(ValueError):
    """A setting that cannot be used; the message names the variable."""


@dataclass(frozen=True)
class Settings:
    store: str | None = None
    """Store URI: a path, ``file://...`` or ``s3://bucket/prefix``."""
    s3_endpoint: str | None = None
    poll_seconds: float = 5.0
    """Interval between routing polls of the store; 0 disables the poller thread."""
    tokens_file: str | None = None
    score_tokens: tuple[str, ...] = ()
    admin_tokens: tuple[str, ...] = ()
    max_body_bytes: int = 256 * 1024 * 1024
    max_situations: int = 200_000
    max_work: int = 12_000_000
    """Most work units one scoring request may cause (:func:`scoring_flow.work_units`); about
    35 bytes of a worker's memory each for Arrow, more for JSON (weighted)."""
    log_level: str = "INFO"
    access_log: bool = True
    shadow: bool = True
    """Score the shadow version after each routed request (its divergence goes to metrics)."""


_FIELDS: dict[str, type] = {
    "store": str,
    "s3_endpoint": str,
    "poll_seconds": float,
    "tokens_file": str,
    "score_tokens": tuple,
    "admin_tokens": tuple,
    "max_body_bytes": int,
    "max_situations": int,
    "max_work": int,
    "log_level": str,
    "access_log": bool,
    "shadow": bool,
}


_OPTIONAL = frozenset(name for name, value in vars(Settings()).items() if value is None)
"""Settings whose absence (None) means something: no store URI given, no endpoint, no file."""


def _convert(name: str, kind: type, raw: Any) -> Any:
    var = ENV_PREFIX + name.upper()
    if not isinstance(raw, str):
        if kind is tuple:
            return tuple(raw)
        if kind in (int, float) and not isinstance(raw, bool):
            raw = repr(raw)  # checked below as the same text in a variable would be
        else:
            return kind(raw)
    text = raw.strip()
    try:
        if kind is bool:
            if text.lower() in ("1", "true", "yes", "on"):
                return True
            if text.lower() in ("0", "false", "no", "off", ""):
                return False
            raise ValueError(text)
        if kind is tuple:
            return tuple(t.strip() for t in text.split(",") if t.strip())
        if kind is int:
            value = int(text)
            if value <= 0:
                raise ValueError(text)
            return value
        if kind is float:
            value = float(text)
            if not value >= 0 or value == float("inf"):
                raise ValueError(text)
            return value
    except ValueError:
        raise ConfigError(f"{var}: cannot use {text!r} as {kind.__name__}") from None
    return text or None


def load_settings(
    overrides: Mapping[str, Any] | None = None, environ: Mapping[str, str] | None = None
) -> Settings:
    """Settings from ``CHOICECAST_*`` variables of ``environ`` (default: this process's),
    then ``overrides`` (keys as field names)."""
    environ = os.environ if environ is None else environ
    values: dict[str, Any] = {}
    for name, kind in _FIELDS.items():
        raw = environ.get(ENV_PREFIX + name.upper())
        if raw is not None:
            values[name] = _convert(name, kind, raw)
    for name, raw in (overrides or {}).items():
        key = name.lower().removeprefix(ENV_PREFIX.lower())
        if key not in _FIELDS:
            raise ConfigError(f"unknown setting {name!r}")
        if raw is None and key not in _OPTIONAL:
            raise ConfigError(f"setting {name!r} cannot be None (leave it out for the default)")
        values[key] = _convert(key, _FIELDS[key], raw) if raw is not None else None
    return Settings(**values)
