"""The map stage: predictive maps, exceedance probabilities and area averages from a saved fit.

Reads the fit folder (``posterior.nc``), writes ``predictions.nc`` and ``maps/*.png`` into it (with
a site: ``predictions_<site>.nc`` and ``maps_<site>/``). A fit that failed its convergence check is
not mapped (status 3) unless ``allow_unconverged``; then every title and attribute says NOT CONVERGED.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from bayesgeo.common.layout import prediction_names
from bayesgeo.predict.cf import georeferenced_fit_map
from bayesgeo.predict.figures import DECISION_LEVELS
from bayesgeo.common.validate import INT_LIMITS, InputError, check_positive, check_positive_int

__all__ = ["DEFAULT_DRAWS", "map_fit", "map_draws"]

DEFAULT_DRAWS = 500
AREA_POINTS = 400
MAX_SIM_TARGETS = 2000
EXIT_NOT_CONVERGED = 3


def map_draws(value) -> int | None:
    """Posterior draws used for prediction: an integer within the limits, or ``"all"`` / None (every draw)."""
    if value is None or str(value).strip().lower() == "all":
        return None
    lo, hi = INT_LIMITS["prediction_draws"]
    try:
        n = int(str(value).strip(), 10)
    except ValueError:
        n = 0
    if not lo <= n <= hi:
        raise InputError(f"draws: expected an integer from {lo} to {hi} or 'all', got {value!r}")
    return n


def map_fit(folder, *, site: str | None = None, cell: float | None = None, margin: float = 0.0,
            points: str | Path | None = None, thresholds: Sequence[float] = (), area: str | None = None,
            draws=DEFAULT_DRAWS, nugget: str = "include", hull_mask: bool = False, scheduler: str = "threads",
            chunk_cells: int = 4096, simulate: int | None = None, seed: int = 0, overwrite: bool = False,
            allow_unconverged: bool = False, figures: bool = True, levels: Sequence[float] = DECISION_LEVELS,
            zones: str | Path | None = None, zones_layer: str | None = None,
            progress: Callable | None = None) -> tuple[int, dict]:
    """Predict on a grid (or at ``points``) from the fit in ``folder`` and write predictions and maps.

    Parameters
    ----------
    folder : path
        Fit folder holding ``posterior.nc``.
    site : str, optional
        The site of a several-site fit to map (required for one, refused for a single-site fit).
    cell, margin, hull_mask :
        Grid cell side and widening (distance units); leave out cells outside the convex hull.
    points : path, optional
        CSV of target points instead of a grid (:func:`bayesgeo.data.targets.read_target_points`).
    thresholds : sequence of float
        Levels (data units) whose exceedance probabilities are mapped.
    area : str, optional
        A polygon CSV path or ``"xmin,ymin,xmax,ymax"``: the block average over it is reported.
    draws : int, "all" or None
        Posterior draws used (evenly spaced).
    nugget : {"include", "exclude"}
        Predict a new measurement (field + nugget) or the field.
    scheduler, chunk_cells :
        :func:`bayesgeo.predict.prediction.predict_targets` settings.
    simulate, seed :
        Joint conditional simulations per draw stored at the targets (at most 2,000 targets), and their seed
        (also that of the area average). None (default): on a grid with thresholds, one simulation per
        draw, not stored, for the distribution of the area above each threshold
        (:mod:`bayesgeo.predict.simulation`); 0: none.
    overwrite, allow_unconverged, figures :
        Replace earlier outputs; map a fit that failed its check (marked NOT CONVERGED); draw the maps.
    levels : sequence of float
        Probability levels in (0, 1) of the exceedance contours and of the polygons of map.gpkg.
    zones, zones_layer : path, str, optional
        For a grid and a trend with categorical covariates: a polygon layer (GeoPackage, shapefile,
        GeoJSON) whose attribute of each category's name gives the level of every cell whose centre it
        holds (:func:`bayesgeo.data.targets.zone_grid`); cells in no polygon are left out of the map.
    progress : callable, optional
        Bar factory ``progress(total=, desc=)`` (:func:`bayesgeo.cli._common.progress`); None for none.

    Returns
    -------
    (status, result)
        0 and the result (files written, cells, draws, ranges of mean and sd, share of cells with
        P(exceed) > 0.5 per threshold, area average, cautions), or 3 and ``{"error", "convergence",
        "exit_status"}`` for a fit that failed its convergence check.
    """
    from bayesgeo.data import targets as tg
    from bayesgeo.fitting.fitted import read_site
    from bayesgeo.common.outputs import add_to_folder, check_addable
    from bayesgeo.predict.prediction import area_average, basis_from_fit, check_scheduler, label_prediction, predict_targets
    from bayesgeo.explore.trend import design_at, design_categories

    folder = Path(folder)
    draws = map_draws(draws)
    check_scheduler(scheduler)
    chunk = check_positive_int(chunk_cells, "chunk_cells")
    levels = tuple(float(v) for v in levels)
    if not levels or not all(0.0 < v < 1.0 for v in levels):
        raise InputError(f"levels: decision levels must be probabilities in (0, 1), got {list(levels)}")
    if cell is not None:
        check_positive(cell, "cell")
    if not (np.isfinite(margin) and margin >= 0):
        raise InputError(f"margin: expected a number >= 0, got {margin!r}")
    if nugget not in ("include", "exclude"):
        raise InputError(f"nugget: expected 'include' or 'exclude', got {nugget!r}")
    area_vertices = tg.area_from_option(str(area)) if area else None
    if simulate is not None and simulate < 0:
        raise InputError(f"simulate: expected an integer >= 0, got {simulate}")
    nc_name, maps_name = prediction_names(site)
    out_nc, out_maps = folder / nc_name, folder / maps_name
    check_addable(folder, nc_name, overwrite=overwrite)
    if figures:
        check_addable(folder, maps_name, overwrite=overwrite)

    fit = read_site(folder, site)
    verdict = fit.gate_verdict()
    not_converged = verdict == "fail"
    if not_converged and not allow_unconverged:
        msg = (f"{folder}: the posterior failed the convergence check (run 'bayesgeo check {folder}' for the "
               "reasons); refit, or pass --allow-unconverged to map it anyway, marked NOT CONVERGED")
        return EXIT_NOT_CONVERGED, {"error": msg, "convergence": verdict, "exit_status": EXIT_NOT_CONVERGED}

    basis, spec, params = basis_from_fit(fit, draws=draws)
    xy = basis.xy
    cats = {c: v["levels"] for c, v in design_categories(spec.design_attrs).items()}
    if zones is not None and (points or not cats):
        raise InputError("zones: " + ("for grid maps; target --points carry their categories as columns" if points
                                      else "the fit's trend has no categorical covariate; drop the zones"))
    if points:
        targets = tg.read_target_points(points, columns=tuple(c for c in spec.covariates if c not in cats),
                                        categories=cats)
        if hull_mask:
            targets["inside"] = ("target", tg.hull_mask(xy, np.column_stack([targets["x"], targets["y"]])))
    else:
        targets = tg.grid_targets(xy, cell=cell, margin=margin, hull=hull_mask, metric=basis.metric)
        if zones is not None:
            targets = tg.zone_grid(targets, zones, cats, layer=zones_layer,
                                   crs=str((fit.settings.get("data") or {}).get("crs", "")) or None)
    units = spec.value_units
    n_cells = int(np.count_nonzero(targets["inside"].values))
    area_pts = None  # refuse a bad area or simulation before the long prediction, not after it
    if area_vertices is not None:
        if spec.covariates:
            raise InputError(f"area: the trend uses covariates ({', '.join(spec.covariates)}) that are unknown "
                             "inside the area; area averages need a trend in the coordinates only")
        area_pts = tg.discretise_area(area_vertices[0], points=AREA_POINTS)
        tg.check_area_near_data(xy, area_pts, basis.metric)
    keep_fields = bool(simulate)
    n_sim = int(simulate) if simulate is not None else int(targets.attrs["kind"] == "grid" and len(thresholds) > 0)
    if keep_fields and n_cells > MAX_SIM_TARGETS:
        raise InputError(f"simulate: {n_cells} targets; joint simulation is for at most {MAX_SIM_TARGETS} "
                         "(give target points or a coarser cell)")
    bar = progress(total=max(1, -(-n_cells // chunk)), desc="map") if progress else None
    pred = predict_targets(basis, targets, thresholds=thresholds, include_nugget=nugget == "include",
                           design_attrs=spec.design_attrs, chunk_cells=chunk, scheduler=scheduler, units=units,
                           progress=bar)
    if bar is not None:
        bar.close()
    _refuse_non_finite(pred, targets["inside"], folder)

    cautions = label_prediction(pred, spec.transform, verdict)
    block = None
    if area_vertices is not None:
        vertices, label = area_vertices
        block = area_average(basis, area_pts, design_at(area_pts, spec.design_attrs), thresholds=thresholds,
                             n_sim=200, seed=seed)
        block.update(area=label, area_size=tg.polygon_area(vertices), units=units)
    simulation = None
    if n_sim:
        from bayesgeo.predict.simulation import simulate_targets

        bar = progress(total=basis.n_draws, desc="joint simulation") if progress else None
        sims = simulate_targets(basis, targets, n_sim=n_sim, seed=seed, include_nugget=nugget == "include",
                                design_attrs=spec.design_attrs, units=units, thresholds=thresholds,
                                keep_fields=keep_fields, progress=None if bar is None else bar.update)
        if bar is not None:
            bar.close()
        pred = pred.merge(sims, compat="no_conflicts", join="exact", combine_attrs="override")
        simulation = {"per_draw": n_sim, "method": sims.attrs["simulation_method"], "fields_stored": keep_fields}
    pred.attrs.update({
        "fit_folder": str(folder), "draws_total": int(params.attrs["draws_total"]), "value_units": units,
        "distance_units": spec.distance_units, "scheduler": str(scheduler), "seed": int(seed),
    })
    if block is not None:
        pred.attrs["area_average"] = json.dumps(block)
    if zones is not None:
        pred.attrs["zones_note"] = (f"{targets.attrs['cells_outside_zones']} cells whose centre lies in no polygon of "
                                    f"{zones} were left out of the map (no category there)")
    georef = georeferenced_fit_map(pred, fit)
    with add_to_folder(folder, out_nc.name, overwrite=overwrite) as tmp:
        georef.to_netcdf(tmp, engine="netcdf4")
    maps = []
    if figures:
        from bayesgeo.predict.figures import write_map_figures

        with add_to_folder(folder, out_maps.name, overwrite=overwrite, kind="dir") as tmp:
            written = write_map_figures(pred, tmp, samples_xy=xy, caution=" ".join(cautions),
                                        not_converged=not_converged, levels=levels)
            if targets.attrs["kind"] == "grid":
                written += _gis_files(georef, fit, tmp, None if block is None else (area_vertices[0], block), levels)
        maps = [str(out_maps / p.name) for p in written]

    result = {
        "predictions": str(out_nc), "maps": maps, "targets": targets.attrs["kind"], "cells": n_cells,
        "draws": basis.n_draws, "draws_total": int(params.attrs["draws_total"]),
        "threshold": [float(t) for t in thresholds], "nugget": nugget, "units": units,
        "simulations_per_draw": n_sim, "simulation": simulation,
        "transform": spec.transform or "none", "convergence": verdict,
        "summary": {k: {"min": float(np.nanmin(pred[k].values)), "max": float(np.nanmax(pred[k].values))}
                    for k in ("mean", "sd")} if n_cells else {},
        "share_p_exceed_over_half": [float(np.nanmean(pred["p_exceed"].values[j] > 0.5))
                                     for j in range(len(thresholds))] if n_cells else [],
        "cautions": cautions,
    }
    if zones is not None:
        result["zones"] = {"source": str(zones), "cells_outside": int(targets.attrs["cells_outside_zones"]),
                           "note": pred.attrs["zones_note"]}
    if block is not None:
        result["area"] = block
    return 0, result


def _loo_residuals(fit, obs, draws: int) -> np.ndarray:
    """Standardised leave-one-out residual of every sample, ``(z_i - E[z_i | rest]) / sd(z_i | rest)`` in model
    units over ``draws`` evenly thinned posterior draws (:func:`bayesgeo.checks.loo.loo_predictive`: exact for
    a dense fit); NaN for a non-detect, whose value is not known."""
    from bayesgeo.checks.loo import loo_predictive
    from bayesgeo.fitting.sampling import select_draws

    post = fit.tree["posterior"]
    step = max(1, post.sizes["draw"] * post.sizes["chain"] // max(int(draws), 1))
    pred = loo_predictive(select_draws(fit.tree, slice(None, None, step)))
    n = pred.sizes["obs"]
    mean, sd = pred["loo_mean"].values.reshape(-1, n), pred["loo_sd"].values.reshape(-1, n)
    centre = mean.mean(axis=0)
    total = np.sqrt((sd**2).mean(axis=0) + mean.var(axis=0))
    z = np.asarray(obs["value"].values, dtype=float)
    z = np.log(z) if fit.spec.transform == "log" else z  # the modelled value
    out = (z - centre) / total
    if "censored" in obs:
        out[np.asarray(obs["censored"].values, dtype=bool)] = np.nan
    return out


def _gis_files(georef, fit, folder: Path, area, levels) -> list[Path]:
    """GeoTIFFs of the map statistics and the GeoPackage of exceedance areas and samples
    (:mod:`bayesgeo.predict.gis_export`)."""
    import xarray as xr

    from bayesgeo.predict.gis_export import write_geopackage, write_geotiffs

    obs, const = fit.tree["observed_data"].to_dataset(), fit.tree["constant_data"].to_dataset()

    def column(name):  # a variable or coordinate of the fit's data groups (a site view keeps x, y as coordinates)
        return np.asarray(next(ds[name].values for ds in (const, obs) if name in ds.variables))

    samples = xr.Dataset({k: ("obs", column(k)) for k in ("x", "y", "value")})
    if "censored" in obs.variables:
        samples["censored"] = ("obs", column("censored").astype(bool))
    if "row" in obs.variables or "row" in const.variables:
        samples = samples.assign_coords(row=("obs", column("row")))
    samples["loo_residual"] = ("obs", _loo_residuals(fit, obs, georef.attrs["draws"]))
    written = write_geotiffs(georef, folder)
    if georef.sizes.get("threshold", 0):
        written.append(write_geopackage(folder / "map.gpkg", georef, samples=samples, area=area, levels=levels))
    return written


def _refuse_non_finite(pred, inside, folder) -> None:
    """A NaN or infinite prediction at a predicted cell stops the map instead of an all-NaN band."""
    for name in ("mean", "sd", "q05", "q50", "q95", "p_exceed"):
        if name not in pred:
            continue
        bad = int((~np.isfinite(pred[name]) & inside).sum())
        if bad:
            raise InputError(f"{folder}: the prediction {name} is NaN or infinite at {bad} target(s) although the "
                             "posterior draws are finite (a numerically singular kriging system?); no map written: "
                             "check the fit ('bayesgeo check') and the targets")
