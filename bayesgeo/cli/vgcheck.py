"""``bayesgeo variogram-check DIR``: posterior predictive check against the empirical semivariogram.

Replicates data at the sample locations from the fit's posterior, computes the semivariogram of
every replicate with the bins of the observed one (trend removed by OLS from both alike, on the
modelled scale: log values under a log transform) and draws the observed semivariogram over the
replicate band and the model's posterior semivariogram band. Writes ``DIR/variogram_check.png``
and ``DIR/variogram_check.csv`` (each refused if present, unless ``--overwrite``). For a
several-site fit, ``--site NAME`` checks one site (its draws and points,
:func:`bayesgeo.hierarchical.site_fit`) and writes ``DIR/variogram_check_<NAME>.png`` and ``.csv``.
"""

from __future__ import annotations

HELP = "posterior predictive check of a fit against the empirical semivariogram"

FIGURE = "variogram_check.png"
TABLE = "variogram_check.csv"
TABLE_COLUMNS = ("bin", "lag", "bin_lower", "bin_upper", "pairs", "observed", "replicate_q05", "replicate_q50",
                 "replicate_q95", "model_q05", "model_q50", "model_q95", "p_value", "outside")


def add_arguments(p) -> None:
    from bayesgeo.cli._common import refuse_renamed
    from bayesgeo.validate import float_option, int_option

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


def output_names(site: str | None) -> tuple[str, str]:
    """File names of the figure and the table (``variogram_check_<site>.*`` for one site of a several-site fit)."""
    if site is None:
        return FIGURE, TABLE
    from bayesgeo.sitenames import site_file_name

    slug = site_file_name(site)
    return f"variogram_check_{slug}.png", f"variogram_check_{slug}.csv"


def _list(da) -> list:
    return [float(v) for v in da.values]


def _refuse_non_finite(vc, folder) -> None:
    """NaN or infinite replicate or model semivariances in a bin with pairs stop the check (exit 2)."""
    import numpy as np

    from bayesgeo.validate import InputError

    has_pairs = vc["pairs"].values > 0
    for name in ("replicate_q05", "replicate_q50", "replicate_q95", "model_q05", "model_q50", "model_q95"):
        bad = int(np.count_nonzero(~np.isfinite(vc[name].values) & has_pairs))
        if bad:
            raise InputError(f"{folder}: {name} is NaN or infinite in {bad} lag bin(s) with pairs although the "
                             "posterior draws are finite; no check written: check the fit ('bayesgeo check')")


def run(args) -> int:
    import functools
    from pathlib import Path

    from bayesgeo.check_figures import variogram_check_figure
    from bayesgeo.cli._common import emit_json, print_table, progress
    from bayesgeo.figures import save_figure
    from bayesgeo.outputs import add_to_folder, check_addable
    from bayesgeo.cli._common import load_fit_folder
    from bayesgeo.ppcheck import variogram_check

    folder = Path(args.dir)
    bar = progress(total=3, desc="variogram-check", enabled=not args.json)
    with bar:
        fit = load_fit_folder(folder, args.site)
        tree = fit.tree
        fig_name, csv_name = output_names(args.site)
        fig_path, csv_path = folder / fig_name, folder / csv_name
        check_addable(folder, fig_name, overwrite=args.overwrite)
        check_addable(folder, csv_name, overwrite=args.overwrite)
        bar.update(1)
        vc = variogram_check(tree, replicates=args.replicates, bins=args.bins, lag_limit=args.lag_limit, seed=args.seed,
                             progress=functools.partial(progress, enabled=not args.json))
        bar.update(1)
        _refuse_non_finite(vc, folder)
        cautions = list(vc.attrs["cautions"])
        verdict = fit.stored_verdict
        title = None
        where = f", site {args.site}" if args.site is not None else ""
        if args.site is not None:
            title = f"Posterior predictive semivariogram check: {vc.attrs['covariance']}{where}"
        if verdict == "fail":
            cautions.insert(0, "NOT CONVERGED: the fit failed its convergence check; this check inherits its problems")
            title = f"NOT CONVERGED - posterior predictive semivariogram check: {vc.attrs['covariance']}{where}"
        import pandas as pd

        frame = pd.DataFrame({c: vc[c].values for c in TABLE_COLUMNS})
        if args.site is not None:
            frame.insert(0, "site", args.site)  # the label, which the file name may abbreviate
        with add_to_folder(folder, csv_name, overwrite=args.overwrite) as tmp:
            frame.to_csv(tmp, index=False, float_format="%.10g")
        with add_to_folder(folder, fig_name, overwrite=args.overwrite) as tmp:
            save_figure(variogram_check_figure(vc, title=title), tmp)
        bar.update(1)
    obj = {
        "lag": _list(vc["lag"]),
        "observed": _list(vc["observed"]),
        "pairs": [int(v) for v in vc["pairs"].values],
        "replicate_q05": _list(vc["replicate_q05"]),
        "replicate_q50": _list(vc["replicate_q50"]),
        "replicate_q95": _list(vc["replicate_q95"]),
        "model_q05": _list(vc["model_q05"]),
        "model_q50": _list(vc["model_q50"]),
        "model_q95": _list(vc["model_q95"]),
        "p_value": _list(vc["p_value"]),
        "outside_band": int(vc.attrs["outside_band"]),
        "replicates": int(vc.attrs["replicates"]),
        "bins": int(vc.attrs["bins"]),
        "lag_limit": float(vc.attrs["lag_limit"]),
        "seed": int(vc.attrs["seed"]),
        "covariance": vc.attrs["covariance"],
        "site": args.site,
        "transform": vc.attrs["transform"],
        "units": {"lag": vc.attrs["distance_units"], "semivariance": f"({vc.attrs['model_units']})^2"},
        "files": [str(fig_path), str(csv_path)],
        "cautions": cautions,
    }
    if args.json:
        emit_json(obj)
        return 0
    rows = []
    for k in range(len(obj["lag"])):
        rows.append({"lag": obj["lag"][k], "pairs": obj["pairs"][k], "observed": obj["observed"][k],
                     "rep_q05": obj["replicate_q05"][k], "rep_q50": obj["replicate_q50"][k],
                     "rep_q95": obj["replicate_q95"][k], "model_q05": obj["model_q05"][k],
                     "model_q50": obj["model_q50"][k], "model_q95": obj["model_q95"][k],
                     "p_value": obj["p_value"][k], "flag": "OUTSIDE" if vc["outside"].values[k] else ""})
    print(f"posterior predictive semivariogram check: {obj['covariance']}{where}, {obj['replicates']} replicates, "
          f"seed {obj['seed']} (semivariance in {obj['units']['semivariance']}, lag in {obj['units']['lag'] or 'distance units'})")
    print_table(rows, list(rows[0]), floatfmt=".4g")
    print(f"{obj['outside_band']} of {sum(1 for p in obj['pairs'] if p)} bins outside the 90% replicate band; "
          "p_value = share of replicates at or above the observed semivariance")
    print(f"wrote {fig_path} and {csv_path}")
    for c in cautions:
        print(f"caution: {c}")
    return 0
