"""Shared by the benchmark scripts: print a section and append it to bench/RESULTS.md."""

from __future__ import annotations

from pathlib import Path

RESULTS = Path(__file__).resolve().parent / "RESULTS.md"


def publish(text: str, *, write: bool = True) -> None:
    """Print ``text`` and, when ``write``, append it (plus a newline) to bench/RESULTS.md."""
    print(text)
    if write:
        with open(RESULTS, "a") as fh:
            fh.write(text + "\n")
