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

#: Library argument -> what the command line calls it.
ARGUMENT_OPTIONS = {"dirs": "DIR"}

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


def run(args) -> int:
    """Parse, call :func:`bayesgeo.stages.compare.compare_folders`, print."""
    from bayesgeo.cli._common import emit_json, print_table, progress
    from bayesgeo.stages.compare import compare_folders

    _, obj = compare_folders(args.dirs, site=args.site, out=args.out, overwrite=args.overwrite, store=args.store,
                             progress=None if args.json else progress)
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
    if obj.get("files"):
        print(f"wrote {len(obj['files'])} files to {obj['out']}/")
    for c in obj["cautions"]:
        print(f"caution: {c}")
    return 0
