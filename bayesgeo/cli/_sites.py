"""The several-site branch of ``bayesgeo fit``: data with a site column (``--site COL``).

``bayesgeo.cli.fit`` calls :func:`run_sites` with its parsed arguments and the data it has read
when the data hold a site column; :func:`add_site_arguments` adds ``--pooling`` and
``--small-sites`` to its parser. Outputs as for one site (``posterior.nc``, ``summary.csv``,
``summary.txt``, ``fit.json``) plus ``shrinkage.csv``/``shrinkage.png`` (pooled against
independent fits per site; not for ``--pooling independent``) and ``design.csv``/``design.png``
(grid spacing against predictive sd for a new site; not for ``--pooling independent``).
"""

from __future__ import annotations

__all__ = ["add_site_arguments", "run_sites"]


def add_site_arguments(p) -> None:
    """``--pooling``, ``--small-sites``, ``--parametrisation`` and ``--design-neighbours`` for the several-site model."""
    from bayesgeo.hierarchical import CENTRED_MIN_POINTS, PARAMETRISATIONS, POOLINGS, SMALL_SITE_POLICIES
    from bayesgeo.cli._common import refuse_renamed
    from bayesgeo.validate import int_option

    p.add_argument("--pooling", choices=POOLINGS, default="hierarchical",
                   help="with --site: share covariance parameters through a population (hierarchical, default), "
                        "not at all (independent) or fully (complete)")
    refuse_renamed(p, "--min-points")
    p.add_argument("--small-sites", choices=SMALL_SITE_POLICIES, default="error",
                   help="with --site: a site with fewer than 10 points is an error (default) or is kept in the "
                        "model with a warning (keep)")
    p.add_argument("--parametrisation", choices=PARAMETRISATIONS, default="noncentred",
                   help="with --site and hierarchical pooling: sample the site effects non-centred (default), "
                        f"centred, or auto (centred for sites of at least {CENTRED_MIN_POINTS} points); the "
                        "posterior is the same, only sampling speed differs")
    p.add_argument("--design-neighbours", type=int_option("design_neighbours"), default=6, metavar="K",
                   help="with --site: grid nodes per side (K x K) used by the sampling-design aid (default 6)")


def _opt(args, name, default):
    value = getattr(args, name, default)
    return default if value is None else value


def run_sites(args, ds) -> int:
    """Fit the several-site model named by ``args`` to ``ds``, write ``args.out``, report.

    Returns the exit status: 0, or 3 when the convergence check fails (as for one site).
    """
    import sys

    from bayesgeo.cli import EXIT_NOT_CONVERGED
    from bayesgeo.cli._common import emit_json
    from bayesgeo.design import design_table
    from bayesgeo.fitted import Fit
    from bayesgeo.diagnostics import check_convergence
    from bayesgeo.hier_outputs import save_site_fit, shrinkage_table, site_report, summary_text_sites, with_site_diagnostics
    from bayesgeo.hierarchical import fit_sites, site_spec
    from bayesgeo.outputs import claim
    from bayesgeo.priors import Priors
    from bayesgeo.validate import InputError, check_positive_int

    claim(args.out, overwrite=args.overwrite, inputs=[args.data])
    if _opt(args, "nugget_above", None):
        raise InputError("--nugget-above: the several-site model puts its prior on the nugget fraction of the sill "
                         "(see docs/hierarchical.md); drop --nugget-above")
    neighbours = check_positive_int(_opt(args, "design_neighbours", 6), "--design-neighbours", minimum=2)
    if neighbours % 2:
        raise InputError(f"--design-neighbours: expected an even number, got {neighbours}")
    pooling = _opt(args, "pooling", "hierarchical")
    transform = _opt(args, "transform", None)
    model_kw = dict(
        covariance=_opt(args, "covariance", "matern32"), nu=_opt(args, "nu", None),
        nugget=not _opt(args, "no_nugget", False), trend=_opt(args, "trend", 0),
        covariates=tuple(_opt(args, "covariate", ())), transform=None if transform == "none" else transform,
        priors=Priors(range=tuple(args.range_below) if _opt(args, "range_below", None) else None,
                      sd=tuple(args.sd_above) if _opt(args, "sd_above", None) else None),
        small_sites=_opt(args, "small_sites", "error"), approx=_opt(args, "approx", "auto"),
        neighbours=_opt(args, "neighbours", None),
    )
    show = not args.json and sys.stderr.isatty()
    # stage lines for long runs (bayesgeo.workload announced them) even when stderr is a log file
    stages = show or (not args.json and bool((getattr(args, "workload", None) or {}).get("message")))
    sample_kw = dict(sampler=_opt(args, "sampler", "nutpie"), chains=_opt(args, "chains", 4),
                     draws=_opt(args, "draws", 1000), tune=_opt(args, "tune", 1000),
                     target_accept=_opt(args, "target_accept", None), progressbar=show,
                     max_draws=_opt(args, "max_draws", None))
    if stages:
        print(f"fitting the {pooling} model ...", file=sys.stderr, flush=True)
    tree = fit_sites(ds, pooling=pooling, seed=_opt(args, "seed", None),
                     parametrisation=_opt(args, "parametrisation", "noncentred"), **model_kw, **sample_kw)
    seed = int(Fit(tree).settings["sampler"]["seed"])  # the independent fit reuses it
    conv = check_convergence(tree)
    tree = with_site_diagnostics(tree, conv.to_json())
    shrink = design = None
    extra = {}
    if pooling != "independent":
        if stages:
            print("fitting each site independently for the shrinkage table ...", file=sys.stderr)
        indep = fit_sites(ds, pooling="independent", seed=seed, **model_kw, **sample_kw)
        shrink = shrinkage_table(tree, indep)
        extra["independent_fit_verdict"] = check_convergence(indep).verdict
        spec = site_spec(tree)
        design = design_table(tree["new_site"].to_dataset(), covariance=spec.covariance,
                              nu=spec.nu if spec.covariance == "matern" else None, neighbours=neighbours,
                              distance_units=spec.distance_units, value_units=spec.model_units)
    save_site_fit(tree, args.out, overwrite=args.overwrite, shrinkage=shrink, design=design)
    report = site_report(tree, shrinkage=shrink, design=design)
    report.update(extra)
    report["out"] = str(args.out)
    report["workload"] = getattr(args, "workload", None)  # bayesgeo.workload plan, from bayesgeo.cli.fit
    if args.json:
        emit_json(report)
    else:
        print(summary_text_sites(report), end="")
        files = "posterior.nc, summary.csv, summary.txt, fit.json"
        if shrink is not None:
            files += ", shrinkage.csv, shrinkage.png, design.csv, design.png"
        print(f"wrote {args.out}/ ({files})")
    return EXIT_NOT_CONVERGED if conv.verdict == "fail" else 0
