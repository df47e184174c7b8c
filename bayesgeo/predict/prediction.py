"""Bayesian kriging maps, exceedance probabilities and area averages from a posterior.

The steps, each a function on explicit inputs (nothing is remembered between calls):

1. :func:`posterior_parameters`: posterior draws of the model (standardised scale, see
   :mod:`bayesgeo.fitting.model`) to data units, thinned to ``draws`` evenly spaced draws;
2. :func:`basis_from_fit`: from a fit (DataTree), the data covariance of every draw factorised
   once;
3. :func:`predict_targets`: per draw the Gaussian conditional mean and variance at every target (simple
   kriging given the draw's trend coefficients), combined over draws into predictive mean, sd,
   5/50/95% quantiles and P(Z > T) per threshold; targets are split into chunks of cells run as
   dask tasks, each chunk reducing over all draws;
4. :func:`area_average`: the predictive distribution of the average over a polygon.

The formulas are in :mod:`bayesgeo.gp.kriging` and ``docs/prediction.md``. Defaults:
``include_nugget=True`` (maps of what a new sample at a point would measure: field plus nugget),
scheduler ``"threads"`` (dask's local thread pool, one BLAS thread per task).
"""

from __future__ import annotations

import dataclasses
import json
import warnings
from collections.abc import Sequence

import numpy as np
import xarray as xr

from bayesgeo.gp.joint import block_moments, conditional_simulations, summarise_samples
from bayesgeo.gp.kriging import CAUTION, KrigingBasis, make_basis, mixture_summary
from bayesgeo.common.csvtable import InputWarning
from bayesgeo.data.targets import check_area_near_data, far_targets_warning
from bayesgeo.explore.trend import design_at, design_categories
from bayesgeo.gp.engines import engine, with_imputed
from bayesgeo.common.validate import InputError, check_positive_int

__all__ = [
    "CAUTION",
    "PROBS",
    "area_average",
    "basis_from_fit",
    "fit_data",
    "posterior_parameters",
    "prediction_cautions",
    "label_prediction",
    "predict_targets",
    "target_design",
]

#: Quantile levels reported in maps (variables q05, q50, q95).
PROBS = (0.05, 0.5, 0.95)
SCHEDULERS = ("threads", "synchronous")



def _pick(total: int, draws: int | None) -> np.ndarray:
    if draws is None or draws >= total:
        return np.arange(total)
    draws = check_positive_int(draws, "draws")
    return np.unique(np.round(np.linspace(0, total - 1, draws)).astype(int))


def posterior_parameters(posterior: xr.Dataset, spec, *, draws: int | None = None) -> xr.Dataset:
    """Posterior draws in data units, thinned to ``draws`` evenly spaced draws.

    Parameters
    ----------
    posterior : xarray.Dataset
        The ``posterior`` group: ``practical_range_z``, ``sd_z``, ``nugget_sd_z`` (when the model
        has a nugget) on ``(chain, draw)`` and ``beta_z`` on ``(chain, draw, term)``.
    spec : bayesgeo.fitting.model.FitSpec
        Standardisation constants of the fit.
    draws : int, optional
        Keep this many draws, evenly spaced over the chains concatenated (all by default).

    Returns
    -------
    xarray.Dataset
        Along ``sample`` (with ``chain`` and ``draw`` coordinates of the kept draws):
        ``practical_range`` and ``scale`` (distance units), ``partial_sill`` and ``nugget``
        (squared model units) and ``beta`` (sample, term) for the unstandardised design
        (intercept shifted by ``value_mean``).
    """
    missing = [v for v in ("practical_range_z", "sd_z", "beta_z") if v not in posterior]
    if missing:
        raise InputError(f"posterior: variables {', '.join(missing)} missing; not a bayesgeo single-site fit")
    st = posterior.stack(sample=("chain", "draw"))
    keep = _pick(st.sizes["sample"], draws)
    st = st.isel(sample=keep)
    prange = spec.practical_range_of(st["practical_range_z"].values)
    psill = spec.variance_of(st["sd_z"].values)
    nug = spec.variance_of(st["nugget_sd_z"].values) if "nugget_sd_z" in st else np.zeros_like(psill)
    beta = st["beta_z"].transpose("sample", ...).values * float(spec.value_sd)
    terms = list(spec.terms)
    if "1" not in terms:
        raise InputError("posterior: the trend has no intercept term '1'")
    beta[:, terms.index("1")] += float(spec.value_mean)
    units = spec.model_units
    coords = {"chain": ("sample", st["chain"].values), "draw": ("sample", st["draw"].values), "term": terms}
    dims = ("sample",)
    data = {
        "practical_range": (dims, prange, {"units": spec.distance_units}),
        "scale": (dims, prange / float(spec.range_factor), {"units": spec.distance_units}),
        "partial_sill": (dims, psill, {"units": f"({units})^2"}),
        "nugget": (dims, nug, {"units": f"({units})^2"}),
        "beta": (("sample", "term"), beta, {"units": units}),
    }
    if "anisotropy_angle" in st:  # a geometrically anisotropic fit (bayesgeo.gp.anisotropy)
        data["anisotropy_angle"] = (dims, st["anisotropy_angle"].values % 180.0, {"units": "degrees"})
        data["anisotropy_ratio"] = (dims, st["anisotropy_ratio"].values, {"units": "1"})
    if "censored_z" in st:  # non-detects imputed draw by draw (bayesgeo.fitting.model.censored_index)
        data["censored_value"] = (("sample", "censored"),
                                  spec.values_of(st["censored_z"].transpose("sample", ...).values), {"units": units})
    return xr.Dataset(
        data,
        coords=coords, attrs={"draws_total": int(posterior.sizes["chain"] * posterior.sizes["draw"])},
    )


def fit_data(tree: xr.DataTree, spec) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Data locations (n, 2), modelled values (n,) and trend design (n, p) stored with a fit.

    Reads the layout of :func:`bayesgeo.fitting.posterior.fit`: ``constant_data`` (``x``, ``y``,
    ``design``) and ``observed_data`` (``value`` as measured; logged here under the log transform).
    """
    try:
        const = tree["constant_data"].to_dataset()
        values = np.asarray(tree["observed_data"]["value"].values, dtype=float)
        xy = np.column_stack([const["x"].values, const["y"].values]).astype(float)
    except KeyError as err:
        raise InputError(f"the fit lacks {err} in its observed_data/constant_data groups: not a bayesgeo fit") from None
    z = np.log(values) if spec.transform == "log" else values
    if "design" in const and const["design"].shape == (len(values), len(spec.terms)):
        design = np.asarray(const["design"].values, dtype=float)
    else:
        covs = [np.asarray(const[c].values, float) for c in spec.covariates]
        design = design_at(xy, spec.design_attrs, np.column_stack(covs) if covs else None)
    return xy, z, design


def basis_from_fit(fit, *, draws: int | None = None):
    """Everything prediction needs from a fit, with each draw's data covariance factorised once.

    Parameters
    ----------
    fit : bayesgeo.fitting.fitted.Fit or xarray.DataTree
        A single-site fit (or one site's view, :meth:`bayesgeo.fitting.fitted.Fit.site`).
    draws : int, optional
        Use this many evenly spaced posterior draws (all by default).

    Returns
    -------
    basis : KrigingBasis
    spec : bayesgeo.fitting.model.FitSpec
    params : xarray.Dataset
        The draws used, in data units (:func:`posterior_parameters`).
    """
    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.fitting.fitted import Fit

    fit = fit if isinstance(fit, Fit) else Fit(fit)
    if fit.several:
        raise InputError(f"fit: a several-site fit; take one site first (fit.site(name); sites: {', '.join(fit.sites)})")
    spec = fit.spec
    xy, z, design = fit_data(fit.tree, spec)
    params = posterior_parameters(fit.posterior, spec, draws=draws)
    cov = get_covariance(spec.covariance, spec.nu if spec.covariance == "matern" else None)
    # A fit with the nearest-neighbour likelihood (large n) predicts by nearest-neighbour kriging too.
    neighbours = engine(spec.approx).predict_neighbours(spec.neighbours)
    if "censored_value" in params:  # condition on each draw's imputed non-detects
        z = with_imputed(z, np.asarray(fit.tree["observed_data"]["censored"].values, dtype=bool),
                         params["censored_value"].values)
    basis = make_basis(xy, z, design, covariance=cov, scale=params["scale"].values,
                       partial_sill=params["partial_sill"].values, nugget=params["nugget"].values,
                       beta=params["beta"].values, metric=spec.metric, transform=spec.transform,
                       neighbours=neighbours, anisotropy=np.column_stack([params["anisotropy_angle"].values,
                                                                          params["anisotropy_ratio"].values])
                       if "anisotropy_angle" in params else None)
    if fit.extracted_site is not None:
        basis = dataclasses.replace(basis, site=str(fit.extracted_site))
    return basis, spec, params


def prediction_cautions(transform: str | None, verdict: str) -> list[str]:
    """Cautions carried by every prediction: :data:`CAUTION`, the log-scale note under
    ``transform="log"``, and first a NOT CONVERGED line when the fit failed its convergence check."""
    out = [CAUTION]
    if transform == "log":
        out.append("Values were modelled on the log scale; means and sds are of the back-transformed "
                   "(log-normal) predictive distribution in data units.")
    if verdict == "fail":
        out.insert(0, "NOT CONVERGED: the posterior failed the convergence check; these results are not "
                      "fit for any decision.")
    return out


def label_prediction(pred: xr.Dataset, transform: str | None, verdict: str) -> list[str]:
    """Mark ``pred`` with its fit's convergence verdict and cautions (:func:`prediction_cautions`, as JSON);
    a failed fit's title and ``convergence_status`` say NOT CONVERGED. Returns the cautions."""
    cautions = prediction_cautions(transform, verdict)
    pred.attrs.update(convergence_verdict=verdict, cautions=json.dumps(cautions))
    if verdict == "fail":
        pred.attrs["title"] = "NOT CONVERGED: " + pred.attrs.get("title", "")
        pred.attrs["convergence_status"] = "NOT CONVERGED"
    return cautions


def target_design(targets: xr.Dataset, design_attrs: dict | None, p: int) -> np.ndarray:
    """Trend design at every target cell (flattened), from the design attributes of the fit.

    Without ``design_attrs`` the trend must be a constant (p = 1, a column of ones) or absent.
    """
    xy = _flat_xy(targets)
    if design_attrs is None:
        if p > 1:
            raise ValueError("design_attrs are needed for a trend with more than one term")
        return np.ones((len(xy), p))
    names = design_attrs.get("covariates") or []
    names = [names] if isinstance(names, str) else list(names)
    if not names:
        return design_at(xy, design_attrs)
    cats = design_categories(design_attrs)
    missing = [c for c in names if c not in targets.data_vars]
    if missing and targets.attrs.get("kind") == "grid":
        numeric = [c for c in names if c not in cats]
        if numeric:
            raise InputError(f"the trend uses covariates ({', '.join(numeric)}) that are not known on a grid; "
                             "give target --points with those columns")
        raise InputError(f"the trend uses categories ({', '.join(names)}) that are not known on a grid; give --zones, "
                         "a polygon layer with those attributes, or target --points with those columns")
    if missing:
        raise InputError(f"the targets lack the trend's covariates {', '.join(missing)}")
    idx = np.flatnonzero(np.asarray(targets["inside"].values, bool).ravel())  # masked cells: no level needed
    design = np.zeros((len(xy), p))
    design[idx] = design_at(xy[idx], design_attrs, {c: np.asarray(targets[c].values).ravel()[idx] for c in names})
    return design


def _flat_xy(targets: xr.Dataset) -> np.ndarray:
    if targets.attrs.get("kind") == "grid":
        xx, yy = np.meshgrid(targets["x"].values, targets["y"].values)
        return np.column_stack([xx.ravel(), yy.ravel()])
    return np.column_stack([targets["x"].values, targets["y"].values]).astype(float)


def _chunk(basis, xy, design, thresholds, include_nugget, probs):
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        mean, var = engine(basis.engine_name).draw_moments(basis, xy, design, include_nugget=include_nugget)
        return mixture_summary(mean, var, thresholds=thresholds, transform=basis.transform, probs=probs)


def check_scheduler(scheduler) -> str:
    """``"threads"``, ``"synchronous"`` or a dask.distributed address ``scheme://...``; InputError otherwise."""
    import re

    if scheduler in SCHEDULERS or (isinstance(scheduler, str) and re.fullmatch(r"[a-z][a-z0-9+.-]*://\S+", scheduler)):
        return scheduler
    raise InputError(f"scheduler: expected {', '.join(SCHEDULERS)} or an address such as tcp://host:8786, "
                     f"got {scheduler!r}")


def _run_chunks(basis, xy, design, *, thresholds, include_nugget, chunk_cells, scheduler, progress):
    import uuid

    import dask

    token = uuid.uuid4().hex[:8]
    b = dask.delayed(basis, name=f"bayesgeo-basis-{token}")
    starts = range(0, len(xy), chunk_cells)
    tasks = [dask.delayed(_chunk, pure=False)(b, xy[i:i + chunk_cells], design[i:i + chunk_cells], thresholds,
                                              include_nugget, PROBS, dask_key_name=f"bayesgeo-chunk-{token}-{i}")
             for i in starts]
    if scheduler in SCHEDULERS:
        from dask.callbacks import Callback

        class _Tick(Callback):
            def _posttask(self, key, result, dsk, state, worker_id):
                if progress is not None and str(key).startswith("bayesgeo-chunk"):
                    progress.update(1)

        with _Tick():
            return list(dask.compute(*tasks, scheduler=scheduler))
    from distributed import Client, as_completed

    check_scheduler(scheduler)
    try:
        client = Client(scheduler, timeout="20s")
    except (OSError, ValueError, TypeError) as err:
        raise InputError(f"scheduler: cannot connect to {scheduler!r} ({' '.join(str(err).split())})") from None
    with client:
        futures = client.compute(tasks)
        for _ in as_completed(futures):
            if progress is not None:
                progress.update(1)
        return client.gather(futures)


def predict_targets(basis: KrigingBasis, targets: xr.Dataset, *, thresholds: Sequence[float] = (),
            include_nugget: bool = True, design_attrs: dict | None = None, chunk_cells: int = 4096,
            scheduler: str = "threads", units: str = "", progress=None) -> xr.Dataset:
    """Predictive summaries at every target (grid cells or points).

    Parameters
    ----------
    basis : KrigingBasis
        From :func:`basis_from_fit` or :func:`bayesgeo.gp.kriging.make_basis`.
    targets : xarray.Dataset
        From :func:`bayesgeo.data.targets.grid_targets` or :func:`bayesgeo.data.targets.read_target_points`.
    thresholds : sequence of float
        Levels T (data units) for ``p_exceed`` = P(Z(s) > T).
    include_nugget : bool
        Summaries of a new measurement at the point (field + nugget; default) or of the field.
    design_attrs : dict, optional
        Design attributes of the fit (``spec.design_attrs``); omit for a constant mean.
    chunk_cells : int
        Cells per dask task; memory per task is about 8 x (3 x draws + n) x chunk_cells bytes.
    scheduler : str
        ``"threads"`` (default), ``"synchronous"`` or the address of a dask.distributed scheduler.
    units : str
        Units of the predicted values (data units).
    progress : object with ``update(int)``, optional
        Told when each chunk finishes (a tqdm bar).

    Returns
    -------
    xarray.Dataset
        ``mean``, ``sd``, ``q05``, ``q50``, ``q95`` and ``p_exceed`` (threshold first) on the
        dims of ``targets`` ((y, x) or (target,)); NaN outside the mask. Data units. Attribute
        ``site`` holds the site label of a fit extracted from a several-site fit.

    Warns
    -----
    InputWarning
        Target points farther from the nearest data point than the data's extent (their rows and
        distances; also in attribute ``warning``).
    """
    chunk_cells = check_positive_int(chunk_cells, "chunk_cells")
    thr = np.asarray(thresholds, dtype=float).reshape(-1)
    if not np.all(np.isfinite(thr)):
        raise InputError(f"thresholds: expected finite numbers, got {thr.tolist()}")
    kind = targets.attrs.get("kind")
    if kind not in ("grid", "points"):
        raise ValueError("targets must come from bayesgeo.data.targets (attrs['kind'] is 'grid' or 'points')")
    xy = _flat_xy(targets)
    design = target_design(targets, design_attrs, basis.design.shape[1])
    inside = np.asarray(targets["inside"].values, bool).ravel()
    idx = np.flatnonzero(inside)
    rows = targets["row"].values if "row" in targets.coords else np.arange(1, inside.size + 1)
    far = far_targets_warning(basis.xy, xy[idx], rows[idx], basis.metric) if kind == "points" and idx.size else ""
    if far:
        warnings.warn(f"{targets.attrs.get('source') or 'target points'}: {far}", InputWarning, stacklevel=2)
    results = _run_chunks(basis, xy[idx], design[idx], thresholds=thr, include_nugget=include_nugget,
                          chunk_cells=chunk_cells, scheduler=scheduler, progress=progress) if idx.size else []
    dims = ("y", "x") if kind == "grid" else ("target",)
    shape = targets["inside"].shape

    def full(values):
        out = np.full(inside.shape, np.nan)
        out[idx] = values
        return out.reshape(shape)

    def joined(key, row=None):
        parts = [r[key] if row is None else r[key][row] for r in results]
        return full(np.concatenate(parts) if parts else np.empty(0))

    what = "new measurement at the point (field + nugget)" if include_nugget else "field (without nugget)"
    base = {"units": units}
    ds = xr.Dataset(coords={k: targets.coords[k] for k in targets.coords})
    ds["mean"] = (dims, joined("mean"), {**base, "long_name": f"predictive mean of the {what}"})
    ds["sd"] = (dims, joined("sd"), {**base, "long_name": f"predictive standard deviation of the {what}"})
    for i, p in enumerate(PROBS):
        ds[f"q{round(100 * p):02d}"] = (dims, joined("quantiles", i),
                                         {**base, "long_name": f"{100 * p:g}% predictive quantile of the {what}"})
    pex = np.stack([joined("p_exceed", j) for j in range(thr.size)]) if thr.size else np.empty((0, *shape))
    ds["p_exceed"] = (("threshold", *dims), pex,
                      {"units": "1", "long_name": f"posterior predictive probability that the {what} exceeds the threshold"})
    ds = ds.assign_coords(threshold=("threshold", thr, {"units": units, "long_name": "threshold"}))
    ds.attrs.update({
        "title": "bayesgeo Bayesian kriging predictions",
        "Conventions": "CF-1.8",
        "draws": basis.n_draws,
        "covariance": basis.covariance.name,
        "value_transform": basis.transform or "none",  # not "transform": GDAL and rioxarray read that as affine
        "nugget_in_prediction": int(bool(include_nugget)),
        "target_kind": kind,
        "cells_predicted": int(idx.size),
        "method": ("simple kriging per posterior draw given its trend coefficients, combined over draws as a "
                   "Gaussian mixture" + ("; log-normal per draw, back-transformed to data units"
                                         if basis.transform == "log" else "")),
        "caution": CAUTION,
    })
    if far:
        ds.attrs["warning"] = far
    if basis.site:
        ds.attrs["site"] = basis.site  # the label, which the file name may abbreviate
        ds.attrs["title"] += f", site {basis.site}"
    return ds


def area_average(basis: KrigingBasis, xy_area, design_area, *, thresholds: Sequence[float] = (),
                 n_sim: int = 200, seed: int = 0) -> dict:
    """Predictive distribution of the field averaged over an area (discretised into points).

    Without a transform, per draw the block mean and variance (:func:`bayesgeo.gp.joint.block_moments`)
    give a Gaussian; their mixture over draws gives mean, sd, q05, q95 and P(average > T).
    Under ``transform="log"`` the average of a log-normal field is not log-normal, so each draw
    contributes ``n_sim`` joint conditional simulations of the field at the points, averaged in
    data units, and the pooled averages are summarised (Monte Carlo error about sd / sqrt(D n_sim)).
    The nugget is excluded in both cases (it averages out over an area).

    Returns
    -------
    dict
        ``mean``, ``sd``, ``q05``, ``q95``, ``p_exceed`` (list per threshold), ``threshold``,
        ``points`` (discretisation size), ``method``.

    Raises
    ------
    InputError
        The area's nearest point is farther from the data than half their extent
        (:func:`bayesgeo.data.targets.check_area_near_data`).
    """
    check_area_near_data(basis.xy, xy_area, basis.metric)
    thr = [float(t) for t in thresholds]
    if basis.transform == "log":
        sims = conditional_simulations(basis, xy_area, design_area, n_sim=check_positive_int(n_sim, "n_sim"),
                                       seed=seed, include_nugget=False)
        s = summarise_samples(np.exp(sims).mean(axis=2), thr)
        method = (f"joint conditional simulation: {n_sim} per draw x {basis.n_draws} draws, exp() per point, "
                  "averaged over the area (the area average of a log-normal field is not log-normal); nugget excluded")
        q = s["quantiles"]
        mean, sd, pex = s["mean"], s["sd"], s["p_exceed"]
    else:
        m, v = block_moments(basis, xy_area, design_area)
        summ = mixture_summary(m[:, None], v[:, None], thresholds=thr, probs=(0.05, 0.95))
        q = summ["quantiles"][:, 0]
        mean, sd, pex = float(summ["mean"][0]), float(summ["sd"][0]), summ["p_exceed"][:, 0]
        method = ("block kriging per draw (mean of point means, 1'C1/M^2 variance), Gaussian mixture over draws; "
                  "nugget excluded")
    return {"mean": float(mean), "sd": float(sd), "q05": float(q[0]), "q95": float(q[1]),
            "p_exceed": [float(p) for p in pex], "threshold": thr, "points": int(len(xy_area)),
            "draws": basis.n_draws, "method": method}
