"""``bayesgeo explore``: semivariogram, correlogram, directional semivariograms and quick fits.

Output folder (default ``<data stem>-explore``; an existing folder is refused unless
``--overwrite``; written atomically, so a failed run leaves no half folder):

* one site (no ``--site``): ``semivariogram.png``, ``correlogram.png``, ``directional.png``,
  ``semivariogram.csv``, ``correlogram.csv``, ``directional.csv``, ``fits.csv`` and
  ``explore.json`` directly in the folder;
* several sites (``--site COL``): the same figures and tables in one sub-folder per site (named
  by :func:`bayesgeo.common.sitenames.site_file_name`; each CSV has a ``site`` column with the label),
  ``explore.json`` and a ``fits.csv`` of every site (with a ``site`` column) at the top.

``explore.json`` holds the same object ``--json`` prints. Its top-level statistics (``n``,
``semivariogram``, ``correlogram``, ``directional``, ``fits``, ...) describe the only site, or
the first site in file order (named by ``"site"``); with ``--site``, ``"sites"`` maps every site
label to its own object of the same keys. NaN (an empty bin, no envelope) is written as null.
"""

from __future__ import annotations

HELP = "semivariogram, correlogram, directions and quick covariance fits (exploratory)"

DESCRIPTION = HELP + (
    ". Writes figures (PNG), tables (CSV) and explore.json into the --out folder: directly for one "
    "site; with --site, one sub-folder per site plus explore.json and fits.csv (all sites) at the top, "
    "and in JSON the top-level statistics describe the first site while \"sites\" maps each site label "
    "to its own statistics."
)

#: Library argument -> option, where the names differ.
ARGUMENT_OPTIONS = {"covariates": "--covariate", "categories": "--category", "baselines": "--baseline"}


def add_arguments(p) -> None:
    from bayesgeo.cli._common import add_data_options, refuse_renamed
    from bayesgeo.explore.quickfit import QUICK_FAMILIES
    from bayesgeo.common.validate import float_option, int_option

    p.description = DESCRIPTION
    add_data_options(p)
    p.add_argument("--trend", type=int_option("trend"), default=0, metavar="ORDER",
                   help="polynomial trend order in the coordinates, 0-3 (default 0: constant mean)")
    p.add_argument("--transform", choices=("none", "log"), default="none",
                   help="analyse the values as they are (none) or their natural logarithm (log; positive values only)")
    p.add_argument("--bins", type=int_option("bins"), default=15, metavar="N", help="number of lag bins (default 15)")
    refuse_renamed(p, "--max-lag")
    p.add_argument("--lag-limit", type=float_option("positive"), default=None, metavar="D",
                   help="largest lag in distance units (default: half the largest distance between points)")
    p.add_argument("--permutations", type=int_option("permutations"), default=99, metavar="N",
                   help="random permutations for the envelopes and p-values (default 99; 0 for none)")
    p.add_argument("--estimator", choices=("classical", "cressie-hawkins"), default="classical",
                   help="semivariogram estimator (default classical)")
    p.add_argument("--covariance", nargs="+", choices=QUICK_FAMILIES, default=None, metavar="FAMILY",
                   help=f"covariance families to fit (default all: {', '.join(QUICK_FAMILIES)})")
    p.add_argument("--seed", type=int_option("seed"), default=1, metavar="S", help="seed of the permutations (default 1)")
    p.add_argument("--out", metavar="DIR", default=None, help="output folder (default <data stem>-explore)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout and nothing else there")


def run(args) -> int:
    """Parse, call :func:`bayesgeo.stages.explore.explore_folder`, print."""
    import sys

    from bayesgeo.cli._common import data_kwargs, emit_json, print_table, progress
    from bayesgeo.stages.explore import explore_folder

    def log(text: str) -> None:
        print(f"bayesgeo explore: {text}", file=sys.stderr, flush=True)

    _, obj = explore_folder(args.data, out=args.out, trend=args.trend, transform=args.transform, bins=args.bins,
                            lag_limit=args.lag_limit, permutations=args.permutations, estimator=args.estimator,
                            covariance=args.covariance, seed=args.seed, overwrite=args.overwrite,
                            progress=None if args.json else progress, log=None if args.json else log,
                            **data_kwargs(args))
    if args.json:
        emit_json(obj)
        return 0
    objects = obj.get("sites") or {"": obj}
    multi = "sites" in obj
    for label, o in objects.items():
        head = f"site {label}: " if multi else ""
        du, vu = o["distance_units"], o["value_units"]
        print(f"{head}{o['n']} points; variable {o['variable']}; trend order {o['trend']['order']}")
        rows = []
        for method, fams in o["fits"].items():
            for fam, f in fams.items():
                rows.append({"method": method, "family": fam, "nugget": f["nugget"],
                             "partial_sill": f["partial_sill"], "practical_range": f["practical_range"],
                             "converged": "yes" if f["converged"] else "NO"})
        print_table(rows, ["method", "family", "nugget", "partial_sill", "practical_range", "converged"])
        print(f"(nugget and partial sill in {f'({vu})^2' if vu else 'squared value units'}; "
              f"practical range in {du or 'distance units'})")
        an = o.get("anisotropy")
        if an and an.get("ratio"):
            print(f"directions: the ranges suggest a longest range near {an['angle']:.0f} degrees (clockwise from "
                  f"north) and a ratio of about {an['ratio']:.1f} (a rough guess; fit --anisotropy estimates both)")
        for note in o["notes"]:
            print(f"note: {note}")
        print()
    print(f"wrote {len(obj['files'])} files to {obj['out']}/")
    for c in obj["cautions"]:
        print(f"caution: {c}")
    return 0
