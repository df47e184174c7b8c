"""Sampler statistics read by the convergence check (:mod:`bayesgeo.convergence.diagnostics`): tree depth,
divergent transitions and where the divergent draws sit.

nutpie's names (``depth``, ``maxdepth_reached``) and PyMC's own (``tree_depth``,
``reached_max_treedepth``) are both read. Helpers of that module only, hence no public names.
"""

from __future__ import annotations

import json
from collections.abc import Sequence

import numpy as np
import xarray as xr

__all__ = []


_DEPTH_NAMES = ("depth", "tree_depth")
_SATURATION_NAMES = ("maxdepth_reached", "reached_max_treedepth")


def _first(ds: xr.Dataset | None, names: Sequence[str]) -> xr.DataArray | None:
    if ds is None:
        return None
    for n in names:
        if n in ds.data_vars:
            return ds[n].transpose("chain", "draw", ...)
    return None


def _max_depth(ds: xr.Dataset) -> int | None:
    """The sampler's maximum tree depth, if the attributes record it (nutpie writes its settings)."""
    for key in ("inference_library_settings", "sampler_settings"):
        raw = ds.attrs.get(key)
        if isinstance(raw, str):
            try:
                settings = json.loads(raw)
            except ValueError:
                continue
            found = _find_key(settings, ("maxdepth", "max_treedepth"))
            if found is not None:
                return int(found)
    for key in ("max_treedepth", "maxdepth"):
        if key in ds.attrs:
            return int(ds.attrs[key])
    return None


def _find_key(obj, keys):
    if isinstance(obj, dict):
        for k, v in obj.items():
            if k in keys and isinstance(v, (int, float)):
                return v
            found = _find_key(v, keys)
            if found is not None:
                return found
    return None


def _sample_stats(tree) -> xr.Dataset | None:
    if isinstance(tree, xr.DataTree) and "sample_stats" in tree.children:
        return tree["sample_stats"].to_dataset()
    return None


def _divergence_location(draws: xr.DataArray, div: np.ndarray) -> dict:
    """Where divergent draws sit: per parameter, their mean/quantiles against the others'."""
    x = np.asarray(draws.values, dtype=float)  # (parameter, chain, draw)
    if div.sum() == 0 or div.all():
        return {}
    out = {}
    for i, label in enumerate(draws["parameter"].values):
        a, b = x[i][div], x[i][~div]
        sd = np.nanstd(x[i], ddof=1)
        out[str(label)] = {
            "divergent_mean": float(np.mean(a)), "other_mean": float(np.mean(b)),
            "divergent_q05": float(np.quantile(a, 0.05)), "divergent_q95": float(np.quantile(a, 0.95)),
            "other_q05": float(np.quantile(b, 0.05)), "other_q95": float(np.quantile(b, 0.95)),
            "shift_sd": float((np.mean(a) - np.mean(b)) / sd) if sd > 0 else float("nan"),
        }
    return out
