"""``bayesgeo map DIR``: Bayesian kriging maps, exceedance probabilities and area averages.

Reads the fit folder ``DIR`` (``posterior.nc``), writes ``DIR/predictions.nc`` and
``DIR/maps/*.png``. Exit status: 0 done; 2 bad input (including existing outputs without
``--overwrite``); 3 the posterior failed the convergence check
(:func:`bayesgeo.convergence.diagnostics.check_convergence` verdict ``fail``) and ``--allow-unconverged``
was not given -- the same status as a failed ``bayesgeo check``. With ``--allow-unconverged``
every figure title and the file attributes say ``NOT CONVERGED``.
"""

from __future__ import annotations

from bayesgeo.stages.maps import DEFAULT_DRAWS, MAX_SIM_TARGETS

HELP = "predictive maps (mean, sd, quantiles, exceedance probabilities) and area averages from a fit"

#: Library argument -> option, where the names differ (errors of the stage name the argument).
ARGUMENT_OPTIONS = {"thresholds": "--threshold", "figures": "--no-figures", "chunk_cells": "--chunk-cells",
                    "hull_mask": "--hull-mask", "levels": "--decision-level"}


def add_arguments(p) -> None:
    from bayesgeo.common.validate import float_option, int_option

    p.add_argument("dir", metavar="DIR", help="fit folder holding posterior.nc; outputs are written into it")
    p.add_argument("--cell", type=float_option("positive"), metavar="SIZE", help="grid cell side (distance units, km for lon/lat data; default: ~100 cells "
                   "along the longer side of the data's bounding box)")
    p.add_argument("--margin", type=float_option("nonnegative"), default=0.0, metavar="M", help="widen the bounding box by M on every side")
    p.add_argument("--site", metavar="NAME", default=None,
                   help="with a several-site fit: map this site (outputs predictions_<NAME>.nc and maps_<NAME>/)")
    p.add_argument("--points", metavar="FILE", help="CSV of target points (columns x,y; plus any trend covariates) "
                   "instead of a grid")
    p.add_argument("--zones", metavar="FILE", help="polygon layer (GeoPackage, shapefile, GeoJSON) giving a trend's "
                   "categories on a grid: each cell takes the level of the polygon holding its centre (attribute "
                   "named as the category column); cells in no polygon are left out of the map")
    p.add_argument("--zones-layer", metavar="NAME", help="layer of a --zones file holding several")
    p.add_argument("--threshold", type=float_option("any"), action="append", default=[], metavar="T",
                   help="level for exceedance probabilities, data units (repeatable)")
    p.add_argument("--decision-level", type=float_option("probability"), action="append", default=None, metavar="P",
                   help="probability level of the exceedance contours and polygons (repeatable; default 0.5 and 0.9)")
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
    p.add_argument("--simulate", type=int_option("simulate"), default=None, metavar="N",
                   help=f"store N joint conditional simulations per draw (at most {MAX_SIM_TARGETS} targets; use "
                   "--points or a coarse --cell); default on a grid with --threshold: one per draw, not stored, for "
                   "the chance that the area above it is larger than each map.gpkg polygon; 0: none")
    p.add_argument("--seed", type=int_option("seed"), default=0, metavar="S",
                   help="seed of the simulations (joint simulations; area averages under the log transform)")
    p.add_argument("--overwrite", action="store_true", help="replace existing predictions.nc and maps/")
    p.add_argument("--allow-unconverged", action="store_true",
                   help="map a posterior that failed the convergence check (outputs are marked NOT CONVERGED)")
    p.add_argument("--no-figures", action="store_true", help="write predictions.nc only (no figures, GeoTIFFs or GeoPackage)")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")


def run(args) -> int:
    """Parse, call :func:`bayesgeo.stages.maps.map_fit`, print."""
    import sys

    from bayesgeo.cli._common import emit_json, progress
    from bayesgeo.predict.figures import DECISION_LEVELS
    from bayesgeo.stages.maps import map_fit

    status, result = map_fit(
        args.dir, site=args.site, cell=args.cell, margin=args.margin, points=args.points, thresholds=args.threshold,
        area=args.area, draws=args.draws, nugget=args.nugget, hull_mask=args.hull_mask,
        scheduler=args.scheduler, chunk_cells=args.chunk_cells, simulate=args.simulate, seed=args.seed,
        overwrite=args.overwrite, allow_unconverged=args.allow_unconverged, figures=not args.no_figures,
        levels=tuple(args.decision_level or DECISION_LEVELS), zones=args.zones, zones_layer=args.zones_layer,
        progress=None if args.json else progress)
    if args.json:
        emit_json(result)
    elif status:
        print(f"bayesgeo map: {result['error']}", file=sys.stderr)
    else:
        _print_human(result)
    return status


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
    if r.get("zones"):
        print(f"  zones: {r['zones']['note']}")
    print(f"wrote {r['predictions']}" + (f" and {len(r['maps'])} maps" if r["maps"] else ""))
    for c in r["cautions"]:
        print(f"caution: {c}")
