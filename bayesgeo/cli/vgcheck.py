"""``bayesgeo variogram-check DIR``: posterior predictive check against the empirical semivariogram.

Replicates data at the sample locations from the fit's posterior, computes the semivariogram of
every replicate with the bins of the observed one (trend removed by OLS from both alike, on the
modelled scale: log values under a log transform) and draws the observed semivariogram over the
replicate band and the model's posterior semivariogram band. Writes ``DIR/variogram_check.png``
and ``DIR/variogram_check.csv`` (each refused if present, unless ``--overwrite``). For a
several-site fit, ``--site NAME`` checks one site (its draws and points,
:func:`bayesgeo.fitting.hierarchical.site_fit`) and writes ``DIR/variogram_check_<NAME>.png`` and ``.csv``.
"""

from __future__ import annotations

from bayesgeo.common.layout import VGCHECK_FIGURE as FIGURE
from bayesgeo.common.layout import VGCHECK_TABLE as TABLE

HELP = "posterior predictive check of a fit against the empirical semivariogram"


def add_arguments(p) -> None:
    from bayesgeo.cli._common import refuse_renamed
    from bayesgeo.common.validate import float_option, int_option

    p.add_argument("dir", metavar="DIR", help="fit folder holding posterior.nc; outputs are written into it")
    p.add_argument("--site", metavar="NAME", default=None,
                   help="with a several-site fit: check this site (outputs variogram_check_<NAME>.png and .csv)")
    p.add_argument("--replicates", type=int_option("replicates"), default=200, metavar="N",
                   help="replicate data sets, one posterior draw each (default 200)")
    p.add_argument("--bins", type=int_option("bins"), default=15, metavar="N", help="number of lag bins (default 15)")
    refuse_renamed(p, "--max-lag")
    p.add_argument("--lag-limit", type=float_option("positive"), default=None, metavar="D",
                   help="largest lag in distance units (default: half the largest distance between points)")
    p.add_argument("--seed", type=int_option("seed"), default=1, metavar="S", help="seed of the replicates (default 1)")
    p.add_argument("--overwrite", action="store_true", help=f"replace existing {FIGURE} and {TABLE}")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout and nothing else there")


def run(args) -> int:
    """Parse, call :func:`bayesgeo.stages.vgcheck.check_variogram`, print."""
    from bayesgeo.cli._common import emit_json, print_table, progress
    from bayesgeo.stages.vgcheck import check_variogram

    _, obj = check_variogram(args.dir, site=args.site, replicates=args.replicates, bins=args.bins,
                             lag_limit=args.lag_limit, seed=args.seed, overwrite=args.overwrite,
                             progress=None if args.json else progress)
    if args.json:
        emit_json(obj)
        return 0
    rows = []
    for k in range(len(obj["lag"])):
        rows.append({"lag": obj["lag"][k], "pairs": obj["pairs"][k], "observed": obj["observed"][k],
                     "rep_q05": obj["replicate_q05"][k], "rep_q50": obj["replicate_q50"][k],
                     "rep_q95": obj["replicate_q95"][k], "model_q05": obj["model_q05"][k],
                     "model_q50": obj["model_q50"][k], "model_q95": obj["model_q95"][k],
                     "p_value": obj["p_value"][k], "flag": "OUTSIDE" if obj["outside"][k] else ""})
    where = f", site {obj['site']}" if obj["site"] is not None else ""
    print(f"posterior predictive semivariogram check: {obj['covariance']}{where}, {obj['replicates']} replicates, "
          f"seed {obj['seed']} (semivariance in {obj['units']['semivariance']}, lag in {obj['units']['lag'] or 'distance units'})")
    print_table(rows, list(rows[0]), floatfmt=".4g")
    print(f"{obj['outside_band']} of {sum(1 for p in obj['pairs'] if p)} bins outside the 90% replicate band; "
          "p_value = share of replicates at or above the observed semivariance")
    print(f"wrote {obj['files'][0]} and {obj['files'][1]}")
    for c in obj["cautions"]:
        print(f"caution: {c}")
    return 0
