"""Sections of the HTML report (:mod:`bayesgeo.report.writer`), one function per section.

Each section takes the report context (:func:`context`: the run folder, the manifest and what the
run wrote) and returns an HTML fragment. A section whose inputs are missing (a stage skipped or
failed) says so in a visible box instead of showing anything made up.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

import numpy as np

from bayesgeo.report.html import Ctx, Fam, esc, fmt, gap, html_table, img_tag
from bayesgeo.report.html import fig_png as _fig_png
from bayesgeo.report.html import read_json as _read_json
from bayesgeo.report.html import run_data as _data
from bayesgeo.report.html import section as _section
from bayesgeo.report.samples import nondetect_block, samples_figure
from bayesgeo.report.priors import prior_posterior_figure, prior_sensitivity
from bayesgeo.common.layout import (COMPARISON_FILE, DIAGNOSTICS_DIR, DIAGNOSTICS_FILE, EXPLORE_FILE, FIT_FILE, FIT_REPORT,
                             RUN_COMPARE, RUN_EXPLORE, fit_folder_of, prediction_names, vgcheck_names)

__all__ = ["context", "SECTIONS", "img_tag", "html_table", "prior_sensitivity", "prior_posterior_figure"]

LIMITATIONS = (
    "The model assumes a second-order stationary Gaussian field after the trend: the same mean structure, "
    "variance and correlation everywhere in the study area. Abrupt changes (fill, made ground, hot spots, "
    "different parcels) break this assumption; check the exploratory figures and the variogram check.",
    "The covariance is isotropic: correlation depends on distance only, not on direction. The directional "
    "semivariograms show whether that is plausible; a marked direction effect needs a different model.",
    "Results are only as good as the data: sampling design, sample support (depth, compositing) and laboratory "
    "quality are not modelled; non-detects are modelled as censored only where marked (<X), so check the limits.",
    "Intervals are conditional on the chosen covariance family, priors and trend; the prior-sensitivity and "
    "comparison sections show how much they matter, not every way the model could be wrong.",
    "Predictions far from samples revert to the mean with wide intervals; maps outside the sampled area "
    "(beyond the convex hull) are extrapolations.",
    "This report supports, but does not replace, the judgement of a licensed professional. Decisions about "
    "contamination, exposure or remediation must follow the rules of the local regulator, including any "
    "required sampling densities, statistics and action levels.",
)


def _load_tree(path: Path):
    """(tree, None) or (None, reason): the fit read and checked by :meth:`bayesgeo.fitting.fitted.Fit.read`."""
    import gc

    from bayesgeo.fitting.fitted import Fit
    from bayesgeo.common.validate import InputError

    gc.collect()  # close handles other stages left to the garbage collector before HDF5 sees the file again
    try:
        return Fit.read(path).tree, None
    except InputError as err:  # shown in the report as the reason
        return None, " ".join(str(err).split())[:300]


def context(root: Path, manifest: Mapping, *, out_name: str) -> Ctx:
    """Gather what the run wrote under ``root``."""
    settings = manifest.get("settings", {})
    title = settings.get("", {}).get("title") or "bayesgeo study report"
    ctx = Ctx(root=root, manifest=manifest, out_name=out_name, title=title, settings=settings)
    for fam in settings.get("model", {}).get("covariance", []):
        folder = fit_folder_of(root, fam)
        f = Fam(name=fam, folder=folder, report=_read_json(folder / FIT_REPORT),
                diagnostics=_read_json(folder / DIAGNOSTICS_DIR / DIAGNOSTICS_FILE))
        if (folder / FIT_FILE).is_file():
            f.tree, f.error = _load_tree(folder / FIT_FILE)
        ctx.fams.append(f)
    verdicts = manifest.get("verdicts", {})
    ctx.not_converged = any(v == "NOT CONVERGED" or v == "fail" for k, v in verdicts.items()
                            if k.startswith(("check:", "fit:")))
    ctx.failed = [k for k, v in verdicts.items() if v == "failed"]
    ctx.several = settings.get("model", {}).get("pooling", "single") not in ("single", None)
    if ctx.several:
        from bayesgeo.report.sites import read_sites

        ctx.sites = read_sites(ctx)
    return ctx


TOC = (("job", "Job and data"), ("explore", "Exploratory analysis"), ("model", "Model and priors"),
       ("diagnostics", "Convergence diagnostics"), ("posterior", "Posterior: range, sills, nugget"),
       ("sites", "Sites: shrinkage and sampling design"),
       ("priors", "Prior against posterior and prior sensitivity"), ("vgcheck", "Posterior predictive variogram check"),
       ("maps", "Predictive and exceedance maps"), ("compare", "Model comparison"),
       ("cautions", "Limitations and cautions"), ("repro", "Reproducibility appendix"))


# --- sections -----------------------------------------------------------------------------------
def header(ctx: Ctx) -> str:
    m = ctx.manifest
    out = [f"<h1>{esc(ctx.title)}</h1>",
           f"<p class=\"small\">bayesgeo run report &middot; run folder <code>{esc(ctx.out_name)}</code> &middot; "
           f"started {esc(m.get('started'))}, finished {esc(m.get('finished'))} (UTC)</p>"]
    if ctx.not_converged:
        out.append("<div class=\"banner\" id=\"status\">NOT CONVERGED: a fit failed its convergence check. Later "
                   "stages were skipped and the numbers below must not be used for any decision.</div>")
    elif ctx.failed:
        out.append(f"<div class=\"banner\" id=\"status\">INCOMPLETE: stage(s) failed: {esc(', '.join(ctx.failed))}. "
                   "See the sections concerned and the appendix.</div>")
    else:
        out.append("<div class=\"ok\" id=\"status\">All stages completed; every fit passed its convergence check "
                   "(or passed with warnings, listed below).</div>")
    return "\n".join(out)


def contents(ctx: Ctx) -> str:
    items = "".join(f"<li><a href=\"#{a}\">{esc(t)}</a></li>" for a, t in TOC if a != "sites" or ctx.several)
    return f"<nav><ol>{items}</ol></nav>"


def _shown_path(path) -> str:
    """A path as the report shows it: the path itself, or only the name when the file is gone or lies in the
    system's temporary folder (a scratch file, such as the demo's; its copy is in the run's inputs/)."""
    import tempfile

    if not path:
        return ""
    p = Path(str(path))
    scratch = p.resolve().is_relative_to(Path(tempfile.gettempdir()).resolve())
    return f"{p.name} (a temporary file; its copy is in inputs/)" if scratch or not p.exists() else str(p)


def job(ctx: Ctx) -> str:
    m, s = ctx.manifest, ctx.settings
    fams = s.get("model", {}).get("covariance", [])
    rows = [
        {"k": "study file", "v": _shown_path(m.get("study", {}).get("path"))},
        {"k": "data file", "v": _shown_path(s.get("data", {}).get("path"))},
        {"k": "copies of the inputs", "v": "inputs/ in the run folder (hashes in the appendix)"},
        {"k": "covariance families", "v": ", ".join(fams)},
        {"k": "selected fit (maps at the top of the run folder)", "v": m.get("selected")},
        {"k": "run status", "v": f"{m.get('status')}: {m.get('message')}"},
    ]
    out = [html_table(rows, ["k", "v"], headers=["item", "value"], left=["k", "v"])]
    try:
        ds = _data(ctx)
    except Exception as err:  # noqa: BLE001 - the report must still be written
        return _section("job", "Job and data", "\n".join(out) + gap(f"data could not be read again: {err}"))
    v = ds["value"].values[~ds["censored"].values] if "censored" in ds else ds["value"].values  # detected values
    units = ds.attrs.get("value_units", "")
    stats = [{"n": int(v.size), "min": float(v.min()), "q25": float(np.quantile(v, 0.25)),
              "median": float(np.median(v)), "mean": float(v.mean()), "q75": float(np.quantile(v, 0.75)),
              "max": float(v.max()), "sd": float(v.std(ddof=1)) if v.size > 1 else float("nan")}]
    crs = ds.attrs.get("crs_name") or "not stated (coordinates taken as planar, in their own units)"
    where = f" (projected from {ds.attrs['source_crs_name']})" if ds.attrs.get("source_crs_name") else ""
    out.append(f"<p>Coordinate reference system: {esc(crs + where)}; distances in "
               f"{esc(ds.attrs.get('distance_units', ''))}.</p>")
    out.append(f"<h3>Measured values [{esc(units or 'value units')}]</h3>")
    out.append(html_table(stats, list(stats[0])))
    out.append(nondetect_block(ds))
    if "site" in ds.coords:
        labels, counts = np.unique(ds["site"].values, return_counts=True)
        out.append("<p>Sites: " + ", ".join(f"{esc(lb)} ({c})" for lb, c in zip(labels, counts)) + "</p>")
    xr_ = [float(ds["x"].min()), float(ds["x"].max())]
    yr_ = [float(ds["y"].min()), float(ds["y"].max())]
    out.append(f"<p>Coordinates: {esc(ds.attrs.get('coords', ''))}, x from {fmt(xr_[0], 7)} to {fmt(xr_[1], 7)}, "
               f"y from {fmt(yr_[0], 7)} to {fmt(yr_[1], 7)} {esc(ds.attrs.get('distance_units', ''))}.</p>")
    th = s.get("prediction", {}).get("thresholds", [])
    out.append(img_tag(_fig_png(samples_figure(ds, th)), "map of the samples",
                       "Sample locations coloured by measured value" + (" (red rings: above a threshold)" if th else "")))
    return _section("job", "Job and data", "\n".join(out))


def explore(ctx: Ctx) -> str:
    folder = ctx.root / RUN_EXPLORE
    obj = _read_json(folder / EXPLORE_FILE)
    if obj is None:
        return _section("explore", "Exploratory analysis", gap("not available: the explore stage did not complete"))
    out = [f"<p>{obj['n_total']} points; semivariogram estimator {esc(obj['semivariogram']['estimator'])}; "
           f"trend order {obj['trend']['order']}; transform {esc(obj['settings']['transform'])}; "
           f"{obj['settings']['permutations']} random permutations give the envelopes (seed "
           f"{obj['settings']['seed']}).</p>"]
    subdirs = [folder] if not obj.get("sites") else sorted(p for p in folder.iterdir() if p.is_dir())
    for sub in subdirs:
        if sub != folder:
            out.append(f"<h3>Site {esc(sub.name)}</h3>")
        for name, cap in (("semivariogram.png", "Empirical semivariogram with permutation envelope and quick fits"),
                          ("correlogram.png", "Correlogram with permutation envelope"),
                          ("directional.png", "Directional semivariograms (azimuths 0, 45, 90, 135 degrees)")):
            if (sub / name).is_file():
                out.append(img_tag(sub / name, name, cap))
    rows = []
    for method, fams in obj.get("fits", {}).items():
        for fam, f in fams.items():
            rows.append({"method": method.upper(), "family": fam, "nugget": f["nugget"],
                         "partial_sill": f["partial_sill"], "practical_range": f["practical_range"],
                         "converged": f["converged"]})
    if rows:
        out.append("<h3>Quick fits (screening only, no uncertainty)</h3>")
        out.append(html_table(rows, ["method", "family", "nugget", "partial_sill", "practical_range", "converged"],
                              left=["method", "family"]))
    for note in obj.get("notes", []):
        out.append(f"<p class=\"small\">note: {esc(note)}</p>")
    return _section("explore", "Exploratory analysis", "\n".join(out))


_FAMILY_FORMULA = {
    "exponential": "ρ(h) = exp(−h / φ); practical range ≈ 2.996 φ",
    "gaussian": "ρ(h) = exp(−(h / φ)²); practical range ≈ 1.731 φ",
    "matern32": "ρ(h) = (1 + √3 h / φ) exp(−√3 h / φ)  (Matérn, ν = 3/2)",
    "matern52": "ρ(h) = (1 + √5 h / φ + 5h² / (3φ²)) exp(−√5 h / φ)  (Matérn, ν = 5/2)",
    "matern": "ρ(h) = 2<sup>1−ν</sup> / Γ(ν) · (√(2ν) h / φ)<sup>ν</sup> K<sub>ν</sub>(√(2ν) h / φ)  (Matérn, ν fixed)",
    "spherical": "ρ(h) = 1 − 1.5 h/φ + 0.5 (h/φ)³ for h < φ, 0 beyond; the range is φ",
}


def model(ctx: Ctx) -> str:
    s = ctx.settings.get("model", {})
    out = []
    f0 = next((f for f in ctx.fams if f.report), None)
    out.append("<p>Observation model for the (transformed) value Z at location s<sub>i</sub>, i = 1, …, n:</p>")
    out.append("<span class=\"formula\">Z(s<sub>i</sub>) = x(s<sub>i</sub>)ᵀβ + S(s<sub>i</sub>) + ε<sub>i</sub>,"
               "   S ~ Gaussian process with mean 0 and Cov(S(s), S(s′)) = σ² ρ(‖s − s′‖; φ),"
               "   ε<sub>i</sub> ~ N(0, τ²) independent</span>")
    out.append("<p>σ² is the partial sill, τ² the nugget, σ² + τ² the total sill; the practical range is the "
               "distance where ρ falls to 0.05. Semivariogram: γ(h) = τ² + σ² (1 − ρ(h)) for h &gt; 0. "
               "Zhang (2004) shows that with ν fixed only the microergodic parameter σ² / φ<sup>2ν</sup> is "
               "consistently estimable under infill; the range and the partial sill separately carry more prior "
               "influence.</p>")
    rows = [{"family": fam, "formula": _FAMILY_FORMULA.get(fam, "see docs/model.md")} for fam in s.get("covariance", [])]
    out.append("<table><tr><th class=\"l\">family</th><th class=\"l\">correlation function</th></tr>"
               + "".join(f"<tr><td class=\"l\">{esc(r['family'])}</td><td class=\"l\">{r['formula']}</td></tr>"
                         for r in rows) + "</table>")
    if ctx.several:
        out.append(f"<p>Several sites ({esc(', '.join(ctx.sites))}), pooling <b>{esc(s.get('pooling'))}</b>: "
                   + {"hierarchical": "each site has its own range, sills, nugget and mean, drawn from a population "
                                      "whose centre and spread are estimated (partial pooling).",
                      "independent": "each site is fitted on its own (no sharing between sites).",
                      "complete": "all sites share one range, sill and nugget; each keeps its own mean."}.get(
                          s.get("pooling"), "") + " Prediction at a site conditions on that site's points only.</p>")
    out.append(f"<p>Transform: {esc(s.get('transform'))}; trend: polynomial of order {s.get('trend')} in the "
               f"coordinates{'; covariates ' + esc(', '.join(s.get('covariates'))) if s.get('covariates') else ''}; "
               f"nugget: {'yes' if s.get('nugget') else 'no (τ² = 0)'}.</p>")
    out.append("<h3>Priors (penalised complexity; Fuglstad, Simpson, Lindgren and Rue 2019; Simpson et al. 2017)</h3>")
    out.append("<span class=\"formula\">1 / R ~ Exponential(λ₁), λ₁ = −ln(α₁) R₀   so that P(R &lt; R₀) = α₁   "
               "(R: practical range)\nσ ~ Exponential(λ₂), λ₂ = −ln(α₂) / S₀   so that P(σ &gt; S₀) = α₂\n"
               "τ ~ Exponential(λ₃), λ₃ = −ln(α₃) / T₀   so that P(τ &gt; T₀) = α₃\n"
               "β (standardised) ~ N(0, b²) independently</span>")
    if f0 is None:
        out.append(gap("not available: no fit completed, so the resolved prior values are unknown"))
    elif ctx.several:
        out.append("<p>In the several-site model these statements set the population (hierarchical pooling) or "
                   "each site's prior (independent pooling); the nugget enters as a fraction of the sill. The "
                   "resolved values and hyperpriors are in the fit's fit.json and in the prior section below.</p>")
    else:
        p = f0.report["model"]["priors"]
        m = f0.report["model"]
        du, vu = m.get("distance_units") or "distance units", m.get("value_units") or "value units"
        rows = [{"quantity": "practical range R", "setting": f"P(R < {fmt(p['range'][0])} {du}) = {fmt(p['range'][1])}",
                 "rate": p.get("range_rate")},
                {"quantity": "field sd σ", "setting": f"P(σ > {fmt(p['sd'][0])} {vu}) = {fmt(p['sd'][1])}",
                 "rate": p.get("sd_rate")}]
        if m.get("nugget"):
            rows.append({"quantity": "nugget sd τ",
                         "setting": f"P(τ > {fmt(p['nugget'][0])} {vu}) = {fmt(p['nugget'][1])}",
                         "rate": p.get("nugget_rate")})
        rows.append({"quantity": "trend coefficients (standardised)", "setting": f"b = {fmt(p.get('beta_sd'))}",
                     "rate": None})
        out.append(html_table(rows, ["quantity", "setting", "rate"], headers=["quantity", "prior statement", "rate λ"],
                              left=["quantity", "setting"]))
        out.append(f"<p class=\"small\">Values modelled in {esc(vu)}; distances in {esc(du)}; n = {m['n']}. "
                   "Settings not given in the study take the documented defaults (R₀ = 5% of the largest distance, "
                   "S₀ = T₀ = 2 × sd of the detrended values, α = 0.05).</p>")
    smp = ctx.settings.get("sampler", {})
    out.append(f"<p>Sampler: {esc(smp.get('name'))} (NUTS), {smp.get('chains')} chains × {smp.get('draws')} draws after "
               f"{smp.get('tune')} tuning iterations, target acceptance {smp.get('target_accept') or 'by default (0.8; 0.9 with several sites)'}, seed {smp.get('seed')}.</p>")
    return _section("model", "Model and priors", "\n".join(out))


def diagnostics(ctx: Ctx) -> str:
    out = []
    for f in ctx.fams:
        out.append(f"<h3>{esc(f.name)}</h3>")
        d = f.diagnostics
        if d is None:
            out.append(gap("not available: the check stage did not run for this family (skipped or failed)"))
            continue
        verdict = d.get("verdict", "?")
        cls = {"pass": "ok", "warn": "warn"}.get(verdict, "banner")
        label = "NOT CONVERGED" if verdict == "fail" else verdict.upper()
        out.append(f"<div class=\"{cls}\">verdict: {esc(label)} ({d.get('n_chains')} chains × {d.get('n_draws')} "
                   f"draws; divergences {d.get('divergences')})</div>")
        rows = [{"parameter": k, **v} for k, v in d.get("parameters", {}).items()]
        if rows:
            out.append(html_table(rows, ["parameter", "mean", "sd", "rhat", "ess_bulk", "ess_tail", "mcse_mean", "iat"],
                                  left=["parameter"]))
        th = d.get("thresholds", {})
        th_rows = [{"check": k, "threshold": v.get("value") if isinstance(v, Mapping) else v,
                    "source": v.get("source", "") if isinstance(v, Mapping) else ""} for k, v in th.items()]
        if th_rows:
            out.append("<p class=\"small\">Thresholds of the verdict:</p>")
            out.append(html_table(th_rows, ["check", "threshold", "source"], left=["check", "source"]))
        for p in d.get("problems", []):
            out.append(f"<p>[{esc(p.get('level', '').upper())}] {esc(p.get('message'))} <span class=\"small\">"
                       f"(source: {esc(p.get('source'))}; advice: {esc(p.get('advice'))})</span></p>")
        figs = sorted((f.folder / DIAGNOSTICS_DIR).glob("*.png"))
        for fig in figs:
            if fig.name.startswith(("acf", "trace")):
                out.append(img_tag(fig, fig.name, f"{f.name}: {fig.stem.replace('_', ' ')}"))
    return _section("diagnostics", "Convergence diagnostics", "\n".join(out))


_POSTERIOR_ROWS = ("practical_range", "partial_sill", "nugget", "total_sill", "microergodic", "nugget_ratio", "scale",
                   "anisotropy_angle", "anisotropy_ratio", "practical_range_major", "practical_range_minor")


def posterior(ctx: Ctx) -> str:
    out = []
    for f in ctx.fams:
        out.append(f"<h3>{esc(f.name)}</h3>")
        if f.report is None:
            out.append(gap("not available: no fit for this family"))
            continue
        if f.report.get("converged") is False:
            out.append("<div class=\"banner\">NOT CONVERGED: do not use these numbers.</div>")
        if ctx.several:
            from bayesgeo.report.sites import site_posterior

            out.append(site_posterior(ctx, f))
            continue
        ps = f.report["parameters"]
        rows = [{"parameter": k, **ps[k]} for k in _POSTERIOR_ROWS if k in ps]
        rows += [{"parameter": k, **v} for k, v in ps.items() if k.startswith("beta")]
        out.append(html_table(rows, ["parameter", "q50", "mean", "sd", "q05", "q95", "hdi90_low", "hdi90_high", "units"],
                              headers=["parameter", "median", "mean", "sd", "5%", "95%", "90% HDI low",
                                       "90% HDI high", "units"], left=["parameter", "units"]))
        out.append("<p class=\"small\">5% and 95%: equal-tailed quantiles; HDI: highest-density interval. "
                   "The microergodic parameter is σ²/φ<sup>2ν</sup> (Zhang 2004).</p>")
        if "anisotropy_angle" in ps:
            out.append("<p class=\"small\">Anisotropy: the angle is the azimuth of the longest range in degrees "
                       "clockwise from north, modulo 180 (a value below 0 or above 180 names the same direction "
                       "180 degrees away); the ratio is the longest over the shortest practical range, whose "
                       "geometric mean is the practical range above (docs/model.md).</p>")
    return _section("posterior", "Posterior: range, sills, nugget", "\n".join(out))


def priors(ctx: Ctx) -> str:
    out = []
    for f in ctx.fams:
        out.append(f"<h3>{esc(f.name)}</h3>")
        if f.tree is None:
            out.append(gap("not available: " + (f"the fit could not be read ({f.error})" if f.error
                                                 else "no fit for this family")))
            continue
        if ctx.several:
            from bayesgeo.report.sites import site_priors

            if (f.folder / "prior_check.png").is_file():
                out.append(img_tag(f.folder / "prior_check.png", f"prior predictive check, {f.name}",
                                   "Prior predictive check"))
            out.append(site_priors(ctx, f))
            continue
        if (f.folder / "prior_check.png").is_file():
            out.append(img_tag(f.folder / "prior_check.png", f"prior predictive check, {f.name}",
                               "Prior predictive check: the band of semivariograms the priors allow, over the "
                               "empirical semivariogram of the detrended data"))
        try:
            out.append(img_tag(_fig_png(prior_posterior_figure(f.tree)), f"prior and posterior, {f.name}",
                               "A posterior much narrower than its prior shows the data inform the parameter; "
                               "one close to the prior shows it does not."))
        except Exception as err:  # noqa: BLE001
            out.append(gap(f"figure not drawn: {type(err).__name__}: {err}"))
        sens = prior_sensitivity(f.tree)
        if isinstance(sens, str):
            out.append(gap(f"prior sensitivity {sens}"))
        else:
            cols = [c for c in sens[0] if c != "parameter"]
            out.append(html_table(sens, ["parameter", *cols], left=["parameter", "diagnosis"]))
            out.append("<p class=\"small\">Power-scaling sensitivity (Kallioinen, Paananen, Bürkner and Vehtari 2023, "
                       "Statistics and Computing 34) computed by arviz.psense_summary: the cumulative Jensen–Shannon "
                       "distance when the prior (or the likelihood) is raised to a power near 1. A value above 0.05 "
                       "(the authors' suggested threshold) flags a prior that shapes the posterior; ArviZ labels rows "
                       "with both values above 0.05 \"potential prior-data conflict\". For the practical range and "
                       "the partial and total sill such flags are expected unless the data set is large: with the "
                       "smoothness fixed the data pin down mainly the microergodic parameter (Zhang 2004), and the "
                       "penalised-complexity range prior, proportional to R<sup>−2</sup> in its tail, then shapes the "
                       "upper part of the range's posterior. Read the flags with the prior-against-posterior figure, "
                       "and report results that depend on the prior with a second prior as a sensitivity "
                       "analysis.</p>")
    return _section("priors", "Prior against posterior and prior sensitivity", "\n".join(out))


def vgcheck(ctx: Ctx) -> str:
    out = []
    for f in ctx.fams:
        out.append(f"<h3>{esc(f.name)}</h3>")
        if ctx.several:
            from bayesgeo.report.sites import site_vgcheck

            out.append(site_vgcheck(ctx, f))
            continue
        png, csv = (f.folder / name for name in vgcheck_names())
        if not png.is_file():
            out.append(gap("not available: the variogram check did not run for this family (skipped or failed)"))
            continue
        out.append(img_tag(png, f"variogram check {f.name}", "Observed semivariogram against the band of "
                           "semivariograms of data replicated from the posterior (Gelman, Meng and Stern 1996)"))
        if csv.is_file():
            import pandas as pd

            frame = pd.read_csv(csv)
            out.append(f"<p>{int(frame['outside'].astype(bool).sum())} of {int((frame['pairs'] > 0).sum())} "
                       "lag bins lie outside the 90% replicate band.</p>")
    return _section("vgcheck", "Posterior predictive variogram check", "\n".join(out))


def maps(ctx: Ctx) -> str:
    from bayesgeo.report.sites import map_block, site_maps

    out = []
    for f in ctx.fams:
        out.append(f"<h3>{esc(f.name)}</h3>")
        if ctx.several:
            out.append(site_maps(ctx, f))
        else:
            out += map_block(f.name, *(f.folder / name for name in prediction_names()))
    return _section("maps", "Predictive and exceedance maps", "\n".join(out))


def sites(ctx: Ctx) -> str:
    """Shrinkage and sampling design (several-site runs; empty otherwise)."""
    if not ctx.several:
        return ""
    from bayesgeo.report.sites import sites_section

    return sites_section(ctx)


def compare(ctx: Ctx) -> str:
    fams = ctx.settings.get("model", {}).get("covariance", [])
    if len(fams) < 2:
        return _section("compare", "Model comparison", "<p>One covariance family was fitted; list several in "
                        "[model] covariance to compare them by PSIS-LOO.</p>")
    obj = _read_json(ctx.root / RUN_COMPARE / COMPARISON_FILE)
    if obj is None:
        return _section("compare", "Model comparison", gap("not available: the comparison stage did not run "
                                                            "(skipped or failed)"))
    out = [html_table(obj["ranking"], ["fit", "elpd_loo", "se", "elpd_diff", "dse", "p_loo", "weight",
                                       "pareto_k_high"], left=["fit"]),
           f"<p class=\"small\">{esc(obj.get('method'))}. elpd: expected log predictive density of left-out points "
           "(higher is better); a difference smaller than about twice its standard error (dse) is not decisive. "
           f"pareto_k_high counts points with Pareto k above {fmt(obj.get('k_threshold'))} "
           f"({esc(obj.get('k_threshold_source'))}).</p>"]
    if (ctx.root / "compare" / "loo_pit.png").is_file():
        out.append(img_tag(ctx.root / "compare" / "loo_pit.png", "LOO-PIT", "LOO-PIT calibration of every fit"))
    for c in obj.get("cautions", []):
        out.append(f"<p class=\"small\">caution: {esc(c)}</p>")
    return _section("compare", "Model comparison", "\n".join(out))


def cautions(ctx: Ctx) -> str:
    items = list(LIMITATIONS)
    if ctx.several:
        from bayesgeo.report.sites import SITE_CAUTION

        items.append(SITE_CAUTION)
    for f in ctx.fams:
        if f.report:
            items += [f"{f.name}: {c}" for c in f.report.get("cautions", [])]
    seen, uniq = set(), []
    for c in items:
        if c not in seen:
            seen.add(c)
            uniq.append(c)
    body = "<ul>" + "".join(f"<li>{esc(c)}</li>" for c in uniq) + "</ul>"
    return _section("cautions", "Limitations and cautions", body)


def repro(ctx: Ctx) -> str:
    m = ctx.manifest
    out = ["<h3>Inputs</h3>",
           html_table([{"file": k, **v} for k, v in m.get("inputs", {}).items()], ["file", "sha256", "bytes"],
                      left=["file", "sha256"]),
           "<h3>Software</h3>",
           html_table([{"package": k, "version": v} for k, v in m.get("versions", {}).items()], ["package", "version"],
                      left=["package", "version"]),
           "<h3>Platform and seeds</h3>",
           html_table([{"item": k, "value": v} for k, v in {**m.get("platform", {}),
                                                             **{f"seed ({k})": v for k, v in m.get("seeds", {}).items()}}.items()],
                      ["item", "value"], left=["item", "value"]),
           f"<p>Command line: <code>{esc(' '.join(m.get('command_line', [])))}</code></p>",
           "<h3>Stages</h3>",
           html_table([{"stage": r["stage"], "verdict": r.get("verdict"), "seconds": r.get("seconds"),
                        "command": " ".join(r.get("command", []))} for r in m.get("stages", [])],
                      ["stage", "verdict", "seconds", "command"], left=["stage", "verdict", "command"]),
           "<h3>Study file</h3>",
           f"<pre>{esc(m.get('study', {}).get('text', ''))}</pre>",
           "<p class=\"small\">The SHA-256 of every output file is in <code>manifest.json</code> beside this report. "
           "The same study, data, software and seeds give the same numbers.</p>"]
    return _section("repro", "Reproducibility appendix", "\n".join(out))


SECTIONS = (job, explore, model, diagnostics, posterior, sites, priors, vgcheck, maps, compare, cautions, repro)
