"""``bayesgeo check DIR``: convergence diagnostics of a fit folder, with a verdict and figures.

Reads ``DIR/posterior.nc``; writes ``DIR/diagnostics/`` (atomically) with ``diagnostics.json``
and the figures. An earlier ``diagnostics/`` is left as it is (the verdict is still computed and
printed) unless ``--overwrite`` replaces it (docs/outputs.md). Exit status 0 on pass or warn, 3 on fail, 2 on bad input.

A several-site fit (``bayesgeo fit --site``) keeps one verdict for the whole posterior (every
site's parameters and every hyperparameter) and adds ``sites`` (one block per site: worst R-hat,
smallest bulk and tail ESS, the site's own verdict and problems) and ``population`` (the same for
the parameters without a site index) to ``diagnostics.json`` and to the printed report
(:func:`bayesgeo.diagnostics.site_convergence`).
"""

from __future__ import annotations

HELP = "check convergence of a fitted posterior (R-hat, ESS, MCSE, divergences, E-BFMI, tree depth)"

DIAGNOSTICS_DIR = "diagnostics"
POSTERIOR_FILE = "posterior.nc"


def add_arguments(p) -> None:
    from bayesgeo.cli._common import refuse_renamed
    from bayesgeo.validate import int_option

    p.add_argument("dir", metavar="DIR", help=f"fit folder holding {POSTERIOR_FILE}")
    p.add_argument("--var", metavar="NAME", action="append", default=[],
                   help="posterior variable to check (repeatable; default all)")
    refuse_renamed(p, "--max-lag")
    p.add_argument("--lag-limit", type=int_option("autocorr_lag"), default=None, metavar="K",
                   help="largest lag of the autocorrelation figure (default: 3 x the largest IAT, at least 20)")
    p.add_argument("--no-figures", action="store_true", help="skip the figures (diagnostics.json only)")
    p.add_argument("--overwrite", action="store_true",
                   help=f"replace {DIAGNOSTICS_DIR}/ from an earlier check (kept otherwise; the verdict is printed either way)")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")


def read_posterior(folder):
    """Open ``folder/posterior.nc`` as a DataTree (loaded into memory); InputError if impossible."""
    from pathlib import Path

    from bayesgeo.validate import InputError

    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: no such folder; expected a fit folder holding {POSTERIOR_FILE}")
    path = folder / POSTERIOR_FILE
    if not path.is_file():
        raise InputError(f"{path}: not found; run a fit into {folder} first")
    from bayesgeo.fitfile import read_fit

    # a bare posterior from another program is fine; a bayesgeo fit (settings present) is checked in full
    return read_fit(path, require_fit=False)


def run(args) -> int:
    import sys
    from pathlib import Path

    from bayesgeo.cli import EXIT_NOT_CONVERGED
    from bayesgeo.cli._common import emit_json, print_table, progress
    from bayesgeo.diagnostics import CAUTION, check_convergence, site_convergence
    from bayesgeo.outputs import check_addable
    from bayesgeo.validate import InputError

    folder = Path(args.dir)
    tree = read_posterior(folder)
    if args.lag_limit is not None and args.lag_limit < 1:
        raise InputError(f"--lag-limit: expected an integer >= 1, got {args.lag_limit}")
    outdir = folder / DIAGNOSTICS_DIR
    keep = (outdir.exists() or outdir.is_symlink()) and not args.overwrite
    if not keep:
        check_addable(folder, DIAGNOSTICS_DIR, overwrite=args.overwrite)
    bar = progress(total=2 if keep or args.no_figures else 3, desc="check", enabled=not args.json)
    try:
        conv = check_convergence(tree, var_names=args.var or None)
    except InputError as err:  # the posterior's shape: name the file it came from
        raise InputError(f"{folder / POSTERIOR_FILE}: {err}") from None
    bar.update()
    result = conv.to_json()
    from bayesgeo.posterior import approximation_of

    result["approximation"] = approximation_of(tree)
    by_site = site_convergence(tree, conv)
    if by_site is not None:
        result.update(sites=by_site["sites"], population=by_site["population"], site_note=by_site["note"])
    if keep:
        result.update(posterior=str(folder / POSTERIOR_FILE), diagnostics=None, figures=[], figure_error=None,
                      kept=str(outdir))
        bar.update()
    else:
        _write(folder, args, tree, result, bar)
    bar.close()
    if result["figure_error"]:
        print(f"bayesgeo check: warning: figures not drawn ({result['figure_error']})", file=sys.stderr)

    if args.json:
        emit_json(result)
    else:
        _print_human(conv, result, print_table, CAUTION)
    return EXIT_NOT_CONVERGED if conv.verdict == "fail" else 0


def _write(folder, args, tree, result: dict, bar) -> None:
    """Write ``DIAGNOSTICS_DIR`` (diagnostics.json and the figures) into the fit folder; adds the
    file names to ``result``."""
    from bayesgeo.io import write_json
    from bayesgeo.outputs import add_to_folder
    from bayesgeo.validate import InputError

    outdir = folder / DIAGNOSTICS_DIR
    figures, figure_error = [], None
    with add_to_folder(folder, DIAGNOSTICS_DIR, overwrite=args.overwrite, kind="dir") as tmp:
        if not args.no_figures:
            from bayesgeo.diagnostic_figures import write_diagnostic_figures

            try:
                written = write_diagnostic_figures(tree, tmp, var_names=args.var or None, lag_limit=args.lag_limit)
                figures = [str(outdir / p.name) for p in written]
            except InputError:
                raise
            except Exception as err:  # a figure must not hide the verdict
                figure_error = " ".join(f"{type(err).__name__}: {err}".split())
            bar.update()
        result.update(posterior=str(folder / POSTERIOR_FILE), diagnostics=str(outdir / "diagnostics.json"),
                      figures=figures, figure_error=figure_error)
        write_json(tmp / "diagnostics.json", result)
        bar.update()


def _print_human(conv, result, print_table, caution) -> None:
    ps = conv.parameters
    fmt = {"rhat": "{:.3f}", "ess_bulk": "{:.0f}", "ess_tail": "{:.0f}", "mcse_mean": "{:.3g}", "iat": "{:.3g}"}
    rows = [{"parameter": str(p), **{c: _fmt(f, ps[c].values[i]) for c, f in fmt.items()}}
            for i, p in enumerate(ps["parameter"].values)]
    print(f"{conv.n_chains} chains x {conv.n_draws} draws (sampler: {conv.sampler})")
    print_table(rows, ["parameter", "rhat", "ess_bulk", "ess_tail", "mcse_mean", "iat"])
    print()
    print(f"divergent transitions: {conv.divergences} ({100 * conv.divergence_share:.2f}%)"
          + (f", per chain {conv.divergences_per_chain}" if conv.divergences_per_chain else ""))
    if conv.bfmi:
        print("E-BFMI per chain: " + ", ".join(f"{v:.3f}" for v in conv.bfmi))
    share = conv.tree_depth.get("saturation_share")
    if share is not None:
        print(f"transitions at maximum tree depth: {100 * share:.2f}%"
              + (f" (max depth {conv.tree_depth['max_depth']})" if conv.tree_depth.get("max_depth") else ""))
    if conv.step_size:
        print("step size per chain: " + ", ".join(f"{v:.3g}" for v in conv.step_size))
    for note in conv.notes:
        print(f"note: {note}")
    if conv.problems:
        print()
        print("problems (the same check on several parameters is listed once):")
        for (_, level), group in _grouped(conv.problems).items():
            print(f"  [{level.upper()}] " + "; ".join(p["message"] for p in group))
            print(f"      threshold source: {group[0]['source']}")
            print(f"      advice: {group[0]['advice']}")
    if "sites" in result:
        _print_sites(result, print_table)
    appr = result.get("approximation")
    if appr:
        _print_approximation(appr, print_table)
    print()
    print(f"verdict: {conv.verdict.upper()}" + (" (whole posterior)" if "sites" in result else ""))
    print(f"caution: {caution}")
    if result.get("kept"):
        print(f"note: {result['kept']} from an earlier check was left as it is; pass --overwrite to replace it")
    else:
        print(f"wrote {result['diagnostics']}" + (f" and {len(result['figures'])} figures" if result["figures"] else ""))


def _print_sites(result: dict, print_table) -> None:
    """One row per site (and the population): verdict, worst R-hat, smallest ESS."""
    blocks = [(f"site {k}", b) for k, b in result["sites"].items()]
    if result.get("population"):
        blocks.append(("population", result["population"]))
    rows = [{"block": name, "verdict": b["verdict"].upper(), "parameters": b["parameters"],
             "worst_rhat": _fmt("{:.3f}", b["worst_rhat"]), "min_ess_bulk": _fmt("{:.0f}", b["min_ess_bulk"]),
             "min_ess_tail": _fmt("{:.0f}", b["min_ess_tail"]), "worst_rhat_at": b["worst_rhat_parameter"] or "n/a"}
            for name, b in blocks]
    print()
    print("per site:")
    print_table(rows, ["block", "verdict", "parameters", "worst_rhat", "min_ess_bulk", "min_ess_tail", "worst_rhat_at"])
    print(f"note: {result['site_note']}")


def _grouped(problems: list[dict]) -> dict:
    """Problems grouped by (check, level), in order of first appearance."""
    groups: dict = {}
    for p in problems:
        groups.setdefault((p.get("check", p["item"]), p["level"]), []).append(p)
    return groups


def _fmt(template: str, value) -> str:
    value = float("nan") if value is None else float(value)
    return template.format(value) if value == value else "n/a"


def _print_approximation(appr: dict, print_table) -> None:
    """The nearest-neighbour approximation check: one table (single site) or one per nn site."""
    checks = {"": appr} if "parameters" in appr else {f" (site {k})": v for k, v in appr.items()}
    cols = ("nn_sd", "nn_sampling_sd", "exact_sd", "width_ratio", "efficiency", "shift_sd")
    for label, one in checks.items():
        print()
        print(f"nearest-neighbour approximation{label}: {one['status'].upper()}")
        print_table([{"parameter": p, **{c: _fmt("{:.3g}", one[p].get(c)) for c in cols}} for p in one["parameters"]],
                    ["parameter", *cols])
        print(f"  {one['message']}")
