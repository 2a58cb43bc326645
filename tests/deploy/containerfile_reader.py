"""A small reader for deploy/Containerfile: instructions with their continuation lines joined."""

from __future__ import annotations

import json
import shlex
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
CONTAINERFILE = REPO / "deploy" / "Containerfile"


@dataclass(frozen=True)
class Instruction:
    """One instruction: its keyword (upper case), its argument text, and its build stage index."""

    keyword: str
    argument: str
    stage: int


def instructions(text: str) -> list[Instruction]:
    """Split a Containerfile into instructions (comments dropped, `\\` continuations joined)."""
    joined: list[str] = []
    buffer = ""
    for raw in text.splitlines():
        line = raw.strip()
        if not buffer and (not line or line.startswith("#")):
            continue
        if buffer and line.startswith("#"):
            continue
        if line.endswith("\\"):
            buffer += line[:-1] + " "
            continue
        joined.append(buffer + line)
        buffer = ""
    if buffer:
        joined.append(buffer)
    result: list[Instruction] = []
    stage = -1
    for line in joined:
        keyword, _, argument = line.partition(" ")
        keyword = keyword.upper()
        if keyword == "FROM":
            stage += 1
        result.append(Instruction(keyword, argument.strip(), stage))
    return result


def exec_form(argument: str) -> list[str]:
    """The JSON (exec) form of CMD/ENTRYPOINT/HEALTHCHECK CMD; raises if it is the shell form."""
    value = json.loads(argument)
    if not (isinstance(value, list) and all(isinstance(v, str) for v in value)):
        raise ValueError(f"not an exec-form array: {argument!r}")
    return value


def copy_sources(argument: str) -> tuple[list[str], dict[str, str]]:
    """COPY's source paths (all words but the last) and its --flag=value options."""
    words = shlex.split(argument)
    flags = {}
    while words and words[0].startswith("--"):
        name, _, value = words.pop(0)[2:].partition("=")
        flags[name] = value
    return words[:-1], flags


def healthcheck_command(argument: str) -> list[str]:
    """The exec-form command of `HEALTHCHECK [options] CMD [...]`."""
    _, marker, command = argument.partition("CMD ")
    if not marker:
        raise ValueError(f"HEALTHCHECK without CMD: {argument!r}")
    return exec_form(command)
