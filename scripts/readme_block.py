"""Rewrite one bench's block of README.md, between its begin and end markers."""

from __future__ import annotations

from pathlib import Path


def update_readme(path: Path, block: str, begin: str, end: str) -> str | None:
    """Replace the text from ``begin`` to ``end`` (both markers included) with ``block``, which
    carries the markers itself; an error message, or None when done."""
    text = path.read_text()
    i, j = text.find(begin), text.find(end)
    if i < 0 or j < i:
        return f"{path}: the bench's markers are missing; add them to its section first"
    path.write_text(text[:i] + block + text[j + len(end) :])
    return None
