"""``bayesgeo fit``: fit the single-site Bayesian Gaussian-process model and save the result."""

from __future__ import annotations

from bayesgeo.defaults import CHAINS, DRAWS, TUNE

HELP = ("fit the Bayesian GP model (range, partial sill, nugget, trend) to one site's data, or to several "
        "sites at once with --site (hierarchical by default)")


def add_arguments(p) -> None:
    from bayesgeo.cli._common import add_data_options, refuse_renamed
    from bayesgeo.covariance import FAMILIES
    from bayesgeo.validate import PriorPairAction, float_option, int_option

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
    import sys

    from bayesgeo.cli import EXIT_NOT_CONVERGED
    from bayesgeo.cli._common import emit_json, read_data
    from bayesgeo.diagnostics import check_convergence
    from bayesgeo.outputs import claim
    from bayesgeo.posterior import summary_text, fit, fit_report, save_fit, with_diagnostics
    from bayesgeo.priors import Priors

    if args.approx == "dense" and args.neighbours is not None:
        from bayesgeo.validate import InputError

        raise InputError("--neighbours: applies to the nearest-neighbour likelihood (--approx nn, or auto above "
                         "2,000 points per site); drop it with --approx dense")
    max_draws = _max_draws(args)
    claim(args.out, overwrite=args.overwrite, inputs=[args.data])  # refuse before minutes of sampling, not after
    ds = read_data(args)
    from bayesgeo.data import sites_of

    args.workload = _announce(args, ds)
    if len(sites_of(ds)) > 1:
        if args.keep_sampling is not None:
            from bayesgeo.validate import InputError

            raise InputError("--keep-sampling: single-site fits only for now; run without it and check each site")
        from bayesgeo.cli._sites import run_sites

        return run_sites(args, ds)
    stage = _stage_logger(args)
    stage("compiling the model, then sampling (the nutpie bar shows draws when stderr is a terminal)")
    priors = Priors(range=tuple(args.range_below) if args.range_below else None,
                    sd=tuple(args.sd_above) if args.sd_above else None,
                    nugget=tuple(args.nugget_above) if args.nugget_above else None)
    show = not args.json and sys.stderr.isatty()
    kw = dict(covariance=args.covariance, nu=args.nu, nugget=not args.no_nugget, trend=args.trend,
              covariates=tuple(args.covariate), transform=None if args.transform == "none" else args.transform,
              priors=priors, sampler=args.sampler, chains=args.chains, draws=args.draws, tune=args.tune,
              target_accept=args.target_accept, seed=args.seed,
              progressbar=show, approx=args.approx, neighbours=args.neighbours, max_draws=max_draws)
    if args.keep_sampling is not None:
        from bayesgeo.keep_sampling import fit_until_converged

        tree, conv = fit_until_converged(ds, budget_minutes=args.keep_sampling, **kw)
    else:
        tree = fit(ds, **kw)
        stage("checking convergence")
        conv = check_convergence(tree)
    tree = with_diagnostics(tree, conv.to_json())
    stage(f"writing {args.out}")
    save_fit(tree, args.out, overwrite=args.overwrite)
    report = fit_report(tree)
    report["out"] = str(args.out)
    report["workload"] = args.workload
    if args.json:
        emit_json(report)
    else:
        print(summary_text(report), end="")
        print(f"wrote {args.out}/ (posterior.nc, summary.csv, summary.txt, fit.json, prior_check.png)")
    return EXIT_NOT_CONVERGED if conv.verdict == "fail" else 0


def _max_draws(args) -> int | None:
    """--max-draws, refused below --draws (one line) before any sampling; None keeps the default."""
    from bayesgeo.looks import longest_chain

    value = getattr(args, "max_draws", None)
    return None if value is None else longest_chain(args.draws, value)


def _announce(args, ds) -> dict:
    """Say on stderr what a large fit will do and roughly how long it takes (bayesgeo.workload); the plan
    goes into the JSON object as ``workload`` instead when --json is given."""
    import sys

    import numpy as np

    from bayesgeo.data import sites_of
    from bayesgeo.validate import InputError
    from bayesgeo.workload import fit_plan, format_bytes, physical_memory_bytes

    labels = sites_of(ds)
    sizes = ({lab: int(np.count_nonzero(ds["site"].values == lab)) for lab in labels} if len(labels) > 1
             else {"": int(ds.sizes["obs"])})
    pooled = len(labels) > 1 and getattr(args, "pooling", "hierarchical") != "independent"
    plan = fit_plan(sizes, approx=args.approx, neighbours=args.neighbours, chains=args.chains, draws=args.draws,
                    tune=args.tune, fits=2 if pooled else 1, max_draws=getattr(args, "max_draws", None))
    ram = physical_memory_bytes()
    if ram is not None and plan["dense_memory_bytes"] > ram:
        raise InputError(f"--approx {args.approx}: the dense likelihood of {plan['largest_site']:,} points with "
                         f"{args.chains} chains needs about {format_bytes(plan['dense_memory_bytes'])} of memory; this "
                         f"machine has {format_bytes(ram)}: use --approx nn (or auto), docs/large_data.md")
    if plan["message"] and not args.json:
        print(f"bayesgeo fit: note: {plan['message']}", file=sys.stderr, flush=True)
    return plan


def _stage_logger(args):
    """One stderr line per long step, for runs the workload plan announced (silent otherwise and with --json)."""
    import sys

    enabled = bool(getattr(args, "workload", None) and args.workload.get("message")) and not args.json

    def stage(text: str) -> None:
        if enabled:
            print(f"bayesgeo fit: {text} ...", file=sys.stderr, flush=True)

    return stage
