"""``bayesgeo fit``: fit the single-site Bayesian Gaussian-process model and save the result."""

from __future__ import annotations

from bayesgeo.common.defaults import CHAINS, DRAWS, TUNE

#: Library argument -> option, where the names differ.
ARGUMENT_OPTIONS = {"covariates": "--covariate", "categories": "--category", "baselines": "--baseline",
                    "nugget": "--no-nugget"}

HELP = ("fit the Bayesian GP model (range, partial sill, nugget, trend) to one site's data, or to several "
        "sites at once with --site (hierarchical by default)")


def add_arguments(p) -> None:
    from bayesgeo.cli._common import add_data_options, refuse_renamed
    from bayesgeo.gp.covariance import FAMILIES
    from bayesgeo.common.validate import PriorPairAction, float_option, int_option

    add_data_options(p)
    from bayesgeo.cli._sites import add_site_arguments

    add_site_arguments(p)
    p.add_argument("--covariance", required=True, choices=FAMILIES, metavar="FAMILY",
                   help=f"covariance family: {', '.join(FAMILIES)}")
    p.add_argument("--nu", type=float_option("nu"), default=None, help="Matérn smoothness (family 'matern' only)")
    p.add_argument("--no-nugget", action="store_true", help="fit without a nugget")
    p.add_argument("--trend", type=int_option("trend"), default=0, metavar="ORDER",
                   help="polynomial order of the trend in the coordinates, 0-3 (default 0: constant mean)")
    p.add_argument("--transform", choices=("none", "log"), default="none", help="model log(values) (positive values only)")
    refuse_renamed(p, "--prior-range", "--prior-sd", "--prior-nugget")
    p.add_argument("--range-below", nargs=2, action=PriorPairAction, metavar=("R0", "A1"),
                   help="PC prior: P(practical range < R0) = A1 (default: R0 = 5%% of the largest distance, A1 = 0.05)")
    p.add_argument("--sd-above", nargs=2, action=PriorPairAction, metavar=("S0", "A2"),
                   help="PC prior: P(sd of the field > S0) = A2 (default: S0 = 2 x sd of the detrended values, A2 = 0.05)")
    p.add_argument("--nugget-above", nargs=2, action=PriorPairAction, metavar=("T0", "A3"),
                   help="PC prior: P(nugget sd > T0) = A3 (default as --sd-above)")
    p.add_argument("--approx", choices=("auto", "dense", "nn"), default="auto",
                   help="likelihood: exact dense, nearest-neighbour (Vecchia) approximation, or auto "
                        "(dense up to 2,000 points per site, nn beyond; with --site chosen per site; "
                        "docs/large_data.md)")
    p.add_argument("--neighbours", type=int_option("neighbours"), default=None, metavar="M",
                   help="neighbours per point of the nn likelihood (default 20)")
    p.add_argument("--anisotropy", action="store_true",
                   help="geometric anisotropy: estimate the direction of the longest range (degrees clockwise from "
                        "north) and the ratio of the longest to the shortest range (planar coordinates; with "
                        "--site each site its own; docs/model.md)")
    p.add_argument("--draws", type=int_option("draws"), default=DRAWS, help=f"kept draws per chain (default {DRAWS})")
    p.add_argument("--max-draws", type=int_option("draws"), default=None, metavar="N",
                   help="while the convergence check finds R-hat or ESS too poor, the same chains continue, looking "
                        "again at twice the draws, up to N draws per chain (default 4 x --draws; equal to --draws: "
                        "off; nutpie only); every look is recorded in fit.json")
    p.add_argument("--tune", type=int_option("tune"), default=TUNE, help=f"tuning iterations per chain (default {TUNE})")
    p.add_argument("--chains", type=int_option("chains"), default=CHAINS, help=f"chains (default {CHAINS})")
    p.add_argument("--target-accept", type=float_option("probability"), default=None,
                   help="target acceptance rate (default 0.8, and a fit whose draws hold divergent transitions is sampled "
                        "once more at 0.9, recorded in fit.json; 0.9 with --site, whose population layer needs smaller "
                        "steps); a value given here is used as it is")
    p.add_argument("--seed", type=int_option("seed"), default=None, help="seed (default: a fresh one, recorded in the output)")
    p.add_argument("--sampler", choices=("nutpie", "pymc"), default="nutpie", help="NUTS implementation (default nutpie)")
    p.add_argument("--keep-sampling", type=float_option("positive"), default=None, metavar="MINUTES",
                   help="when the convergence check fails, fit again with fresh chains and twice the tuning and "
                        "draws, until it passes or MINUTES are spent (every attempt is recorded in fit.json; "
                        "single-site fits)")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (posterior.nc, summary.csv, summary.txt, fit.json, prior_check.png)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")


def run(args) -> int:
    """Parse, call :func:`bayesgeo.stages.fit.fit_folder`, print."""
    import sys

    from bayesgeo.cli._common import data_kwargs, emit_json
    from bayesgeo.stages.fit import fit_folder

    def log(text: str) -> None:
        print(f"bayesgeo fit: {text}", file=sys.stderr, flush=True)

    status, report = fit_folder(
        args.data, out=args.out, covariance=args.covariance, nu=args.nu, nugget=not args.no_nugget, trend=args.trend,
        transform=None if args.transform == "none" else args.transform, range_below=args.range_below,
        sd_above=args.sd_above, nugget_above=args.nugget_above, approx=args.approx, neighbours=args.neighbours,
        anisotropy=args.anisotropy,
        sampler=args.sampler, chains=args.chains, draws=args.draws, tune=args.tune, target_accept=args.target_accept,
        seed=args.seed, max_draws=args.max_draws, keep_sampling=args.keep_sampling, pooling=args.pooling,
        parametrisation=args.parametrisation, design_neighbours=args.design_neighbours, overwrite=args.overwrite,
        progressbar=not args.json and sys.stderr.isatty(), log=None if args.json else log, **data_kwargs(args))
    if args.json:
        emit_json(report)
        return status
    if "sites" in report:
        from bayesgeo.fitting.hier_outputs import summary_text_sites

        print(summary_text_sites(report), end="")
    else:
        from bayesgeo.fitting.posterior import summary_text

        print(summary_text(report), end="")
    print(f"wrote {args.out}/ ({', '.join(report['files'])})")
    return status
