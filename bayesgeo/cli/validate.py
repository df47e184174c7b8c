"""``bayesgeo validate``: simulation-based calibration of the models on a layout, with an HTML report.

Exit status: 0 when every rank-uniformity and coverage check passes, 1 when one fails
(miscalibration, or bad luck at the 0.1% level), 2 on bad input.
"""

from __future__ import annotations

HELP = "check the software by simulation-based calibration on your sampling layout (HTML + JSON report)"
EXIT_MISCALIBRATED = 1


def add_arguments(p) -> None:
    from bayesgeo.gp.covariance import FAMILIES
    from bayesgeo.calibration.config import KINDS
    from bayesgeo.common.validate import float_option, int_option

    p.add_argument("--study", metavar="STUDY.toml", help="study file: its data locations, covariance and nugget")
    p.add_argument("--data", metavar="CSV", help="point data whose locations form the layout (default: a generated one)")
    for opt, text in (("--x", "x / easting column"), ("--y", "y / northing column"), ("--value", "measured value column"),
                      ("--site", "site label column (several sites: also a hierarchical check)"),
                      ("--units", "units of the measured value"), ("--distance-units", "units of the coordinates")):
        p.add_argument(opt, metavar="COL" if "column" in text else "TEXT", help=text)
    p.add_argument("--only-site", metavar="NAME", help="use only this site's rows (with --site)")
    p.add_argument("--coords", choices=("auto", "xy", "lonlat"), default="auto", help="planar (xy) or degrees (lonlat)")
    p.add_argument("--duplicates", choices=("error", "mean"), default="error", help="points at one location")
    p.add_argument("--covariance", action="append", choices=FAMILIES, metavar="FAMILY",
                   help=f"covariance family, repeatable ({', '.join(FAMILIES)}; default matern32)")
    p.add_argument("--nu", type=float_option("nu"), default=None, help="Matérn smoothness (family 'matern' only)")
    p.add_argument("--kind", action="append", choices=KINDS,
                   help="models to check, repeatable (default: quick: single; full: single with and without "
                        "nugget, nn, hierarchical)")
    p.add_argument("--censored", type=float_option("censored"), default=None, metavar="SHARE",
                   help="also check the left-censored model of the single-site checks: values below a fixed reporting "
                        "limit, about this share of each data set (0-0.6), modelled as non-detects (each replicate "
                        "then compiles its own model, about 20 s)")
    p.add_argument("--anisotropy", action="store_true",
                   help="also check the geometrically anisotropic model of the single-site checks (direction and ratio "
                        "of ranges drawn from their prior)")
    p.add_argument("--replicates", type=int_option("sbc_replicates"), default=None, help="simulated data sets per model (quick 25, full 100)")
    p.add_argument("--points", type=int_option("layout_points"), default=None, help="points of a generated layout per site (quick 28, full 60)")
    p.add_argument("--quick", action="store_true", help="CI mode: small layout, 25 replicates, short chains")
    p.add_argument("--draws", type=int_option("draws"), default=None, help="kept draws per chain (quick 200, full 500)")
    p.add_argument("--tune", type=int_option("tune"), default=None, help="tuning iterations per chain (quick 300, full 500)")
    p.add_argument("--max-draws", type=int_option("draws"), default=None, metavar="N",
                   help="continue a replicate's chains while R-hat or ESS fails, up to N draws per chain (default "
                        "4 x --draws; equal to --draws: off)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="dask.distributed scheduler, e.g. tcp://host:8786")
    p.add_argument("--workers", type=int_option("workers"), default=1,
                   help="local processes (default 1: chains already use both cores; each process compiles the model)")
    p.add_argument("--seed", type=int_option("seed"), default=1, help="seed (default 1; same seed, same numbers)")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder (validation.html, validation.json)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")


def _template(args):
    """Layout data set and where it came from."""
    from bayesgeo.cli._common import read_data
    from bayesgeo.common.validate import InputError

    if args.study and args.data:
        raise InputError("--study and --data: give one of them, not both")
    if args.study:
        from bayesgeo.data.points import read_points, read_settings
        from bayesgeo.study.settings import read_study

        st = read_study(args.study)
        d = st["data"]
        layout = {k: v for k, v in read_settings(d).items()
                  if k not in ("covariates", "categories", "baselines")}  # locations only
        return read_points(d["path"], **layout), st
    if args.data:
        args.covariate, args.category, args.baseline = [], [], []
        return read_data(args), None
    return None, None


def _single_site(ds):
    from bayesgeo.data.points import sites_of

    labels = sites_of(ds)
    if len(labels) <= 1:
        return ds, None
    first = labels[0]
    part = ds.isel(obs=ds["site"].values == first).drop_vars("site")
    part.attrs = dict(ds.attrs)
    return part, first


def run(args) -> int:
    import json
    import time

    from bayesgeo.cli._common import emit_json, progress
    from bayesgeo.data.points import sites_of
    from bayesgeo.common.outputs import claim, new_folder
    from bayesgeo.common.validate import InputError, check_positive_int
    from bayesgeo.calibration.config import FULL, QUICK, generated_layout, with_settings
    from bayesgeo.calibration.validation import simulation_based_calibration
    from bayesgeo.calibration.ranks import sbc_summary
    from bayesgeo.calibration.report import CAUTIONS, validation_html

    claim(args.out, overwrite=args.overwrite, inputs=[args.study, args.data])
    data, study = _template(args)
    base = QUICK if args.quick else FULL
    changes = {k: v for k, v in (("draws", args.draws), ("tune", args.tune), ("max_draws", args.max_draws))
               if v is not None}
    base = with_settings(base, **changes)
    replicates = check_positive_int(args.replicates if args.replicates is not None else (25 if args.quick else 100),
                                    "--replicates", minimum=2)
    points = check_positive_int(args.points if args.points is not None else (28 if args.quick else 60), "--points",
                                minimum=8)
    families = args.covariance or ([study.families[0]] if study else ["matern32"])
    nugget = bool(study["model"]["nugget"]) if study else True
    nu = args.nu if args.nu is not None else (study["model"].get("nu") if study else None)
    kinds = args.kind or (["single"] if args.quick else ["single", "nn", "hierarchical"])
    notes = []
    if data is not None:
        single, first = _single_site(data)
        if first is not None:
            notes.append(f"single-site and nn checks use the rows of site {first!r}")
        several = data if len(sites_of(data)) > 1 else None
        layout = f"{data.attrs.get('source', 'data')} ({data.sizes['obs']} points)"
    else:
        single, several = generated_layout(points, seed=args.seed), None
        layout = f"generated: {points} random points in a 100 m square (seed {args.seed})"
    if "hierarchical" in kinds and several is None:
        several = generated_layout(max(12, points // 2), sites=3, seed=args.seed)
        notes.append(f"hierarchical check on a generated layout of 3 sites x {max(12, points // 2)} points")
    configs = []
    for fam in families:
        for kind in kinds:
            nuggets = [nugget, not nugget] if (kind == "single" and not args.quick) else [nugget]
            if kind == "nn" and fam == "matern":
                notes.append("nn check skipped for 'matern' (no closed form in the nn likelihood)")
                continue
            for ng in nuggets:
                cfg = with_settings(base, kind=kind, covariance=fam, nu=nu if fam == "matern" else None, nugget=ng)
                configs.append(cfg)
                if args.censored and kind == "single" and ng == nugget:
                    configs.append(with_settings(cfg, censored=args.censored))
                if args.anisotropy and kind == "single" and ng == nugget:
                    configs.append(with_settings(cfg, anisotropy=True))
    if not configs:
        raise InputError("--kind/--covariance: nothing to check")
    t0 = time.perf_counter()
    runs = []
    bar = progress(total=replicates * len(configs), desc="validate", enabled=not args.json)
    try:
        for cfg in configs:
            tpl = several if cfg.kind == "hierarchical" else single
            t1 = time.perf_counter()
            res = simulation_based_calibration(tpl, cfg, replicates=replicates, seed=args.seed,
                                               scheduler=args.scheduler, workers=args.workers, progress=bar)
            res.attrs["wall_seconds"] = time.perf_counter() - t1
            runs.append((res, sbc_summary(res)))
    finally:
        bar.close()
    seconds = time.perf_counter() - t0
    meta = {"mode": "quick" if args.quick else "full", "layout": layout, "replicates": replicates, "seed": args.seed,
            "seconds": round(seconds, 1), "scheduler": args.scheduler or f"local ({args.workers} process)",
            "notes": "; ".join(notes) or "-"}
    out = {"ok": all(s["ok"] for _, s in runs), **meta, "notes": notes, "cautions": CAUTIONS,
           "runs": [{**s, "config": json.loads(r.attrs["config"]), "seconds": r.attrs["wall_seconds"],
                     "ranks": r["rank"].values.tolist(), "quantity_order": [str(q) for q in r["quantity"].values],
                     "verdicts": [str(v) for v in r["verdict"].values],
                     "fit_diagnostics": {k: r[k].values.tolist() for k in ("rhat_max", "ess_min", "divergences", "draws",
                                                                          "failed_checks") if k in r}}
                    for r, s in runs]}
    page = validation_html(runs, meta=meta)
    with new_folder(args.out, overwrite=args.overwrite) as tmp:
        (tmp / "validation.html").write_text(page, encoding="utf-8")
        (tmp / "validation.json").write_text(json.dumps(_clean(out), indent=1), encoding="utf-8")
    if args.json:
        emit_json({**out, "out": str(args.out)})
    else:
        for r, s in runs:
            print(f"{s['model']}: {'pass' if s['ok'] else 'FAIL'} ({s['replicates']} replicates, "
                  f"{len(s['failed_fits'])} unconverged, {r.attrs['wall_seconds']:.0f} s)")
            for q, e in s["quantities"].items():
                c5, c9 = e["coverage"]["0.5"], e["coverage"]["0.9"]
                p = e["uniformity"]["pvalue"]
                print(f"  {q:<22} rank p {'-' if p is None else f'{p:.3f}':>6}  50%: {c5['count']}/{c5['of']} "
                      f"[{c5['bounds'][0]}, {c5['bounds'][1]}]  90%: {c9['count']}/{c9['of']} "
                      f"[{c9['bounds'][0]}, {c9['bounds'][1]}]")
        print(f"wrote {args.out}/ (validation.html, validation.json) in {seconds:.0f} s")
    return 0 if out["ok"] else EXIT_MISCALIBRATED


def _clean(obj):
    from bayesgeo.cli._common import to_jsonable

    return to_jsonable(obj)
