"""Accessors for the per-app objects the views use (settings, tokens, registry)."""

from __future__ import annotations

from flask import current_app

from .auth import Tokens
from .config import Settings
from .registry import Registry


def settings() -> Settings:
    return current_app.extensions["choicecast.settings"]


def tokens() -> Tokens:
    return current_app.extensions["choicecast.tokens"]


def registry() -> Registry:
    return current_app.extensions["choicecast.registry"]
