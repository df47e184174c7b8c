"""Outputs of a several-site fit: derived variables in data units, population summaries, the
new-site predictive distribution, summaries per site, and the shrinkage table and figure.

Conversions from the common standardised scale (:mod:`bayesgeo.fitting.hierarchical`): with ``m``, ``s``
and ``D`` the value mean, value sd and distance scale,

    practical_range = r D,   scale = practical_range / range_factor,
    partial_sill = sd_z^2 s^2,   nugget = nugget_sd_z^2 s^2,   total_sill = partial_sill + nugget,
    nugget_ratio = nugget / total_sill,   beta = beta_z s  (+ m for the intercept term "1").

Population quantities under hierarchical pooling (log-normal algebra): the population median of
the practical range is ``R D`` and its mean ``R D exp(s_r^2 / 2)``; likewise for the partial sill
with ``S^2 s^2`` and ``s_v``; the median nugget ratio is ``expit(mu_f)``; the log nugget is
``log partial sill + logit f``, normal with mean ``2 log S + mu_f`` and variance ``s_v^2 + s_f^2``;
the mean total sill is the sum of the means (linearity of expectation).
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.common.io import to_jsonable
from bayesgeo.common.layout import DESIGN, SHRINKAGE
from bayesgeo.fitting.looks import looks_line, report_fields
from bayesgeo.fitting.shrinkage import plot_shrinkage

__all__ = [
    "CAUTIONS",
    "PARAMETERS",
    "add_derived",
    "new_site_draws",
    "interval",
    "parameter_block",
    "site_blocks",
    "population_block",
    "new_site_block",
    "summary_table",
    "site_report",
    "summary_text_sites",
    "write_site_extras",
    "write_csv",
    "with_site_diagnostics",
    "site_cautions",
]

#: Cautions carried by every several-site output (they may feed contamination decisions).
CAUTIONS = (
    "These estimates describe spatial correlation and variability of the measured values; they are not by "
    "themselves a basis for a contamination, exposure or remediation decision.",
    "Apply local regulations and guidance, and have results reviewed by a licensed professional before use in "
    "any regulatory submission or decision.",
    "A hierarchical model assumes the sites are exchangeable (alike a priori); sites of a different kind "
    "(geology, source, sampling method or laboratory) should not share a population.",
    "The new-site predictive distribution describes a site like those fitted; it is no substitute for sampling "
    "the new site.",
)

#: Per-site derived parameters reported in blocks (data units), as for a single-site fit.
PARAMETERS = ("practical_range", "scale", "partial_sill", "nugget", "total_sill", "nugget_ratio", "microergodic",
              "anisotropy_angle", "anisotropy_ratio", "practical_range_major", "practical_range_minor")


def _units(spec) -> dict[str, str]:
    sq = f"({spec.model_units})^2"
    return {"practical_range": spec.distance_units, "scale": spec.distance_units, "partial_sill": sq,
            "nugget": sq, "total_sill": sq, "nugget_ratio": "1", "beta": spec.model_units,
            "microergodic": f"{sq} / ({spec.distance_units})^p"}


def _covariance(spec):
    return get_covariance(spec.covariance, None if spec.covariance != "matern" else spec.nu)


def _parameters_from(prange, psill, nugget, spec) -> dict[str, xr.DataArray]:
    """practical_range ... nugget_ratio from data-unit range, partial sill and nugget."""
    total = psill + nugget
    out = {"practical_range": prange, "scale": prange / spec.range_factor, "partial_sill": psill,
           "nugget": nugget, "total_sill": total, "nugget_ratio": nugget / total}
    units = _units(spec)
    for k, v in out.items():
        v.attrs = {"units": units[k]}
    return out


def add_derived(post: xr.Dataset, spec) -> xr.Dataset:
    """Add per-site and population variables in data units to a posterior ``Dataset`` (returns a copy).

    ``spec`` is the :class:`bayesgeo.fitting.site_inputs.SiteSpec` of the fit. Per-site variables are
    those of the single-site fit (:func:`bayesgeo.fitting.posterior.derive`, same names, units and
    long names) with a ``site`` dim; without a nugget, ``nugget`` and ``nugget_ratio`` are zero.
    """
    from bayesgeo.fitting.posterior import derive

    post = derive(post, spec.fit_spec(spec.sites[0]))  # the constants used are common to all sites
    if "nugget" not in post:
        sq = f"({spec.model_units})^2"
        post["nugget"] = xr.zeros_like(post["partial_sill"]).assign_attrs(units=sq, long_name="nugget (none fitted)")
        post["nugget_ratio"] = xr.zeros_like(post["partial_sill"]).assign_attrs(units="1", long_name="nugget / total sill")
    units = _units(spec)
    if spec.pooling == "hierarchical":
        med_r = spec.practical_range_of(post["population_range_z"])
        med_v = spec.variance_of(post["population_sd_z"])
        sr, sv = post["range_site_sd"], post["sill_site_sd"]
        pop = {
            "population_practical_range_median": med_r,
            "population_practical_range_mean": med_r * np.exp(0.5 * sr**2),
            "population_partial_sill_median": med_v,
            "population_partial_sill_mean": med_v * np.exp(0.5 * sv**2),
        }
        if spec.nugget:
            mu_f, sf = post["nugget_logit_mu"], post["nugget_site_sd"]
            pop["population_nugget_ratio_median"] = 1.0 / (1.0 + np.exp(-mu_f))
            pop["population_nugget_median"] = med_v * np.exp(mu_f)
            pop["population_nugget_mean"] = med_v * np.exp(mu_f + 0.5 * (sv**2 + sf**2))
        else:
            pop["population_nugget_ratio_median"] = xr.zeros_like(med_r)
            pop["population_nugget_median"] = xr.zeros_like(med_r)
            pop["population_nugget_mean"] = xr.zeros_like(med_r)
        pop["population_total_sill_mean"] = pop["population_partial_sill_mean"] + pop["population_nugget_mean"]
    elif spec.pooling == "complete":
        first = {k: post[k].isel(site=0, drop=True) for k in ("practical_range", "partial_sill", "nugget")}
        pop = {
            "population_practical_range_median": first["practical_range"],
            "population_practical_range_mean": first["practical_range"],
            "population_partial_sill_median": first["partial_sill"],
            "population_partial_sill_mean": first["partial_sill"],
            "population_nugget_ratio_median": first["nugget"] / (first["nugget"] + first["partial_sill"]),
            "population_nugget_median": first["nugget"],
            "population_nugget_mean": first["nugget"],
            "population_total_sill_mean": first["nugget"] + first["partial_sill"],
        }
    else:
        pop = {}
    for k, v in pop.items():
        base = k.removeprefix("population_").rsplit("_", 1)[0]
        post[k] = v
        post[k].attrs = {"units": units.get(base, ""), "long_name": k.replace("_", " ")}
    return post


def new_site_draws(post: xr.Dataset, spec, *, seed: int) -> xr.Dataset:
    """Posterior predictive draws of a new site's parameters: one fresh eta ~ N(0, 1) per draw.

    Under complete pooling every site shares the parameters, so the new site gets them too.
    Returns a ``Dataset`` with dims ``(chain, draw)`` and the variables of :data:`PARAMETERS`.
    """
    shape = (post.sizes["chain"], post.sizes["draw"])
    dims = ("chain", "draw")
    coords = {"chain": post["chain"], "draw": post["draw"]}
    if spec.pooling == "hierarchical":
        rng = np.random.default_rng([int(seed), 6])
        eta = rng.standard_normal((3, *shape))
        r = post["population_range_z"].values * np.exp(post["range_site_sd"].values * eta[0])
        sd = post["population_sd_z"].values * np.exp(0.5 * post["sill_site_sd"].values * eta[1])
        if spec.nugget:
            logit_f = post["nugget_logit_mu"].values + post["nugget_site_sd"].values * eta[2]
            tau = sd * np.exp(0.5 * logit_f)  # tau^2 = sd^2 f / (1 - f)
        else:
            tau = np.zeros(shape)
        prange = xr.DataArray(spec.practical_range_of(r), dims=dims, coords=coords)
        psill = xr.DataArray(spec.variance_of(sd), dims=dims, coords=coords)
        nug = xr.DataArray(spec.variance_of(tau), dims=dims, coords=coords)
    elif spec.pooling == "complete":
        prange, psill, nug = (post[k].isel(site=0, drop=True) for k in ("practical_range", "partial_sill", "nugget"))
    else:
        raise ValueError("independent pooling has no population, hence no new-site predictive distribution")
    out = xr.Dataset(_parameters_from(prange, psill, nug, spec))
    out.attrs = {"what": "posterior predictive distribution of the parameters of a new site like those fitted",
                 "pooling": spec.pooling, "seed": int(seed)}
    return out


# --- summaries ----------------------------------------------------------------------------------


def _hdi(x: np.ndarray, prob: float) -> tuple[float, float]:
    """Shortest interval holding a share ``prob`` of the draws (highest-density interval)."""
    s = np.sort(x)
    n = s.size
    k = max(1, int(np.floor(prob * n)))
    widths = s[k:] - s[: n - k]
    i = int(np.argmin(widths))
    return float(s[i]), float(s[i + k])


def interval(x, prob: float = 0.9) -> dict[str, float]:
    """mean, sd, equal-tailed quantiles (q05, q50, q95 for prob 0.9) and HDI of a set of draws."""
    x = np.asarray(x, dtype=float).ravel()
    lo = (1.0 - prob) / 2.0
    q = np.quantile(x, [lo, 0.5, 1.0 - lo])
    tag = f"{100 * lo:02.0f}", f"{100 * (1 - lo):02.0f}"
    h = _hdi(x, prob)
    pct = f"{100 * prob:g}"
    return {"mean": float(x.mean()), "sd": float(x.std(ddof=1)), f"q{tag[0]}": float(q[0]), "q50": float(q[1]),
            f"q{tag[1]}": float(q[2]), f"hdi{pct}_low": h[0], f"hdi{pct}_high": h[1]}


def parameter_block(ds: xr.Dataset, names=PARAMETERS, *, prob: float = 0.9) -> dict:
    """``{name: interval(...) + units}`` for each scalar variable of ``ds`` (dims chain, draw only)."""
    out = {}
    for name in names:
        if name in ds:
            out[name] = {**interval(ds[name].values, prob), "units": ds[name].attrs.get("units", "")}
    return out


def site_blocks(tree: xr.DataTree, *, prob: float = 0.9) -> dict:
    """Per site: the parameter blocks of :data:`PARAMETERS` plus ``n``."""
    from bayesgeo.fitting.site_inputs import site_spec

    post = tree["posterior"].to_dataset()
    n = site_spec(tree).n
    out = {}
    for i, site in enumerate(post["site"].values):
        one = post[[p for p in PARAMETERS if p in post]].sel(site=site)
        out[str(site)] = {"n": int(n[i]), "parameters": parameter_block(one, prob=prob)}
    return out


def population_block(tree: xr.DataTree, *, prob: float = 0.9) -> dict:
    """Blocks of the ``population_*`` variables and of the between-site spreads (empty when independent)."""
    post = tree["posterior"].to_dataset()
    names = [v for v in post.data_vars if str(v).startswith("population_") and not str(v).endswith("_z")]
    names += [v for v in ("range_site_sd", "sill_site_sd", "nugget_site_sd") if v in post]
    return parameter_block(post, names, prob=prob)


def new_site_block(tree: xr.DataTree, *, prob: float = 0.9) -> dict:
    """Blocks of the new-site predictive parameters (empty when independent)."""
    if "new_site" not in tree.children:
        return {}
    return parameter_block(tree["new_site"].to_dataset(), prob=prob)


def summary_table(tree: xr.DataTree, *, prob: float = 0.9) -> list[dict]:
    """Rows (site, parameter, units, mean, sd, quantiles, HDI) for every site, population and new-site
    parameter, for a CSV summary."""
    rows = []
    for site, block in site_blocks(tree, prob=prob).items():
        for name, vals in block["parameters"].items():
            rows.append({"site": site, "parameter": name, **vals})
    for name, vals in population_block(tree, prob=prob).items():
        rows.append({"site": "(population)", "parameter": name, **vals})
    for name, vals in new_site_block(tree, prob=prob).items():
        rows.append({"site": "(new site)", "parameter": name, **vals})
    return rows


# --- the fit as a report and on disk -------------------------------------------------------------

#: Name of the NetCDF file of a saved several-site fit (as for a single-site fit).


def with_site_diagnostics(tree: xr.DataTree, diagnostics) -> xr.DataTree:
    """A copy of ``tree`` carrying the diagnostics JSON, with cautions updated for its verdict."""
    import json

    from bayesgeo.fitting.site_inputs import site_spec
    from bayesgeo.fitting.posterior import approximation_of

    out = tree.copy()
    diag = to_jsonable(dict(diagnostics))
    out.attrs["diagnostics"] = json.dumps(diag)
    out.attrs["cautions"] = json.dumps(site_cautions(site_spec(tree), tree["posterior"].to_dataset(), diag,
                                                     approximation_of(tree) or {}))
    return out




def table_rows(ds: xr.Dataset) -> list[dict]:
    """A shrinkage or design ``Dataset`` as a list of flat rows (one per site and parameter, or spacing)."""
    frame = ds.to_dataframe().reset_index()
    return [{k: to_jsonable(v) for k, v in row.items()} for row in frame.to_dict(orient="records")]


def site_report(tree: xr.DataTree, *, shrinkage: xr.Dataset | None = None, design: xr.Dataset | None = None,
                prob: float = 0.9) -> dict:
    """The several-site fit as one JSON-able dict.

    Keys as for a single-site fit (``parameters``, ``sampler``, ``diagnostics``, ``converged``,
    ``model``, ``cautions``) plus ``sites`` ({site: {"n", "parameters"}}), ``population``,
    ``new_site`` and, when given, ``shrinkage`` and ``design`` rows. ``parameters`` holds the
    population medians under the single-site names (hierarchical pooling), the shared values
    (complete pooling), or nothing (independent pooling); ``parameters_note`` says which.
    """
    from bayesgeo.fitting.site_inputs import site_spec
    from bayesgeo.fitting.posterior import approximation_of, fit_settings, stored

    tree = getattr(tree, "tree", tree)  # a Fit or its tree
    settings, spec = fit_settings(tree), site_spec(tree)
    post = tree["posterior"].to_dataset()
    params, note = {}, "independent pooling: no population; see 'sites'"
    if spec.pooling != "independent":
        names = {"practical_range": "population_practical_range_median", "partial_sill": "population_partial_sill_median",
                 "nugget": "population_nugget_median", "nugget_ratio": "population_nugget_ratio_median",
                 "total_sill": "population_total_sill_mean"}
        params = {k: {**interval(post[v].values, prob), "units": post[v].attrs.get("units", "")}
                  for k, v in names.items() if v in post}
        note = ("population medians (total_sill: population mean) of the hierarchical model"
                if spec.pooling == "hierarchical" else "values shared by all sites (complete pooling)")
    smp = settings["sampler"]
    diag = stored(tree, "diagnostics")
    out = {
        "parameters": params,
        "parameters_note": note,
        "sampler": {k: smp.get(k2) for k, k2 in (("name", "sampler"), ("chains", "chains"), ("draws", "draws"),
                                                 ("tune", "tune"), ("seed", "seed"), ("seconds", "seconds"),
                                                 ("sampling_seconds", "sampling_seconds"),
                                                 ("target_accept", "target_accept"), ("adaptation", "adaptation"))}
        | report_fields(smp),
        "diagnostics": diag,
        "converged": None if diag is None else diag.get("verdict") != "fail",
        "model": {"pooling": spec.pooling, "covariance": spec.covariance, "nu": spec.nu, "nugget": spec.nugget,
                  "trend": spec.trend, "covariates": list(spec.covariates), "transform": spec.transform,
                  "n": int(sum(spec.n)), "n_sites": len(spec.sites), "value_units": spec.model_units,
                  "distance_units": spec.distance_units, "priors": spec.priors.to_dict(),
                  "hyperpriors": dict(spec.hyperpriors),
                  "standardisation": {"value_mean": spec.value_mean, "value_sd": spec.value_sd,
                                      "distance_scale": spec.distance_scale},
                  "small_sites": list(spec.small_sites)},
        "sites": site_blocks(tree, prob=prob),
        "population": population_block(tree, prob=prob),
        "new_site": new_site_block(tree, prob=prob),
        "cautions": stored(tree, "cautions", []),
        "approximation": approximation_of(tree),
    }
    if shrinkage is not None:
        out["shrinkage"] = table_rows(shrinkage)
    if design is not None:
        out["design"] = {"rows": table_rows(design), "caution": design.attrs.get("caution", ""),
                         "kind": design.attrs.get("kind"), "neighbours": design.attrs.get("neighbours")}
    return to_jsonable(out)


def summary_text_sites(report: dict) -> str:
    """Human-readable summary of a :func:`site_report`: one table per site, population, new site."""
    lines = []
    diag = report.get("diagnostics")
    if diag is not None and diag.get("verdict") == "fail":
        lines += ["*** NOT CONVERGED: do not use these numbers ***", ""]
    m, s = report["model"], report["sampler"]
    lines.append(f"bayesgeo fit ({m['pooling']} pooling, {m['n_sites']} sites, n = {m['n']}): {m['covariance']} "
                 f"covariance, nugget {'yes' if m['nugget'] else 'no'}, trend order {m['trend']}, "
                 f"transform {m['transform'] or 'none'}")
    lines.append(f"sampler {s['name']}: {s['chains']} chains x {s['draws']} draws (tune {s['tune']}), seed {s['seed']}, "
                 f"{(s['seconds'] or 0):.1f} s")
    if looks_line(s):
        lines.append(looks_line(s))
    cols = ["mean", "sd", "q05", "q50", "q95"]

    def table(title, block):
        if not block:
            return
        lines.extend(["", title])
        width = max(len(k) for k in block) + 2
        lines.append("  " + "parameter".ljust(width) + "".join(c.rjust(11) for c in cols) + "  units")
        for name, p in block.items():
            lines.append("  " + name.ljust(width) + "".join(f"{p[c]:11.4g}" for c in cols) + f"  {p['units']}")

    for site, b in report["sites"].items():
        table(f"site {site} (n = {b['n']})", b["parameters"])
    table("population", report["population"])
    table("new site (posterior predictive)", report["new_site"])
    lines.extend(["", f"diagnostics: {diag.get('verdict', '?').upper() if diag else 'not checked'}", ""])
    lines += [f"- {c}" for c in report["cautions"]]
    return "\n".join(lines) + "\n"


def write_csv(path: Path, rows: list[dict], extra: dict | None = None) -> None:
    """``rows`` (dicts of one shape) as a CSV file, floats to 10 significant digits, ``extra`` columns added to
    every row; an empty file for no rows."""
    import csv

    if not rows:
        path.write_text("", encoding="utf-8")
        return
    fields = list(rows[0].keys()) + list((extra or {}).keys())
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=fields, lineterminator="\n")
        w.writeheader()
        for r in rows:
            w.writerow({**{k: (f"{v:.10g}" if isinstance(v, float) else v) for k, v in r.items()}, **(extra or {})})


def write_site_extras(folder: Path, tree: xr.DataTree, verdict: str, *, shrinkage: xr.Dataset | None = None,
                      design: xr.Dataset | None = None) -> None:
    """The several-site files of a fit folder besides the common ones (:func:`bayesgeo.fitting.fitfile.save_fit`):
    ``shrinkage.csv`` / ``shrinkage.png`` and ``design.csv`` / ``design.png`` when given."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    from bayesgeo.data.design import plot_design

    suffix = " (NOT CONVERGED)" if verdict == "fail" else ""
    if shrinkage is not None:
        write_csv(folder / SHRINKAGE[0], table_rows(shrinkage))
        pop = tree["new_site"].to_dataset() if "new_site" in tree.children else None
        fig = plot_shrinkage(shrinkage, population=pop,
                             title=f"Shrinkage: independent vs {shrinkage.attrs.get('pooling')}{suffix}")
        fig.savefig(folder / SHRINKAGE[1], dpi=120)
        plt.close(fig)
    if design is not None:
        write_csv(folder / DESIGN[0], table_rows(design))
        fig = plot_design(design, title=f"Sampling design for a new site{suffix}")
        fig.savefig(folder / DESIGN[1], dpi=120)
        plt.close(fig)


def site_cautions(spec, posterior: xr.Dataset | None = None, diagnostics: dict | None = None,
                  approximation: dict | None = None) -> list[str]:
    """Cautions of a several-site fit (``spec``: its :class:`bayesgeo.fitting.site_inputs.SiteSpec`): the single-site ones, the pooling ones, small-site warnings and
    the nearest-neighbour approximation check of each nn site."""
    from bayesgeo.fitting.posterior import cautions

    out = cautions(replace(spec.fit_spec(spec.sites[0]), censored=0), None, diagnostics)
    if spec.site_censored:
        n_all, k_all = int(np.sum(spec.n)), int(np.sum(spec.site_censored))
        per = ", ".join(f"{s} {k} of {n}" for s, k, n in zip(spec.sites, spec.site_censored, spec.n))
        out.append(f"{k_all} of {n_all} values are non-detects ({per}), modelled as left-censored at their reporting "
                   "limits (each one a latent value below its limit, sampled with the parameters), not replaced by a "
                   "number.")
        high = [s for s, k, n in zip(spec.sites, spec.site_censored, spec.n) if k > 0.5 * n]
        if high:
            out.append(f"At site(s) {', '.join(high)} more than half of the values are non-detects: their estimates "
                       "rest on few detected values and on the model below the limits; read them with extra care.")
    if posterior is not None and "practical_range" in posterior:
        med = posterior["practical_range"].median(dim=("chain", "draw")).values
        far = [s for s, m, e in zip(spec.sites, med, spec.site_extents) if m > 0.5 * e]
        if far:
            out.append(f"At site(s) {', '.join(far)} the posterior median practical range exceeds half the largest "
                       "distance between that site's samples; the data say little about the range beyond that, so "
                       "its upper interval reflects the prior and the population (common practice).")
    out += list(CAUTIONS) if spec.pooling != "independent" else list(CAUTIONS[:2])
    out += list(spec.warnings)
    out += [f"Site {site}: {check['message']}" for site, check in (approximation or {}).items()]
    return out
