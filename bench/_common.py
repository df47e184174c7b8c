"""Shared by the benchmark scripts: the run's context line, and printing a section and appending it to
bench/RESULTS.md."""

from __future__ import annotations

import os
import platform
import sys
from pathlib import Path

RESULTS = Path(__file__).resolve().parent / "RESULTS.md"


def publish(text: str, *, write: bool = True) -> None:
    """Print ``text`` and, when ``write``, append it (plus a newline) to bench/RESULTS.md."""
    print(text)
    if write:
        with open(RESULTS, "a") as fh:
            fh.write(text + "\n")


def sampler_context(started=None, load0: float | None = None) -> str:
    """When, where and with what a sampling benchmark ran, for its RESULTS.md header.

    ``"<date> UTC, 1-minute load average <a> at the start and <b> at the end; <system> <machine>, <n> CPUs,
    OPENBLAS_NUM_THREADS=<v>; pymc <v>, nutpie <v>; `python bench/<script> <args>`"``; without ``started`` the
    part before the first semicolon is left out (the caller says where the times come from).
    """
    import nutpie
    import pymc

    when = (f"{started:%Y-%m-%d %H:%M} UTC, 1-minute load average {load0:.1f} at the start and "
            f"{os.getloadavg()[0]:.1f} at the end; " if started is not None else "")
    return (f"{when}{platform.system()} {platform.machine()}, {os.cpu_count()} CPUs, "
            f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}; pymc {pymc.__version__}, "
            f"nutpie {nutpie.__version__}; `python bench/{Path(sys.argv[0]).name} {' '.join(sys.argv[1:])}`")
