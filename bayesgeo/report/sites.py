"""Several-site parts of the report (:mod:`bayesgeo.report.writer`): per-site posteriors, population and new
site, shrinkage, sampling design, and the per-site variogram checks and maps.

A several-site run (``[model] pooling`` hierarchical, independent or complete) leaves in
``fits/<family>/`` the ``fit.json`` of :func:`bayesgeo.fitting.hier_outputs.site_report` (blocks
``sites``, ``population``, ``new_site``), ``shrinkage.csv``/``.png`` and ``design.csv``/``.png``,
and one ``variogram_check_<site>.*``, ``predictions_<site>.nc`` and ``maps_<site>/`` per site.
Each function here returns an HTML fragment; a missing input shows a visible box, never a
made-up number. The cautions of the trade are repeated where the numbers are: the results support,
and never replace, licensed professional judgement and the rules of the local regulator.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from bayesgeo.common.layout import (
    EXPLORE_FILE,
    RUN_EXPLORE,
    prediction_names,
    vgcheck_names,
)
from bayesgeo.report.html import Ctx, Fam, esc, fmt, gap, html_table, img_tag
from bayesgeo.report.html import read_json as _read_json
from bayesgeo.report.html import section as _section

__all__ = ["site_posterior", "sites_section", "site_vgcheck", "site_maps", "site_priors", "map_block",
           "SITE_CAUTION"]

SITE_CAUTION = (
    "Several-site results borrow strength between sites: each site's numbers depend on the others through the "
    "population. They support, and never replace, the judgement of a licensed professional; sampling densities, "
    "statistics and action levels are set by the local regulator."
)

_PARAMS = ("practical_range", "partial_sill", "nugget", "total_sill", "nugget_ratio", "microergodic",
           "anisotropy_angle", "anisotropy_ratio", "practical_range_major", "practical_range_minor")
_COLS = ["q50", "mean", "sd", "q05", "q95", "hdi90_low", "hdi90_high", "units"]
_HEADS = ["median", "mean", "sd", "5%", "95%", "90% HDI low", "90% HDI high", "units"]


def _rows(block: Mapping, names=_PARAMS, **extra) -> list[dict]:
    return [{**extra, "parameter": k, **block[k]} for k in names if k in block]


def site_posterior(ctx: Ctx, f: Fam) -> str:
    """Per-site posterior table, then the population and a new site (fit.json of a several-site fit)."""
    rep = f.report
    out = [f"<p>Pooling: <b>{esc(rep['model'].get('pooling'))}</b>; {len(rep.get('sites', {}))} sites, "
           f"n = {rep['model'].get('n')} points in all. {esc(rep.get('parameters_note', ''))}.</p>"]
    rows = []
    for site, block in rep.get("sites", {}).items():
        rows += _rows(block.get("parameters", {}), site=f"{site} (n = {block.get('n')})")
    out.append("<h4>Per site</h4>")
    out.append(html_table(rows, ["site", "parameter", *_COLS], headers=["site", "parameter", *_HEADS],
                          left=["site", "parameter", "units"]))
    pop = rep.get("population") or {}
    if pop:
        out.append("<h4>Population</h4>")
        out.append(html_table(_rows(pop, names=list(pop)), ["parameter", *_COLS], headers=["parameter", *_HEADS],
                              left=["parameter", "units"]))
        out.append("<p class=\"small\">Population medians describe a typical site; population means average over "
                   "sites (log-normal spread between sites).</p>")
    new = rep.get("new_site") or {}
    if new:
        out.append("<h4>A new, unsampled site like these</h4>")
        out.append(html_table(_rows(new), ["parameter", *_COLS], headers=["parameter", *_HEADS],
                              left=["parameter", "units"]))
        out.append("<p class=\"small\">Posterior predictive for the parameters of a further site drawn from the "
                   "same population: wider than any sampled site's. It is a planning prior, not a substitute for "
                   "sampling that site.</p>")
    out.append(f"<p class=\"small\">caution: {esc(SITE_CAUTION)}</p>")
    return "\n".join(out)


def sites_section(ctx: Ctx) -> str:
    """Section "Sites: shrinkage and sampling design" (several-site runs only)."""
    out = ["<p>Shrinkage compares each site's intervals from the pooled model with those from fitting every site "
           "on its own (same data, priors and sampler settings): a width ratio below 1 means the site borrowed "
           "strength from the others. The sampling-design aid gives, for a new site like these, the predictive sd "
           "at the centre of a square sampling grid against the grid spacing.</p>"]
    for f in ctx.fams:
        out.append(f"<h3>{esc(f.name)}</h3>")
        if f.report is None:
            out.append(gap("not available: no fit for this family"))
            continue
        pooling = f.report.get("model", {}).get("pooling")
        shrink = f.report.get("shrinkage")
        if shrink:
            out.append("<h4>Shrinkage (90% intervals, independent against pooled)</h4>")
            cols = ["site", "parameter", "n", "independent_low", "independent_median", "independent_high",
                    "pooled_low", "pooled_median", "pooled_high", "width_ratio", "units"]
            out.append(html_table(shrink, cols, headers=["site", "parameter", "n", "indep. low", "indep. median",
                                                         "indep. high", "pooled low", "pooled median", "pooled high",
                                                         "width ratio", "units"],
                                  left=["site", "parameter", "units"]))
            if (f.folder / "shrinkage.png").is_file():
                out.append(img_tag(f.folder / "shrinkage.png", f"shrinkage, {f.name}",
                                   "Per-site intervals: independent fits against the pooled model"))
            verdict = f.report.get("independent_fit_verdict")
            if verdict:
                out.append(f"<p class=\"small\">Convergence verdict of the independent fits used here: "
                           f"{esc(verdict)}.</p>")
        else:
            out.append(gap(f"no shrinkage table: pooling {pooling} has no pooled-against-independent comparison"
                           if pooling == "independent" else "no shrinkage table was written for this fit"))
        design = f.report.get("design")
        if design and design.get("rows"):
            units = f.report.get("model", {})
            du, vu = units.get("distance_units") or "distance units", units.get("value_units") or "model units"
            out.append(f"<h4>Sampling design for a new site ({esc(design.get('kind'))} kriging, "
                       f"{design.get('neighbours')} × {design.get('neighbours')} grid nodes)</h4>")
            cols = ["spacing", "sd_q50", "sd_q05", "sd_q95", "measurement_sd_q50", "relative_sd", "density"]
            out.append(html_table(design["rows"], cols,
                                  headers=[f"spacing [{du}]", f"sd median [{vu}]", "sd 5%", "sd 95%",
                                           f"measurement sd median [{vu}]", "relative sd",
                                           f"samples per {du}²"]))
            if (f.folder / "design.png").is_file():
                out.append(img_tag(f.folder / "design.png", f"sampling design, {f.name}",
                                   "Predictive sd at the centre of a square grid against the grid spacing"))
            if design.get("caution"):
                out.append(f"<p class=\"small\">caution: {esc(design['caution'])}</p>")
        elif pooling != "independent":
            out.append(gap("no sampling-design table was written for this fit"))
    out.append(f"<p class=\"small\">caution: {esc(SITE_CAUTION)}</p>")
    return _section("sites", "Sites: shrinkage and sampling design", "\n".join(out))


def site_vgcheck(ctx: Ctx, f: Fam) -> str:
    """The per-site posterior predictive variogram checks of one family."""
    import pandas as pd

    out = []
    for site in ctx.sites:
        out.append(f"<h4>Site {esc(site)}</h4>")
        png, csv = (f.folder / name for name in vgcheck_names(site))
        if not png.is_file():
            out.append(gap("not available: the variogram check did not run for this site (skipped or failed)"))
            continue
        out.append(img_tag(png, f"variogram check {f.name}, {site}", f"Site {site}: observed semivariogram against "
                           "the band of semivariograms of data replicated from the posterior (Gelman, Meng and Stern "
                           "1996)"))
        if csv.is_file():
            frame = pd.read_csv(csv)
            out.append(f"<p>{int(frame['outside'].astype(bool).sum())} of {int((frame['pairs'] > 0).sum())} "
                       "lag bins lie outside the 90% replicate band.</p>")
    return "\n".join(out)


def map_block(label: str, nc: Path, maps_dir: Path) -> list[str]:
    """Map figures and the area average of one prediction file (one family, or one site of it)."""
    import xarray as xr

    out = []
    if not nc.is_file():
        return [gap(f"not available: the map stage did not run for {label} (skipped or failed)")]
    pngs = sorted(maps_dir.glob("*.png"), key=lambda p: (not p.name.startswith("mean"), not p.name.startswith("sd"),
                                                         p.name))
    for p in pngs:
        out.append(img_tag(p, f"{label} {p.stem}", f"{label}: {p.stem.replace('_', ' ')}"))
    with xr.open_dataset(nc, engine="netcdf4") as pred:
        area = pred.attrs.get("area_average")
        kind = pred.attrs.get("kind", "")
    if not pngs:
        out.append(f"<p>Predictions at the target points are in <code>{esc(nc.name)}</code>.</p>")
    out += exceedance_table(maps_dir / "map.gpkg")
    if area:
        a = json.loads(area)
        out.append(f"<h4>Area average: {esc(a.get('area'))} (area {fmt(a.get('area_size'))})</h4>")
        rows = [{"mean": a.get("mean"), "sd": a.get("sd"), "q05": a.get("q05"), "q95": a.get("q95"),
                 "units": a.get("units")}]
        out.append(html_table(rows, ["mean", "sd", "q05", "q95", "units"], left=["units"]))
        for t, p in zip(a.get("threshold", []), a.get("p_exceed", [])):
            out.append(f"<p>P(area average &gt; {fmt(t)} {esc(a.get('units'))}) = {fmt(p, 3)}</p>")
        out.append(f"<p class=\"small\">method: {esc(a.get('method'))}</p>")
    elif kind:
        out.append("<p class=\"small\">No area average here ([prediction] area).</p>")
    return out


def exceedance_table(gpkg: Path) -> list[str]:
    """The exceedance polygons of ``map.gpkg`` as a table: area, the chance that the area above the threshold is
    larger, and the simulated area's 90% interval (:mod:`bayesgeo.predict.gis_export`); nothing without the file."""
    if not gpkg.is_file():
        return []
    from pyogrio.raw import read

    meta, _, _, fields = read(gpkg, layer="exceedance", read_geometry=False)
    col = dict(zip(meta["fields"], fields))
    def size(v):  # areas as whole units with thousands separators (m2 of a site), small ones as numbers
        return f"{v:,.0f}" if abs(v) >= 100 else fmt(v)

    rows = [{"threshold": f"{fmt(t)} {u}", "P(exceed) at least": fmt(lv), "area": f"{size(a)} {au}",
             "P(area above threshold larger)": fmt(p, 2),
             "area above threshold, 5-95%": f"{size(lo)} - {size(hi)} {au}" if np.isfinite(lo) else "not simulated"}
            for t, u, lv, a, au, p, lo, hi in zip(col["threshold"], col["threshold_units"], col["probability_level"],
                                                  col["area"], col["area_units"], col["p_true_area_larger"],
                                                  col["simulated_area_q05"], col["simulated_area_q95"])]
    return ["<h4>Exceedance areas (map.gpkg)</h4>", html_table(rows, list(rows[0]), left=["threshold"]) if rows else "",
            "<p class=\"small\">Each polygon joins the cells whose probability of exceeding the threshold reaches the "
            "level. The chance that the area above the threshold is larger, and that area's interval, come from joint "
            "simulations of the whole map (one per posterior draw). These are model results with uncertainty, not "
            "measured boundaries; decisions follow local regulation and the judgement of a licensed professional.</p>"]


def site_maps(ctx: Ctx, f: Fam) -> str:
    """Per-site maps (each site's grid around its own points) of one family."""
    out = []
    for site in ctx.sites:
        out.append(f"<h4>Site {esc(site)}</h4>")
        nc, maps = prediction_names(site)
        out += map_block(f"{f.name}, site {site}", f.folder / nc, f.folder / maps)
    return "\n".join(out)


def site_priors(ctx: Ctx, f: Fam) -> str:
    """Prior statements of a several-site fit (the power-scaling table is for single-site fits)."""
    rep = f.report or {}
    m = rep.get("model", {})
    out = []
    hyper = m.get("hyperpriors") or {}
    if hyper:
        rows = [{"hyperparameter": k, "setting": json.dumps(v) if not isinstance(v, (int, float, str)) else v}
                for k, v in hyper.items()]
        out.append(html_table(rows, ["hyperparameter", "setting"], left=["hyperparameter", "setting"]))
    out.append(gap("prior sensitivity (power scaling) is computed for single-site fits only in this version: in "
                   "the several-site model the population, not a fixed prior, is each site's prior; compare the "
                   "shrinkage table (pooled against independent) to see how much the pooling moves each site"))
    return "\n".join(out)


def read_sites(ctx: Ctx) -> list[str]:
    """Site labels of a several-site run (from the first fit.json, else from the data)."""
    for f in ctx.fams:
        if f.report and f.report.get("sites"):
            return list(f.report["sites"])
    obj = _read_json(ctx.root / RUN_EXPLORE / EXPLORE_FILE)
    if obj and obj.get("sites"):
        return list(obj["sites"])
    from bayesgeo.data.points import sites_of
    from bayesgeo.report.html import run_data as _data

    try:
        return [s for s in sites_of(_data(ctx)) if s]
    except Exception:  # noqa: BLE001 - the data section says why the data cannot be read
        return []
