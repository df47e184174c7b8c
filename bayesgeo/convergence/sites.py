"""Convergence of a several-site fit judged site by site: each site's parameters as a block of the check."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import xarray as xr

from bayesgeo.common.io import to_jsonable
from bayesgeo.convergence.autocorr import stack_parameters
from bayesgeo.convergence.diagnostics import Convergence, _num

__all__ = ["site_convergence", "SITE_NOTE"]


# --- per site of a several-site fit -------------------------------------------------------------

#: What the per-site blocks leave to the whole-posterior verdict.
SITE_NOTE = ("per-site blocks judge R-hat, ESS, stuck and non-finite draws of the parameters indexed by that site "
             "('population': parameters without a site index); divergences, E-BFMI and tree depth belong to the "
             "whole posterior and only enter the overall verdict, which is never better than the worst block")


def _site_of_rows(post: xr.Dataset, variables: Sequence[str], dim: str) -> dict[str, int]:
    """Parameter label -> position along ``dim`` (-1 for rows without it), labelled as stack_parameters does."""
    index = xr.DataArray(np.arange(post.sizes[dim], dtype=float), dims=dim, coords={dim: post[dim].values})
    probe = {}
    for v in variables:
        da = post[v].isel(chain=[0], draw=[0, 0, 0, 0])  # stack_parameters wants >= 4 draws
        probe[v] = (xr.broadcast(index, da)[0].transpose(*da.dims) if dim in da.dims
                    else xr.full_like(da, -1.0, dtype=float))
    rows = stack_parameters(xr.Dataset(probe), var_names=list(variables))
    return {str(p): int(rows.values[i, 0, 0]) for i, p in enumerate(rows["parameter"].values)}


def _problem_label(item: str) -> str:
    for kind in ("rhat", "ess_bulk", "ess_tail"):
        if item.startswith(kind + "[") and item.endswith("]"):
            return item[len(kind) + 1:-1]
    return item


def _block(conv: Convergence, labels: list[str]) -> dict:
    ps = conv.parameters
    where = np.flatnonzero(np.isin(ps["parameter"].values.astype(str), labels))
    wanted = set(labels)
    problems = [p for p in conv.problems if _problem_label(p["item"]) in wanted]
    levels = {p["level"] for p in problems}
    out: dict = {"verdict": "fail" if "fail" in levels else "warn" if "warn" in levels else "pass",
                 "parameters": len(labels)}
    assessed = where[np.asarray(ps["sd"].values[where] > 0) & np.isfinite(ps["rhat"].values[where])]
    for key, col, pick in (("worst_rhat", "rhat", np.argmax), ("min_ess_bulk", "ess_bulk", np.argmin),
                           ("min_ess_tail", "ess_tail", np.argmin)):
        if assessed.size:
            j = assessed[int(pick(ps[col].values[assessed]))]
            out[key], out[key + "_parameter"] = _num(ps[col].values[j]), str(ps["parameter"].values[j])
        else:
            out[key], out[key + "_parameter"] = None, None
    out["problems"] = [p["message"] for p in problems]
    return out


def site_convergence(tree, conv: Convergence, *, dim: str = "site") -> dict | None:
    """Per-site convergence blocks of a several-site fit, from an existing :func:`check_convergence`.

    Parameters
    ----------
    tree : xarray.DataTree or xarray.Dataset
        The fit (or its posterior) that ``conv`` was computed from.
    conv : Convergence
        Result of :func:`check_convergence` on ``tree``; nothing is recomputed.
    dim : str
        Name of the site dimension (``"site"`` in :mod:`bayesgeo.fitting.hierarchical` fits).

    Returns
    -------
    dict or None
        ``None`` when the posterior has no ``dim``. Otherwise ``{"sites": {label: block},
        "population": block or None, "note": str}``. Every parameter row of ``conv`` indexed by a
        site (``practical_range[north-yard]``, ``beta_z[north-yard, 1]``, ...) belongs to that
        site's block; the rows without a site index (hyperparameters, population summaries, shared
        values under complete pooling) form ``population`` (``None`` when there are none, as
        under independent pooling). A block holds ``verdict`` (the worst level of ``conv``'s
        problems on its rows, so the same thresholds: R-hat < 1.01 and bulk/tail ESS >= 400,
        Vehtari et al. 2021), ``parameters`` (rows), ``worst_rhat``, ``min_ess_bulk``,
        ``min_ess_tail`` (each with the ``..._parameter`` it comes from; constant rows are not
        assessed) and ``problems`` (messages). Sampler-level checks (divergences, E-BFMI, tree
        depth) stay with the whole posterior (:data:`SITE_NOTE`).
    """
    from bayesgeo.convergence.autocorr import _posterior_dataset

    post = _posterior_dataset(tree)
    if dim not in post.dims:
        return None
    variables = list(dict.fromkeys(str(v) for v in conv.parameters["variable"].values))
    site_of = _site_of_rows(post, variables, dim)
    sites = [str(s) for s in post[dim].values]
    groups: dict[int, list[str]] = {}
    for label, k in site_of.items():
        groups.setdefault(k, []).append(label)
    return to_jsonable({
        "sites": {s: _block(conv, groups.get(k, [])) for k, s in enumerate(sites)},
        "population": _block(conv, groups[-1]) if -1 in groups else None,
        "note": SITE_NOTE,
    })
