"""Run manifests: what went in, what software ran, and what came out, for a reviewer to re-run.

A manifest is a plain JSON object (``manifest.json`` in a run folder) holding the SHA-256 of every
input file, the study file's text, the versions of bayesgeo and its dependencies, the platform,
the seeds, the command line, the start and end times (UTC, ISO 8601) and the verdicts of every
stage. :func:`sha256_file` and :func:`file_table` also list the outputs, so a reviewer can check
that the files they hold are the files the run wrote.
"""

from __future__ import annotations

import importlib.metadata as md
import os
import platform
import sys
from collections.abc import Iterable, Mapping, Sequence
from datetime import datetime, timezone
from pathlib import Path

from bayesgeo.common.outputs import sha256_file

__all__ = ["DEPENDENCIES", "sha256_file", "file_table", "versions", "platform_info", "utc_now", "new_manifest",
           "MANIFEST_FILE"]

MANIFEST_FILE = "manifest.json"

#: Distributions whose versions every manifest records (missing ones are recorded as null).
DEPENDENCIES = ("bayesgeo", "numpy", "scipy", "pymc", "pytensor", "nutpie", "arviz", "arviz-base", "arviz-stats",
                "arviz-plots", "xarray", "numba", "netCDF4", "matplotlib", "dask", "pandas", "tqdm")


def file_table(root: str | Path, *, exclude: Iterable[str] = ()) -> dict[str, dict]:
    """``{relative path: {"sha256": ..., "bytes": ...}}`` of every file under ``root``, sorted."""
    root = Path(root)
    skip = set(exclude)
    out = {}
    for p in sorted(root.rglob("*")):
        rel = p.relative_to(root).as_posix()
        if p.is_file() and rel not in skip:
            out[rel] = {"sha256": sha256_file(p), "bytes": p.stat().st_size}
    return out


def versions(names: Sequence[str] = DEPENDENCIES) -> dict[str, str | None]:
    """Installed versions of ``names`` (distribution names) and of Python."""
    out: dict[str, str | None] = {"python": platform.python_version()}
    for name in names:
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            out[name] = None
    return out


def platform_info() -> dict[str, str | int | None]:
    """Operating system, machine, processor count and the BLAS thread settings that affect speed."""
    return {
        "system": platform.system(), "release": platform.release(), "machine": platform.machine(),
        "python_implementation": platform.python_implementation(), "cpu_count": os.cpu_count(),
        "OPENBLAS_NUM_THREADS": os.environ.get("OPENBLAS_NUM_THREADS"),
        "OMP_NUM_THREADS": os.environ.get("OMP_NUM_THREADS"),
    }


def utc_now() -> str:
    """The current time in UTC, ISO 8601 with seconds (e.g. ``2026-12-02T14:05:09Z``)."""
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def new_manifest(*, study_path: str | Path, study_text: str, settings: Mapping, inputs: Iterable[str | Path],
                 argv: Sequence[str] | None = None, started: str | None = None) -> dict:
    """A manifest with everything known before the run starts (outputs, verdicts and end time come later).

    Parameters
    ----------
    study_path, study_text
        The study file and its text (recorded verbatim).
    settings
        The resolved settings (:meth:`bayesgeo.study.settings.Study.to_dict`).
    inputs
        Input files: the study file, the data, target points, area polygons.
    argv
        The command line (default ``sys.argv``).
    started
        Start time (default now).
    """
    files = {}
    for p in inputs:
        p = Path(p)
        files[str(p)] = {"sha256": sha256_file(p), "bytes": p.stat().st_size}
    seeds = {"sampler": settings.get("sampler", {}).get("seed"), "explore": settings.get("explore", {}).get("seed"),
             "check": settings.get("check", {}).get("seed"), "prediction": settings.get("prediction", {}).get("seed")}
    return {
        "format": "bayesgeo run manifest", "format_version": 1,
        "study": {"path": str(study_path), "text": study_text}, "settings": dict(settings),
        "inputs": files, "seeds": seeds, "versions": versions(), "platform": platform_info(),
        "command_line": list(sys.argv if argv is None else argv), "started": started or utc_now(),
        "finished": None, "stages": [], "verdicts": {}, "outputs": {},
    }
