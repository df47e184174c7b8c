"""``bayesgeo explore``: semivariogram, correlogram, directional semivariograms and quick fits.

Output folder (default ``<data stem>-explore``; an existing folder is refused unless
``--overwrite``; written atomically, so a failed run leaves no half folder):

* one site (no ``--site``): ``semivariogram.png``, ``correlogram.png``, ``directional.png``,
  ``semivariogram.csv``, ``correlogram.csv``, ``directional.csv``, ``fits.csv`` and
  ``explore.json`` directly in the folder;
* several sites (``--site COL``): the same figures and tables in one sub-folder per site (named
  by :func:`bayesgeo.sitenames.site_file_name`; each CSV has a ``site`` column with the label),
  ``explore.json`` and a ``fits.csv`` of every site (with a ``site`` column) at the top.

``explore.json`` holds the same object ``--json`` prints. Its top-level statistics (``n``,
``semivariogram``, ``correlogram``, ``directional``, ``fits``, ...) describe the only site, or
the first site in file order (named by ``"site"``); with ``--site``, ``"sites"`` maps every site
label to its own object of the same keys. NaN (an empty bin, no envelope) is written as null.
"""

from __future__ import annotations

import warnings

HELP = "semivariogram, correlogram, directions and quick covariance fits (exploratory)"

DESCRIPTION = HELP + (
    ". Writes figures (PNG), tables (CSV) and explore.json into the --out folder: directly for one "
    "site; with --site, one sub-folder per site plus explore.json and fits.csv (all sites) at the top, "
    "and in JSON the top-level statistics describe the first site while \"sites\" maps each site label "
    "to its own statistics."
)

CAUTIONS = (
    "The quick fits (weighted least squares on the semivariogram, maximum likelihood) are screening "
    "estimates with no uncertainty attached; use the Bayesian model for range, sill and nugget with "
    "credible intervals.",
    "Semivariograms, correlograms and fits assume a stationary, isotropic field after the trend; check "
    "the directional semivariograms and the trend order before relying on them.",
    "Lag bins with fewer than 30 pairs are unreliable (common practice).",
    "Decisions on contamination or human and ecological exposure must follow local regulation and the "
    "judgement of a licensed professional; these summaries support and do not replace them.",
)

_AZIMUTHS = (0.0, 45.0, 90.0, 135.0)
_TOLERANCE = 22.5


def add_arguments(p) -> None:
    from bayesgeo.cli._common import add_data_options, refuse_renamed
    from bayesgeo.quickfit import QUICK_FAMILIES
    from bayesgeo.validate import float_option, int_option

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


def _slug(label: str) -> str:
    from bayesgeo.sitenames import site_file_name

    return site_file_name(label)


def _vals(da) -> list:
    return [float(v) for v in da.values.ravel()] if da.ndim <= 1 else [[float(v) for v in r] for r in da.values]


def _stat_json(ds, name: str) -> dict:
    out = {"lag": _vals(ds["lag"]), name: _vals(ds[name]), "pairs": ds["pairs"].values.tolist()}
    for var in ("envelope_low", "envelope_high", "p_value"):
        out[var] = _vals(ds[var]) if var in ds else [float("nan")] * ds.sizes["bin"]
    return out


def _fits_json(fits) -> dict:
    out = {}
    for method in fits["method"].values:
        part = {}
        for fam in fits["family"].values:
            row = fits.sel({"method": method, "family": fam})
            entry = {v: float(row[v]) for v in ("nugget", "partial_sill", "practical_range", "scale", "objective")}
            if method == "ml":
                entry["loglik"] = float(row["loglik"])
            entry["converged"] = bool(row["converged"])
            entry["at_bound"] = [s for s in str(row["at_bound"].values).split(", ") if s]
            part[str(fam)] = entry
        out[str(method)] = part
    return out


def _analyse_site(part, args, families, bar, log=None) -> tuple[dict, dict]:
    """Statistics and fits of one site: (JSON object, xarray results for files); ``log(text)`` announces
    each long step (large inputs)."""
    log = log or (lambda text: None)
    from bayesgeo import explore
    from bayesgeo.quickfit import quick_fits
    from bayesgeo.trend import fit_trend

    notes: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", explore.FewPairsWarning)
        trend_info = {"order": args.trend, "covariates": list(args.covariate)}
        if args.trend > 0 or args.covariate:
            part = fit_trend(part, args.trend, args.covariate)
            trend_info["r_squared"] = float(part.attrs["trend_r_squared"])
        common = {"bins": args.bins, "lag_limit": args.lag_limit}
        log(f"semivariogram ({args.permutations} permutations)")
        vg = explore.semivariogram(part, estimator=args.estimator, permutations=args.permutations,
                                   seed=args.seed, **common)
        bar.update(1)
        log(f"correlogram ({args.permutations} permutations)")
        cg = explore.correlogram(part, permutations=args.permutations, seed=args.seed, **common)
        bar.update(1)
        log("directional semivariograms")
        dvg = explore.directional_semivariograms(part, azimuths=_AZIMUTHS, tolerance=_TOLERANCE,
                                                 estimator=args.estimator, **common)
        bar.update(1)
    notes += sorted({str(w.message) for w in caught if issubclass(w.category, explore.FewPairsWarning)})
    log("quick covariance fits")
    fits = quick_fits(part, vg, families, trend=args.trend, covariates=args.covariate)
    bar.update(len(families))
    if "ml_skipped" in fits.attrs:
        notes.append(fits.attrs["ml_skipped"] + "; the ML columns are null")
    import numpy as np

    lags = vg["lag"].values[(vg["pairs"].values > 0) & np.isfinite(vg["semivariance"].values)]
    first_lag = float(lags.min()) if lags.size else float("nan")
    for method in fits["method"].values:
        for fam in fits["family"].values:
            row = fits.sel({"method": method, "family": fam})
            if float(row["practical_range"]) < first_lag:  # False for NaN
                notes.append(f"{method.upper()} fit of {fam}: practical range {float(row['practical_range']):.3g} is "
                             f"below the first lag ({first_lag:.3g}); the data look like pure nugget at these lags")
            if not bool(row["converged"]) and not (method == "ml" and "ml_skipped" in fits.attrs):
                notes.append(f"{method.upper()} fit of {fam} did not report convergence; treat it with care")
            elif str(row["at_bound"].values):
                notes.append(f"{method.upper()} fit of {fam} stopped at a search bound: {row['at_bound'].values}")
    obj = {
        "n": int(part.sizes["obs"]),
        "variable": vg.attrs.get("variable", "value"),
        "trend": trend_info,
        "distance_units": vg.attrs.get("distance_units", ""),
        "value_units": vg.attrs.get("value_units", ""),
        "semivariogram": {**_stat_json(vg, "semivariance"), "estimator": args.estimator,
                          "few_pairs_bins": list(vg.attrs.get("few_pairs_bins", []))},
        "correlogram": _stat_json(cg, "correlation"),
        "directional": {"azimuth": [float(a) for a in dvg["azimuth"].values], "tolerance": _TOLERANCE,
                        "lag": _vals(dvg["lag"]), "semivariance": _vals(dvg["semivariance"]),
                        "pairs": dvg["pairs"].values.tolist()},
        "fits": _fits_json(fits),
        "notes": notes,
    }
    return obj, {"semivariogram": vg, "correlogram": cg, "directional": dvg, "fits": fits}


def _write_site(folder, res: dict, label: str) -> list[str]:
    from bayesgeo import figures

    folder.mkdir(parents=True, exist_ok=True)
    suffix = f" - site {label}" if label else ""
    figs = {
        "semivariogram.png": figures.semivariogram_figure(
            res["semivariogram"], res["fits"],
            title=f"Semivariogram ({res['semivariogram'].attrs.get('estimator', '')}) with WLS fits{suffix}"),
        "correlogram.png": figures.correlogram_figure(res["correlogram"], title=f"Correlogram{suffix}"),
        "directional.png": figures.directional_figure(res["directional"],
                                                      title=f"Directional semivariograms{suffix}"),
    }
    for name, fig in figs.items():
        figures.save_figure(fig, folder / name)
    for name in ("semivariogram", "correlogram", "directional", "fits"):
        frame = res[name].to_dataframe()
        if label:
            frame.insert(0, "site", label)  # the label, which the folder name may abbreviate
        frame.to_csv(folder / f"{name}.csv", float_format="%.10g")
    return [*figs, *(f"{n}.csv" for n in ("semivariogram", "correlogram", "directional", "fits"))]


def run(args) -> int:
    import sys
    from pathlib import Path

    from bayesgeo.cli._common import emit_json, print_table, progress, read_data
    from bayesgeo.data import sites_of
    from bayesgeo.io import write_json
    from bayesgeo.outputs import claim, new_folder
    from bayesgeo.quickfit import QUICK_FAMILIES
    from bayesgeo.trend import MAX_ORDER
    from bayesgeo.validate import InputError
    from bayesgeo.workload import explore_plan

    if not 0 <= args.trend <= MAX_ORDER:
        raise InputError(f"--trend: order {args.trend} is not one of 0, 1, 2, 3")
    out = Path(args.out) if args.out else Path(args.data).with_name(Path(args.data).stem + "-explore")
    from bayesgeo.data import apply_transform

    ds = apply_transform(read_data(args), args.transform)
    claim(out, overwrite=args.overwrite, inputs=[args.data])
    families = list(dict.fromkeys(args.covariance or QUICK_FAMILIES))
    labels = sites_of(ds)
    multi = labels != [""]
    plan = explore_plan(ds, permutations=args.permutations, lag_limit=args.lag_limit, families=len(families))
    if plan["message"] and not args.json:
        print(f"bayesgeo explore: note: {plan['message']}", file=sys.stderr, flush=True)
    bar = progress(total=len(labels) * (3 + len(families)), desc="explore", enabled=not args.json)

    results, objects = {}, {}
    with bar:
        for label in labels:
            part = ds if not multi else ds.isel(obs=(ds["site"].values == label).nonzero()[0])
            log = None
            if plan["message"] and not args.json:
                def log(text, _where=f"site {label}: " if multi else ""):
                    print(f"bayesgeo explore: {_where}{text} ...", file=sys.stderr, flush=True)
            objects[label], results[label] = _analyse_site(part, args, families, bar, log)

    first = labels[0]
    settings = {"transform": args.transform, "trend": args.trend, "covariates": list(args.covariate), "bins": args.bins,
                "lag_limit": args.lag_limit, "permutations": args.permutations, "estimator": args.estimator,
                "covariance": families, "seed": args.seed, "azimuths": list(_AZIMUTHS), "tolerance": _TOLERANCE}
    obj = {"data": str(args.data), "out": str(out), "site": first if multi else None,
           "n_total": int(ds.sizes["obs"]), **objects[first], "settings": settings, "workload": plan}
    if multi:
        obj["sites"] = objects
    files: list[str] = []
    with new_folder(out, overwrite=args.overwrite) as tmp:
        for label in labels:
            sub = _slug(label) if multi else ""
            files += [f"{sub}/{f}" if sub else f for f in _write_site(tmp / sub if sub else tmp, results[label], label)]
        if multi:
            import pandas as pd

            frames = [results[lb]["fits"].to_dataframe().assign(site=lb).set_index("site", append=True)
                      for lb in labels]
            pd.concat(frames).to_csv(tmp / "fits.csv", float_format="%.10g")
            files.append("fits.csv")
        files.append("explore.json")
        obj["files"] = files
        obj["cautions"] = list(CAUTIONS)
        from bayesgeo.cli._common import to_jsonable

        write_json(tmp / "explore.json", to_jsonable(obj))

    if args.json:
        emit_json(obj)
        return 0
    for label in labels:
        o = objects[label]
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
        for note in o["notes"]:
            print(f"note: {note}")
        print()
    print(f"wrote {len(files)} files to {out}/")
    for c in CAUTIONS:
        print(f"caution: {c}")
    return 0
