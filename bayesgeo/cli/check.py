"""``bayesgeo check DIR``: convergence diagnostics of a fit folder, with a verdict and figures.

Reads ``DIR/posterior.nc``; writes ``DIR/diagnostics/`` (atomically) with ``diagnostics.json``
and the figures. An earlier ``diagnostics/`` is left as it is (the verdict is still computed and
printed) unless ``--overwrite`` replaces it (docs/outputs.md). Exit status 0 on pass or warn, 3 on fail, 2 on bad input.

A several-site fit (``bayesgeo fit --site``) keeps one verdict for the whole posterior (every
site's parameters and every hyperparameter) and adds ``sites`` (one block per site: worst R-hat,
smallest bulk and tail ESS, the site's own verdict and problems) and ``population`` (the same for
the parameters without a site index) to ``diagnostics.json`` and to the printed report
(:func:`bayesgeo.convergence.sites.site_convergence`).
"""

from __future__ import annotations

from bayesgeo.common.layout import DIAGNOSTICS_DIR
from bayesgeo.common.layout import FIT_FILE as POSTERIOR_FILE

HELP = "check convergence of a fitted posterior (R-hat, ESS, MCSE, divergences, E-BFMI, tree depth)"

#: Library argument -> option, where the names differ.
ARGUMENT_OPTIONS = {"var_names": "--var", "figures": "--no-figures"}


def add_arguments(p) -> None:
    from bayesgeo.cli._common import refuse_renamed
    from bayesgeo.common.validate import int_option

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


def run(args) -> int:
    """Parse, call :func:`bayesgeo.stages.check.check_fit`, print."""
    import sys

    from bayesgeo.cli._common import emit_json, print_table, progress
    from bayesgeo.convergence.diagnostics import CAUTION
    from bayesgeo.stages.check import check_fit

    status, result = check_fit(args.dir, var_names=args.var or None, lag_limit=args.lag_limit,
                               figures=not args.no_figures, overwrite=args.overwrite,
                               progress=None if args.json else progress)
    if result["figure_error"]:
        print(f"bayesgeo check: warning: figures not drawn ({result['figure_error']})", file=sys.stderr)
    if args.json:
        emit_json(result)
    else:
        _print_human(result, print_table, CAUTION)
    return status


def _print_human(r: dict, print_table, caution) -> None:
    fmt = {"rhat": "{:.3f}", "ess_bulk": "{:.0f}", "ess_tail": "{:.0f}", "mcse_mean": "{:.3g}", "iat": "{:.3g}"}
    rows = [{"parameter": name, **{c: _fmt(f, vals.get(c)) for c, f in fmt.items()}}
            for name, vals in r["parameters"].items()]
    print(f"{r['n_chains']} chains x {r['n_draws']} draws (sampler: {r['sampler']})")
    print_table(rows, ["parameter", "rhat", "ess_bulk", "ess_tail", "mcse_mean", "iat"])
    print()
    print(f"divergent transitions: {r['divergences']} ({100 * r['divergence_share']:.2f}%)"
          + (f", per chain {r['divergences_per_chain']}" if r["divergences_per_chain"] else ""))
    if r["bfmi"]:
        print("E-BFMI per chain: " + ", ".join(f"{v:.3f}" for v in r["bfmi"]))
    share = r["tree_depth"].get("saturation_share")
    if share is not None:
        print(f"transitions at maximum tree depth: {100 * share:.2f}%"
              + (f" (max depth {r['tree_depth']['max_depth']})" if r["tree_depth"].get("max_depth") else ""))
    if r["step_size"]:
        print("step size per chain: " + ", ".join(f"{v:.3g}" for v in r["step_size"]))
    for note in r["notes"]:
        print(f"note: {note}")
    if r["problems"]:
        print()
        print("problems (the same check on several parameters is listed once):")
        for (_, level), group in _grouped(r["problems"]).items():
            print(f"  [{level.upper()}] " + "; ".join(p["message"] for p in group))
            print(f"      threshold source: {group[0]['source']}")
            print(f"      advice: {group[0]['advice']}")
    if "sites" in r:
        _print_sites(r, print_table)
    appr = r.get("approximation")
    if appr:
        _print_approximation(appr, print_table)
    print()
    print(f"verdict: {r['verdict'].upper()}" + (" (whole posterior)" if "sites" in r else ""))
    print(f"caution: {caution}")
    if r.get("kept"):
        print(f"note: {r['kept']} from an earlier check was left as it is; pass --overwrite to replace it")
    else:
        print(f"wrote {r['diagnostics']}" + (f" and {len(r['figures'])} figures" if r["figures"] else ""))


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
