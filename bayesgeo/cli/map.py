"""``bayesgeo map DIR``: Bayesian kriging maps, exceedance probabilities and area averages.

Reads the fit folder ``DIR`` (``posterior.nc``), writes ``DIR/predictions.nc`` and
``DIR/maps/*.png``. Exit status: 0 done; 2 bad input (including existing outputs without
``--overwrite``); 3 the posterior failed the convergence check
(:func:`bayesgeo.diagnostics.check_convergence` verdict ``fail``) and ``--allow-unconverged``
was not given -- the same status as a failed ``bayesgeo check``. With ``--allow-unconverged``
every figure title and the file attributes say ``NOT CONVERGED``.
"""

from __future__ import annotations

HELP = "predictive maps (mean, sd, quantiles, exceedance probabilities) and area averages from a fit"

PREDICTIONS_FILE = "predictions.nc"
MAPS_DIR = "maps"
DEFAULT_DRAWS = 500
AREA_POINTS = 400
MAX_SIM_TARGETS = 2000


def _draws(text: str):
    from bayesgeo.validate import INT_LIMITS, InputError

    if str(text).strip().lower() == "all":
        return None
    lo, hi = INT_LIMITS["prediction_draws"]
    try:
        n = int(str(text).strip(), 10)
    except ValueError:
        n = 0
    if not lo <= n <= hi:
        raise InputError(f"--draws: expected an integer from {lo} to {hi} or 'all', got {text!r}")
    return n


def add_arguments(p) -> None:
    from bayesgeo.validate import float_option, int_option

    p.add_argument("dir", metavar="DIR", help="fit folder holding posterior.nc; outputs are written into it")
    p.add_argument("--cell", type=float_option("positive"), metavar="SIZE", help="grid cell side (distance units; default: ~100 cells "
                   "along the longer side of the data's bounding box)")
    p.add_argument("--margin", type=float_option("nonnegative"), default=0.0, metavar="M", help="widen the bounding box by M on every side")
    p.add_argument("--site", metavar="NAME", default=None,
                   help="with a several-site fit: map this site (outputs predictions_<NAME>.nc and maps_<NAME>/)")
    p.add_argument("--points", metavar="FILE", help="CSV of target points (columns x,y; plus any trend covariates) "
                   "instead of a grid")
    p.add_argument("--threshold", type=float_option("any"), action="append", default=[], metavar="T",
                   help="level for exceedance probabilities, data units (repeatable)")
    p.add_argument("--area", metavar="FILE|xmin,ymin,xmax,ymax",
                   help="area to average over: a CSV of polygon vertices (x,y) or a rectangle")
    p.add_argument("--draws", default=str(DEFAULT_DRAWS), metavar="N",
                   help=f"use N evenly spaced posterior draws (default {DEFAULT_DRAWS}; 'all' for every draw)")
    p.add_argument("--nugget", choices=("include", "exclude"), default="include",
                   help="include the nugget in point predictions (a new measurement; default) or map the field alone")
    p.add_argument("--hull-mask", action="store_true", help="leave out targets outside the convex hull of the samples")
    p.add_argument("--scheduler", default="threads", metavar="ADDRESS",
                   help="'threads' (default, local thread pool), 'synchronous', or a dask.distributed scheduler address")
    p.add_argument("--chunk-cells", type=int_option("chunk_cells"), default=4096, metavar="K", help="cells per parallel task (default 4096)")
    p.add_argument("--simulate", type=int_option("simulate"), default=0, metavar="N",
                   help=f"also store N joint conditional simulations per draw (at most {MAX_SIM_TARGETS} targets; "
                   "use --points or a coarse --cell)")
    p.add_argument("--seed", type=int_option("seed"), default=0, metavar="S",
                   help="seed of the simulations (area averages under the log transform, --simulate)")
    p.add_argument("--overwrite", action="store_true", help="replace existing predictions.nc and maps/")
    p.add_argument("--allow-unconverged", action="store_true",
                   help="map a posterior that failed the convergence check (outputs are marked NOT CONVERGED)")
    p.add_argument("--no-figures", action="store_true", help="write predictions.nc only")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")


def run(args) -> int:
    import json
    from pathlib import Path

    import numpy as np

    from bayesgeo.cli import EXIT_NOT_CONVERGED
    from bayesgeo.cli._common import emit_json, progress
    from bayesgeo.outputs import add_to_folder, check_addable
    from bayesgeo.validate import InputError, check_positive_int

    from bayesgeo import targets as tg
    from bayesgeo.validate import check_positive

    from bayesgeo.predict import check_scheduler

    folder = Path(args.dir)
    draws = _draws(args.draws)
    check_scheduler(args.scheduler)
    chunk = check_positive_int(args.chunk_cells, "--chunk-cells")
    if args.cell is not None:
        check_positive(args.cell, "--cell")
    if not (np.isfinite(args.margin) and args.margin >= 0):
        raise InputError(f"--margin: expected a number >= 0, got {args.margin!r}")
    area_vertices = tg.area_from_option(args.area) if args.area else None
    if args.simulate < 0:
        raise InputError(f"--simulate: expected an integer >= 0, got {args.simulate}")
    out_nc, out_maps = folder / PREDICTIONS_FILE, folder / MAPS_DIR
    if args.site is not None:
        from bayesgeo.sitenames import site_file_name

        slug = site_file_name(args.site)
        out_nc = folder / f"{Path(PREDICTIONS_FILE).stem}_{slug}.nc"
        out_maps = folder / f"{MAPS_DIR}_{slug}"
    check_addable(folder, out_nc.name, overwrite=args.overwrite)
    if not args.no_figures:
        check_addable(folder, out_maps.name, overwrite=args.overwrite)

    from bayesgeo.cli._common import load_fit_folder

    fit = load_fit_folder(folder, args.site)
    verdict = fit.gate_verdict()
    not_converged = verdict == "fail"
    if not_converged and not args.allow_unconverged:
        msg = (f"{folder}: the posterior failed the convergence check (run 'bayesgeo check {folder}' for the "
               "reasons); refit, or pass --allow-unconverged to map it anyway, marked NOT CONVERGED")
        if args.json:
            emit_json({"error": msg, "convergence": verdict, "exit_status": EXIT_NOT_CONVERGED})
        else:
            import sys

            print(f"bayesgeo map: {msg}", file=sys.stderr)
        return EXIT_NOT_CONVERGED

    from bayesgeo.predict import area_average, basis_from_fit, prediction_cautions, predict_targets
    from bayesgeo.trend import design_at

    basis, spec, params = basis_from_fit(fit, draws=draws)
    xy = basis.xy
    if args.points:
        targets = tg.read_target_points(args.points, columns=tuple(spec.covariates))
        if args.hull_mask:
            targets["inside"] = ("target", tg.hull_mask(xy, np.column_stack([targets["x"], targets["y"]])))
    else:
        targets = tg.grid_targets(xy, cell=args.cell, margin=args.margin, hull=args.hull_mask)
    units = spec.value_units
    n_cells = int(np.count_nonzero(targets["inside"].values))
    area_pts = None  # refuse a bad area or simulation before the long prediction, not after it
    if area_vertices is not None:
        if spec.covariates:
            raise InputError(f"--area: the trend uses covariates ({', '.join(spec.covariates)}) that are unknown "
                             "inside the area; area averages need a trend in the coordinates only")
        area_pts = tg.discretise_area(area_vertices[0], points=AREA_POINTS)
        tg.check_area_near_data(xy, area_pts, basis.metric)
    if args.simulate and n_cells > MAX_SIM_TARGETS:
        raise InputError(f"--simulate: {n_cells} targets; joint simulation is for at most {MAX_SIM_TARGETS} "
                         "(use --points or a coarser --cell)")
    bar = progress(total=max(1, -(-n_cells // chunk)), desc="map", enabled=not args.json)
    pred = predict_targets(basis, targets, thresholds=args.threshold, include_nugget=args.nugget == "include",
                           design_attrs=spec.design_attrs, chunk_cells=chunk, scheduler=args.scheduler, units=units,
                           progress=bar)
    bar.close()
    _refuse_non_finite(pred, targets["inside"], folder)

    cautions = prediction_cautions(spec.transform, verdict)
    area = None
    if area_vertices is not None:
        vertices, label = area_vertices
        area = area_average(basis, area_pts, design_at(area_pts, spec.design_attrs), thresholds=args.threshold,
                            n_sim=200, seed=args.seed)
        area.update(area=label, area_size=tg.polygon_area(vertices), units=units)
    if args.simulate:
        from bayesgeo.predict import simulate_targets

        pred["simulation"] = simulate_targets(basis, targets, n_sim=args.simulate, seed=args.seed,
                                              include_nugget=args.nugget == "include",
                                              design_attrs=spec.design_attrs, units=units)
        pred = pred.assign_coords(sample=np.arange(basis.n_draws))
    pred.attrs.update({
        "fit_folder": str(folder), "convergence_verdict": verdict, "draws_total": int(params.attrs["draws_total"]),
        "value_units": units, "distance_units": spec.distance_units, "scheduler": str(args.scheduler),
        "seed": int(args.seed), "cautions": json.dumps(cautions),
    })
    if not_converged:
        pred.attrs["title"] = "NOT CONVERGED: " + pred.attrs["title"]
        pred.attrs["convergence_status"] = "NOT CONVERGED"
    if area is not None:
        pred.attrs["area_average"] = json.dumps(area)
    with add_to_folder(folder, out_nc.name, overwrite=args.overwrite) as tmp:
        pred.to_netcdf(tmp, engine="netcdf4")
    maps = []
    if not args.no_figures:
        from bayesgeo.map_figures import write_map_figures

        with add_to_folder(folder, out_maps.name, overwrite=args.overwrite, kind="dir") as tmp:
            written = write_map_figures(pred, tmp, samples_xy=xy, caution=" ".join(cautions),
                                        not_converged=not_converged)
        maps = [str(out_maps / p.name) for p in written]

    result = {
        "predictions": str(out_nc), "maps": maps, "targets": targets.attrs["kind"], "cells": n_cells,
        "draws": basis.n_draws, "draws_total": int(params.attrs["draws_total"]),
        "threshold": [float(t) for t in args.threshold], "nugget": args.nugget, "units": units,
        "simulations_per_draw": int(args.simulate),
        "transform": spec.transform or "none", "convergence": verdict,
        "summary": {k: {"min": float(np.nanmin(pred[k].values)), "max": float(np.nanmax(pred[k].values))}
                    for k in ("mean", "sd")} if n_cells else {},
        "share_p_exceed_over_half": [float(np.nanmean(pred["p_exceed"].values[j] > 0.5))
                                     for j in range(len(args.threshold))] if n_cells else [],
        "cautions": cautions,
    }
    if area is not None:
        result["area"] = area
    if args.json:
        emit_json(result)
    else:
        _print_human(result)
    return 0


def _refuse_non_finite(pred, inside, folder) -> None:
    """A NaN or infinite prediction at a predicted cell stops the map (exit 2) instead of an all-NaN band."""
    import numpy as np

    from bayesgeo.validate import InputError

    for name in ("mean", "sd", "q05", "q50", "q95", "p_exceed"):
        if name not in pred:
            continue
        bad = int((~np.isfinite(pred[name]) & inside).sum())
        if bad:
            raise InputError(f"{folder}: the prediction {name} is NaN or infinite at {bad} target(s) although the "
                             "posterior draws are finite (a numerically singular kriging system?); no map written: "
                             "check the fit ('bayesgeo check') and the targets")


def _print_human(r: dict) -> None:
    u = r["units"]
    head = "NOT CONVERGED -- " if r["convergence"] == "fail" else ""
    print(f"{head}{r['cells']} {r['targets']} cells predicted from {r['draws']} of {r['draws_total']} posterior draws "
          f"(nugget {r['nugget']}d; transform {r['transform']})")
    for k, v in r["summary"].items():
        print(f"  {k}: {v['min']:.4g} to {v['max']:.4g} {u}")
    for t, s in zip(r["threshold"], r["share_p_exceed_over_half"]):
        print(f"  threshold {t:g} {u}: {100 * s:.1f}% of cells with P(exceed) > 0.5")
    a = r.get("area")
    if a:
        print(f"area average over {a['area']} ({a['points']} points): mean {a['mean']:.4g} {u}, sd {a['sd']:.4g}, "
              f"90% interval {a['q05']:.4g} to {a['q95']:.4g}")
        for t, p in zip(a["threshold"], a["p_exceed"]):
            print(f"  P(area average > {t:g} {u}) = {p:.3f}")
        print(f"  method: {a['method']}")
    print(f"wrote {r['predictions']}" + (f" and {len(r['maps'])} maps" if r["maps"] else ""))
    for c in r["cautions"]:
        print(f"caution: {c}")
