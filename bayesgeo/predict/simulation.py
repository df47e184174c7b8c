"""Joint conditional simulations at the map's targets, and the simulated area above each threshold.

Point summaries (mean, quantiles, P(exceed) per cell) cannot say how large the area above an action
level may be: that needs joint draws of the whole map from the posterior predictive distribution.
:func:`simulate_targets` draws them per posterior draw and returns

* ``cells_above`` (threshold, sample, sim): the number of targets whose simulated value exceeds the
  threshold, per simulated field; with the map's polygons of P(exceed) >= level it gives the posterior
  probability that the true area above the threshold is larger than the polygon
  (:func:`bayesgeo.predict.gis_export.exceedance_polygons`);
* ``simulation`` (sample, sim, <target dims>): the fields themselves, when asked for (``keep_fields``,
  ``map --simulate N``; at most a few thousand targets, as they are stored).

Two methods, by what is asked:

* kept fields of a dense fit: the exact joint conditional Gaussian per draw (Cholesky of the M x M
  conditional covariance; :func:`bayesgeo.gp.joint.conditional_simulations`);
* otherwise (a nearest-neighbour fit, or only the area counts, on grids of any size): conditioning by
  kriging (:func:`bayesgeo.gp.joint.kriged_simulations`): an unconditional nearest-neighbour draw at the
  data and targets, corrected by the fit's own kriging, so every cell has the map's mean and variance.

Under ``transform="log"`` the fields are simulated on the log scale and exponentiated into data units
(a threshold T is compared on the log scale with log T). Draw d uses its own random stream from ``seed``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import xarray as xr

from bayesgeo.common.validate import check_positive_int
from bayesgeo.gp.joint import (
    SIMULATION_NEIGHBOURS,
    conditional_simulations,
    kriged_simulations,
)
from bayesgeo.gp.kriging import KrigingBasis
from bayesgeo.predict.prediction import _flat_xy, target_design

__all__ = ["simulate_targets", "simulation_method"]


def simulation_method(basis: KrigingBasis, keep_fields: bool) -> str:
    """``"exact"`` for kept fields of a dense fit, else ``"nearest-neighbour"`` (module docstring)."""
    return "exact" if keep_fields and basis.chol else "nearest-neighbour"


def _above(fields: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """(T, S): per threshold, the targets of each simulated field above it (model scale)."""
    return np.stack([(fields > t).sum(axis=1) for t in levels]) if levels.size else np.empty((0, fields.shape[0]))


def simulate_targets(basis: KrigingBasis, targets: xr.Dataset, *, n_sim: int, seed: int, include_nugget: bool = True,
                     design_attrs: dict | None = None, units: str = "", thresholds: Sequence[float] = (),
                     keep_fields: bool = True, progress: Callable | None = None) -> xr.Dataset:
    """Joint conditional simulations at the targets, ``n_sim`` per posterior draw (module docstring).

    Parameters
    ----------
    basis : KrigingBasis
        The fit's data and posterior draws (:func:`bayesgeo.predict.prediction.basis_from_fit`).
    targets : xarray.Dataset
        A grid or target points (:mod:`bayesgeo.data.targets`); masked targets are left out.
    n_sim, seed :
        Simulations per draw; the seed of the draws' random streams.
    include_nugget : bool
        Simulate new measurements (field + nugget, the map's default) or the field.
    design_attrs, units :
        The fit's trend design attributes and value units.
    thresholds : sequence of float
        Levels (data units) whose exceeding targets are counted per simulated field.
    keep_fields : bool
        Return the fields (``simulation``) besides the counts.
    progress : callable, optional
        Called with the number of draws finished.

    Returns
    -------
    xarray.Dataset
        ``cells_above`` (threshold, sample, sim) and, with ``keep_fields``, ``simulation`` (sample, sim,
        <target dims>; masked targets NaN); attrs ``simulation_method``, ``simulations_per_draw``, ``seed``.
    """
    n_sim = check_positive_int(n_sim, "simulate")
    xy = _flat_xy(targets)
    design = target_design(targets, design_attrs, basis.design.shape[1])
    inside = np.asarray(targets["inside"].values, bool).ravel()
    idx = np.flatnonzero(inside)
    thr = np.asarray([float(t) for t in thresholds])
    if basis.transform == "log":
        with np.errstate(divide="ignore"):
            levels = np.where(thr > 0, np.log(np.where(thr > 0, thr, 1.0)), -np.inf)
    else:
        levels = thr
    method = simulation_method(basis, keep_fields)
    kw = dict(n_sim=n_sim, seed=seed, include_nugget=include_nugget)
    fields = None
    if method == "exact":
        fields = conditional_simulations(basis, xy[idx], design[idx], **kw)
        if progress is not None:
            progress(basis.n_draws)
    elif keep_fields:
        fields = kriged_simulations(basis, xy[idx], design[idx], progress=progress, **kw)
    if fields is None:  # only the counts: no field of a large grid is kept
        counts = kriged_simulations(basis, xy[idx], design[idx], reduce=lambda f: _above(f, levels),
                                    progress=progress, **kw)
    else:
        counts = np.stack([_above(f, levels) for f in fields]) if len(fields) else np.empty((0, thr.size, n_sim))
    what = "new measurement" if include_nugget else "field"
    how = ("exact joint conditional Gaussian per draw" if method == "exact" else
           f"conditioning by kriging of nearest-neighbour unconditional draws (m = {SIMULATION_NEIGHBOURS})")
    ds = xr.Dataset(
        {"cells_above": (("threshold", "sample", "sim"), np.moveaxis(counts, 1, 0).astype(np.int64),
                         {"long_name": f"targets where the simulated {what} exceeds the threshold", "units": "1"})},
        coords={"threshold": thr, "sample": np.arange(basis.n_draws), "sim": np.arange(n_sim)},
        attrs={"simulation_method": how, "simulations_per_draw": n_sim, "seed": int(seed)})
    if keep_fields:
        out = np.full((basis.n_draws, n_sim, inside.size), np.nan)
        out[:, :, idx] = np.exp(fields) if basis.transform == "log" else fields
        dims = ("y", "x") if targets.attrs.get("kind") == "grid" else ("target",)
        ds["simulation"] = xr.DataArray(
            out.reshape(basis.n_draws, n_sim, *targets["inside"].shape), dims=("sample", "sim", *dims),
            coords={k: targets.coords[k] for k in targets.coords},
            attrs={"units": units, "long_name": f"joint conditional simulation of the {what}",
                   "method": how, "seed": int(seed)})
    return ds
