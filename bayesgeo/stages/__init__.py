"""Stage functions: the work of each command, shared by the command line and study runs.

Each function takes keyword arguments (library names; errors name them, and the command line maps
them to its options), writes its outputs into the fit or run folder atomically, and returns
``(status, result)``: the exit status (0, or 3 when a fit failed its convergence check) and the
JSON-able result that ``--json`` prints. The command modules in :mod:`bayesgeo.cli` parse, call one
of these and print; :func:`bayesgeo.study.runner.run_study` calls them directly.
"""

from __future__ import annotations

__all__ = ["check_fit", "check_variogram", "map_fit", "compare_folders"]

_WHERE = {"check_fit": "bayesgeo.stages.check", "check_variogram": "bayesgeo.stages.vgcheck",
          "map_fit": "bayesgeo.stages.maps", "compare_folders": "bayesgeo.stages.compare"}


def __getattr__(name):  # loaded on first use: a command imports only its own stage
    if name in _WHERE:
        import importlib

        return getattr(importlib.import_module(_WHERE[name]), name)
    raise AttributeError(f"module 'bayesgeo.stages' has no attribute {name!r}")
