"""Helpers for command-line refusal tests: exit status 2, one stderr line, inputs untouched."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest

from bayesgeo.cli import EXIT_INPUT, main


def snapshot(*paths) -> dict:
    """SHA-256 of every file under ``paths`` (files or folders), to show inputs were not touched."""
    out = {}
    for p in map(Path, paths):
        files = [p] if p.is_file() else sorted(q for q in p.rglob("*") if q.is_file())
        for f in files:
            out[str(f)] = hashlib.sha256(f.read_bytes()).hexdigest()
    return out


def assert_refused(capsys, argv, command: str, pattern: str, *, inputs=(), absent=()) -> str:
    """Run ``bayesgeo argv``: exit status 2, exactly one stderr line ``bayesgeo <command>: error: ...``
    matching ``pattern``, nothing on stdout, the ``inputs`` unchanged and the ``absent`` paths not created.
    Returns the stderr line."""
    import re

    before = snapshot(*inputs)
    capsys.readouterr()
    try:
        code = main(list(map(str, argv)))
    except SystemExit as stop:  # argparse refusals end through parser.exit
        code = stop.code
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert code == EXIT_INPUT, (code, err)
    assert len(lines) == 1, err
    assert lines[0].startswith(f"bayesgeo {command}: error: "), lines[0]
    assert re.search(pattern, lines[0]), (pattern, lines[0])
    assert "Traceback" not in err and out == ""
    assert snapshot(*inputs) == before
    for p in absent:
        assert not Path(p).exists(), p
    return lines[0]


__all__ = ["snapshot", "assert_refused", "pytest"]
