"""Write one section of docs/benchmarks.md between its markers, leaving the rest alone."""

from __future__ import annotations

from pathlib import Path

DOC = Path(__file__).resolve().parents[1] / "docs" / "benchmarks.md"


def write_section(name: str, body: str, doc: Path = DOC) -> None:
    """Replace the text between ``<!-- name:begin -->`` and ``<!-- name:end -->``."""
    begin, end = f"<!-- {name}:begin -->", f"<!-- {name}:end -->"
    text = doc.read_text() if doc.exists() else "# Benchmarks\n"
    if begin in text and end in text:
        head, rest = text.split(begin, 1)
        _, tail = rest.split(end, 1)
    else:
        head, tail = text.rstrip("\n") + "\n\n", "\n"
    doc.write_text(f"{head}{begin}\n{body.strip()}\n{end}{tail}")
