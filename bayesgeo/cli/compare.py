"""``bayesgeo compare DIR1 DIR2 ...``: rank fits of the same data by PSIS-LOO.

Each fit folder holds ``posterior.nc`` from ``bayesgeo fit``. Exact Gaussian leave-one-out
densities are computed per draw (or read from a stored ``log_likelihood`` group) in data units, so
fits with and without a log transform compare fairly. Fits of different data are refused (exit 2).

Several-site fits (``bayesgeo fit --site``, any ``--pooling``) compare like single-site ones: each
point's leave-one-out density conditions on its own site's points only (sites are independent given
the parameters), and the ranking gains a ``pooling`` column and, when every fit is a several-site
fit, ``by_site`` (elpd per site and fit, with its standard error). ``--site NAME`` compares the
fits on that site's points only.

With ``--out DIR`` the folder (written atomically; an existing one is refused unless
``--overwrite``) receives ``comparison.csv`` (the ranking), ``pointwise.csv`` (elpd and Pareto k per
point and fit), ``loo_pit.png`` (LOO-PIT calibration of every fit) and ``comparison.json`` (the
object ``--json`` prints). Without ``--out`` nothing is written. ``--store`` adds the
``log_likelihood`` group to each fit's ``posterior.nc`` that lacks one (atomic rewrite).
"""

from __future__ import annotations

HELP = "rank fits of the same data by leave-one-out predictive accuracy (PSIS-LOO)"

COLUMNS = ("fit", "covariance", "pooling", "elpd_loo", "se", "elpd_diff", "dse", "p_loo", "pareto_k_high")


def add_arguments(p) -> None:
    p.add_argument("dirs", metavar="DIR", nargs="+", help="fit folders (each holding posterior.nc), two or more")
    p.add_argument("--site", metavar="NAME", default=None,
                   help="with several-site fits: compare on this site's points only")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="folder for the ranking tables, the LOO-PIT figure and comparison.json (default: none)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing --out folder")
    p.add_argument("--store", action="store_true",
                   help="also store the leave-one-out log_likelihood group in each fit's posterior.nc (atomic "
                        "rewrite; fits that already hold one are left as they are) so later comparisons reuse it")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout and nothing else there")


def _names(dirs) -> list[str]:
    """Fit names: the folder names, made unique with their parent when two share a name."""
    from pathlib import Path

    paths = [Path(d) for d in dirs]
    names = [p.name or str(p) for p in paths]
    if len(set(names)) < len(names):
        names = [str(p) for p in paths]
    return names


def _verdicts(name, fit) -> list[str]:
    verdict = fit.stored_verdict
    if verdict == "fail":
        return [f"NOT CONVERGED: {name} failed its convergence check; its elpd is not to be trusted"]
    if verdict is None:
        return [f"{name}: convergence not checked (run 'bayesgeo check' on it)"]
    return []


def _refuse_non_finite(res, folders: dict) -> None:
    """A fit whose elpd, its se or p_loo is NaN or infinite is never ranked: exit 2 naming the fit folder."""
    import math

    from bayesgeo.validate import InputError

    for k, name in enumerate(res["fit"].values):
        for var in ("elpd_loo", "se", "p_loo"):
            value = float(res[var].values[k])
            if not math.isfinite(value):
                raise InputError(f"{folders.get(str(name), name)}: {var} = {value} (leave-one-out densities not "
                                 "finite for some points); the fits cannot be ranked: check this fit ('bayesgeo "
                                 "check') and its data")


def build_result(dirs, *, bar=None, store: bool = False, site: str | None = None,
                 progress=None) -> tuple[dict, object, dict]:
    """Open the fits, compare them and compute their LOO-PIT: (JSON object, ranking Dataset, PITs).

    ``progress`` is a bar factory for the long nearest-neighbour leave-one-out of nn fits
    (:func:`bayesgeo.modelcheck.compare_fits`); ``None`` shows none.
    """
    from bayesgeo.modelcheck import compare_fits, open_fit
    from bayesgeo.validate import InputError

    if len(dirs) < 2:
        raise InputError(f"compare: give at least two fit folders (got {len(dirs)})")
    names = _names(dirs)
    if len(set(names)) < len(names):
        raise InputError("compare: the same fit folder is given twice")
    trees = {}
    cautions = []
    for name, d in zip(names, dirs):
        fit = open_fit(d, sites=True)
        trees[name] = fit.tree
        cautions += _verdicts(name, fit)
        if bar is not None:
            bar.update(1)
    res = compare_fits(trees, site=site, progress=progress)
    _refuse_non_finite(res, dict(zip(names, dirs)))
    if store:
        from bayesgeo.modelcheck import store_log_likelihood

        for name, d in zip(names, dirs):
            if "log_likelihood" not in trees[name].children:
                store_log_likelihood(d)
    if bar is not None:
        bar.update(len(trees))
    pits = {str(name): res["loo_pit"].sel(fit=name) for name in res["fit"].values}
    ranking = []
    for k, name in enumerate(res["fit"].values):
        row = res.isel(fit=k)
        ranking.append({
            "fit": str(name), "path": str(dirs[names.index(str(name))]), "covariance": str(row["covariance"].values),
            "transform": str(row["transform"].values), "pooling": str(row["pooling"].values), "elpd_loo": float(row["elpd_loo"]), "se": float(row["se"]),
            "elpd_diff": float(row["elpd_diff"]), "dse": float(row["dse"]), "p_loo": float(row["p_loo"]),
            "weight": float(row["weight"]), "pareto_k_high": int(row["pareto_k_high"]),
            "pareto_k_max": float(row["pareto_k_max"]),
        })
    obj = {
        "ranking": ranking,
        "n": int(res.attrs["n"]),
        "k_threshold": res.attrs["k_threshold"],
        "k_threshold_source": res.attrs["k_threshold_source"],
        "site": site,
        "method": res.attrs["method"],
        "units": res.attrs["units"],
        "cautions": cautions + list(res.attrs["cautions"]),
    }
    if "elpd_site" in res:
        obj["by_site"] = {
            str(s): {"n": int(res["n_site"].sel(site=s)),
                     "elpd": {str(f): float(res["elpd_site"].sel(fit=f, site=s)) for f in res["fit"].values},
                     "se": {str(f): float(res["se_site"].sel(fit=f, site=s)) for f in res["fit"].values}}
            for s in res["site"].values}
    return obj, res, pits


def run(args) -> int:
    import functools
    from pathlib import Path

    from bayesgeo.cli._common import emit_json, print_table, progress, to_jsonable
    from bayesgeo.io import write_json
    from bayesgeo.outputs import claim, new_folder

    out = Path(args.out) if args.out else None
    if out is not None:
        claim(out, overwrite=args.overwrite, inputs=args.dirs)
    bar = progress(total=2 * len(args.dirs), desc="compare", enabled=not args.json)
    with bar:
        obj, res, pits = build_result(args.dirs, bar=bar, store=args.store, site=args.site,
                                      progress=functools.partial(progress, enabled=not args.json))
    files = []
    if out is not None:
        from bayesgeo.check_figures import loo_pit_figure
        from bayesgeo.figures import save_figure

        with new_folder(out, overwrite=args.overwrite) as tmp:
            table = res[["rank", "covariance", "pooling", "transform", "elpd_loo", "se", "elpd_diff", "dse", "p_loo", "weight",
                         "pareto_k_high", "pareto_k_max"]].to_dataframe()
            table.to_csv(tmp / "comparison.csv", float_format="%.10g")
            point = res[["elpd_i", "pareto_k"]].to_dataframe()
            point.to_csv(tmp / "pointwise.csv", float_format="%.10g")
            save_figure(loo_pit_figure(pits), tmp / "loo_pit.png")
            files = ["comparison.csv", "pointwise.csv", "loo_pit.png", "comparison.json"]
            if "elpd_site" in res:
                res[["elpd_site", "se_site", "n_site"]].to_dataframe().to_csv(tmp / "by_site.csv", float_format="%.10g")
                files.insert(2, "by_site.csv")
            obj["out"] = str(out)
            obj["files"] = files
            write_json(tmp / "comparison.json", to_jsonable(obj))
    if args.json:
        emit_json(obj)
        return 0
    where = f" at site {obj['site']}" if obj["site"] else ""
    print(f"PSIS-LOO comparison of {len(obj['ranking'])} fits of {obj['n']} points{where} "
          f"(elpd: log density of the data in data units; higher is better)")
    rows = [{c: r[c] for c in COLUMNS} for r in obj["ranking"]]
    print_table(rows, list(COLUMNS), floatfmt=".2f")
    if "by_site" in obj:
        fits = [r["fit"] for r in obj["ranking"]]
        print()
        print("elpd_loo by site (se in brackets):")
        site_rows = [{"site": s, "n": b["n"], **{f: f"{b['elpd'][f]:.2f} ({b['se'][f]:.2f})" for f in fits}}
                     for s, b in obj["by_site"].items()]
        print_table(site_rows, ["site", "n", *fits])
    print(f"pareto_k_high: points with Pareto k > {obj['k_threshold']:g} ({obj['k_threshold_source']})")
    if files:
        print(f"wrote {len(files)} files to {out}/")
    for c in obj["cautions"]:
        print(f"caution: {c}")
    return 0
