"""The short path from a fit to maps: posterior predictive summaries on a grid, gated on convergence.

::

    fit = bayesgeo.Fit.sample(points, seed=7)
    maps = bayesgeo.predict_map(fit, cell=10.0, thresholds=[20.0])   # mean, sd, quantiles, P(value > 20)
"""

from __future__ import annotations

from collections.abc import Sequence

import xarray as xr

from bayesgeo.common.validate import InputError
from bayesgeo.data import targets as tg
from bayesgeo.fitting.fitted import Fit, NotConvergedError, as_fit
from bayesgeo.predict.prediction import basis_from_fit, label_prediction, predict_targets

__all__ = ["predict_map"]


def predict_map(fit: Fit | xr.DataTree, targets: xr.Dataset | None = None, *, cell: float | None = None,
                margin: float = 0.0, hull: bool = False, thresholds: Sequence[float] = (), draws: int | None = 500,
                include_nugget: bool = True, allow_unconverged: bool = False, scheduler: str = "threads",
                progress=None) -> xr.Dataset:
    """Posterior predictive summaries of ``fit`` on a grid (default) or at ``targets``, gated on its
    convergence check.

    Parameters
    ----------
    fit : bayesgeo.Fit or xarray.DataTree
        A single-site fit, or one site of a several-site fit (``fit.site(name)``).
    targets : xarray.Dataset, optional
        From :func:`bayesgeo.data.targets.read_target_points` or :func:`bayesgeo.data.targets.grid_targets`.
        Default: a grid over the data's bounding box with side ``cell`` (distance units), widened
        by ``margin``, cells outside the data's convex hull left out when ``hull``.
    thresholds : sequence of float
        Levels (data units) whose exceedance probability is mapped.
    draws : int or None
        Posterior draws used (evenly spaced; None: all).
    include_nugget : bool
        Predict a new measurement (field + nugget) or the field.
    allow_unconverged : bool
        Predict from a fit that failed the convergence check, marked NOT CONVERGED.

    Returns
    -------
    xarray.Dataset
        :func:`bayesgeo.predict.prediction.predict_targets` output, with ``convergence_verdict`` and
        ``cautions`` (JSON) attributes, georeferenced as ``bayesgeo map`` writes it
        (:func:`bayesgeo.predict.cf.georeferenced`: CF coordinates, the fit's CRS, grids north-up).

    Raises
    ------
    NotConvergedError
        The fit failed the convergence check and ``allow_unconverged`` is False.
    InputError
        A several-site fit (predict one site: ``predict_map(fit.site(name), ...)``).
    """
    fit = as_fit(fit)
    if fit.several:
        raise InputError(f"fit: a several-site fit; predict one site, predict_map(fit.site(name), ...) "
                         f"(sites: {', '.join(fit.sites)})")
    verdict = fit.gate_verdict()
    if verdict == "fail" and not allow_unconverged:
        raise NotConvergedError("the posterior failed the convergence check (see fit.convergence); refit, or "
                                "pass allow_unconverged=True to predict anyway, marked NOT CONVERGED")
    basis, spec, _ = basis_from_fit(fit, draws=draws)
    if targets is None:
        targets = tg.grid_targets(basis.xy, cell=cell, margin=margin, hull=hull, metric=basis.metric)
    pred = predict_targets(basis, targets, thresholds=thresholds, include_nugget=include_nugget,
                           design_attrs=spec.design_attrs, scheduler=scheduler, units=spec.value_units,
                           progress=progress)
    label_prediction(pred, spec.transform, verdict)
    from bayesgeo.predict.cf import georeferenced_fit_map

    return georeferenced_fit_map(pred, fit)  # as bayesgeo map writes it: CF coordinates, the CRS, north-up

