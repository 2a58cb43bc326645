"""Errors of scoring that the caller can fix (the shell maps them to 422)."""

from __future__ import annotations

from collections.abc import Sequence

from service.choice.spec import Problem


class ScoringError(ValueError):
    """A request that parses but cannot be scored; ``.problems`` locate each cause."""

    def __init__(self, problems: Sequence[Problem]):
        self.problems = tuple(problems)
        super().__init__("; ".join(f"{p.path}: {p.message}" for p in self.problems))
