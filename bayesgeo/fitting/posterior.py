"""The single-site fit: sampling, derived quantities in data units, summary table and report.

A fit is one ``xarray.DataTree`` that describes itself:

* ``posterior``: the sampled variables on the model's standardised scale (``*_z``) and the derived
  variables in data units, each with ``units`` and ``long_name`` attributes:
  ``practical_range``, ``scale``, ``partial_sill``, ``nugget``, ``total_sill``, ``nugget_ratio``,
  ``microergodic`` (sigma^2 / phi^p, Zhang 2004, JASA 99) and ``beta`` (dim ``term``);
* ``sample_stats``: the sampler's statistics;
* ``observed_data``: ``value`` (as measured) and ``model_value`` (transformed, when a transform is used);
* ``constant_data``: ``x``, ``y`` and ``design`` (obs, term);
* root attributes: ``settings`` (JSON: every setting of :class:`bayesgeo.fitting.model.FitSpec`, the
  sampler settings, seed, package versions), ``cautions`` (JSON list) and, once checked,
  ``diagnostics`` (JSON from the diagnostics stage).

On disk (:func:`bayesgeo.fitting.fitfile.save_fit`, for both kinds of fit): ``DIR/posterior.nc`` (the tree, netCDF4), ``DIR/summary.csv``,
``DIR/summary.txt``, ``DIR/fit.json`` and ``DIR/prior_check.png``.
"""

from __future__ import annotations

import json
import platform
from collections.abc import Mapping, Sequence

import numpy as np
import xarray as xr

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.data.points import FIT_DATA_ATTRS, sites_of
from bayesgeo.explore.trend import design_categories
from bayesgeo.common.io import plain_attr, to_jsonable
from bayesgeo.fitting.model import FitSpec, build_model_and_inputs, censored_index
from bayesgeo.fitting.looks import DEFAULT_ACCEPT, RERUN_ACCEPT, convergence_look, looks_line, report_fields, sample_fit
from bayesgeo.fitting.sampling import new_seed
from bayesgeo.gp.trend_posterior import draw_trend
from bayesgeo.common.validate import InputError
from bayesgeo.gp.engines import engine, with_imputed
from bayesgeo.common.defaults import CHAINS, DRAWS, TUNE
from bayesgeo.common.layout import FIT_FILE

__all__ = [
    "FIT_FILE",
    "PARAMETERS",
    "fit",
    "derive",
    "fit_spec",
    "fit_settings",
    "summary_table",
    "fit_report",
    "summary_text",
    "cautions",
    "with_diagnostics",
    "prior_check_figure",
]

#: Name of the NetCDF file of a saved fit.
#: Scalar derived parameters reported for every fit (those that apply).
PARAMETERS = ("practical_range", "scale", "partial_sill", "nugget", "total_sill", "nugget_ratio", "microergodic",
              "anisotropy_angle", "anisotropy_ratio", "practical_range_major", "practical_range_minor")
_FORMAT_VERSION = 1


def _versions() -> dict[str, str]:
    import arviz
    import pymc
    import pytensor

    from bayesgeo import __version__

    out = {"bayesgeo": __version__, "pymc": pymc.__version__, "pytensor": pytensor.__version__,
           "arviz": arviz.__version__, "xarray": xr.__version__, "numpy": np.__version__,
           "python": platform.python_version()}
    try:
        import nutpie

        out["nutpie"] = nutpie.__version__
    except ImportError:  # pragma: no cover - nutpie is a dependency
        pass
    return out


#: ``format`` values of the ``settings`` attribute (a fit written before formats were recorded is single-site).
SINGLE_SITE_FORMAT = "bayesgeo single-site fit"
SEVERAL_SITE_FORMAT = "bayesgeo several-site fit"


def fit_settings(tree: xr.DataTree, source: str | None = None) -> dict:
    """The decoded ``settings`` attribute of a fit: the one place it is parsed.

    Raises
    ------
    InputError
        One line naming ``source`` (the file, when known): no settings attribute, JSON cut short
        or edited, no ``model`` table, or an unknown ``format``.
    """
    where = f"{source}: " if source else ""
    raw = tree.attrs.get("settings")
    if raw is None:
        raise InputError(f"{where}no 'settings' attribute: not a bayesgeo fit (expected the output of 'bayesgeo fit')")
    try:
        settings = json.loads(raw)
    except (TypeError, ValueError) as err:
        raise InputError(f"{where}the 'settings' attribute is not valid JSON ({' '.join(str(err).split())}): the file "
                         "is damaged (cut short or edited); refit, or restore it from a copy") from None
    if not isinstance(settings, dict) or not isinstance(settings.get("model"), dict):
        raise InputError(f"{where}the 'settings' attribute holds no 'model' table: not a bayesgeo fit")
    fmt = settings.get("format", SINGLE_SITE_FORMAT)
    if fmt not in (SINGLE_SITE_FORMAT, SEVERAL_SITE_FORMAT):
        raise InputError(f"{where}settings of format {fmt!r}; expected {SINGLE_SITE_FORMAT!r} or {SEVERAL_SITE_FORMAT!r}")
    return settings


def decode_spec(settings: dict, cls, kind: str, source: str | None = None):
    """``cls.from_dict(settings["model"])`` (:class:`~bayesgeo.fitting.model.FitSpec` or
    :class:`~bayesgeo.fitting.site_inputs.SiteSpec`), or one InputError line naming ``source`` and the ``kind``
    of fit expected ("single-site", "several-site") when the model settings cannot be decoded."""
    try:
        return cls.from_dict(settings["model"])
    except (KeyError, TypeError, ValueError, AttributeError) as err:
        what = f"missing {err}" if isinstance(err, KeyError) else " ".join(str(err).split())
        where = f"{source}: " if source else ""
        raise InputError(f"{where}the model settings cannot be decoded ({what}): not a bayesgeo {kind} fit, "
                         "or a damaged one") from None


def fit_spec(tree: xr.DataTree, source: str | None = None) -> FitSpec:
    """The :class:`~bayesgeo.fitting.model.FitSpec` recorded in a fit's ``settings`` attribute."""
    return decode_spec(fit_settings(tree, source), FitSpec, "single-site", source)


def derive(posterior: xr.Dataset, spec: FitSpec) -> xr.Dataset:
    """Add the derived variables in data units to a posterior ``Dataset`` (returns a new one).

    With ``s`` = ``spec.value_sd``, ``D`` = ``spec.distance_scale`` and ``m`` = ``spec.value_mean``:
    practical range = D practical_range_z, scale = practical range / range_factor,
    partial sill = (s sd_z)^2, nugget = (s nugget_sd_z)^2 (absent without nugget),
    total sill = partial sill + nugget, nugget ratio = nugget / total sill,
    microergodic = partial sill / scale^p (absent for the Gaussian family), beta = s beta_z with
    m added to the intercept term ``"1"``.
    """
    cov = get_covariance(spec.covariance, spec.nu if spec.covariance == "matern" else None)
    s = spec.value_sd
    vu, du = spec.model_units, spec.distance_units or "distance units"
    out = posterior.copy()
    raw = {
        "practical_range_z": "practical range / largest inter-point distance",
        "sd_z": "sd of the spatial field / sd of the modelled values",
        "nugget_sd_z": "nugget sd / sd of the modelled values",
        "beta_z": "trend coefficients for standardised values",
        "anisotropy_z": "sampled anisotropy vector log(ratio) (cos 2 angle, sin 2 angle)",
        "variance_coords_z": "sampled coordinates of the variances: log(sd_z^2 + nugget_sd_z^2) and "
                             "logit(sd_z^2 / (sd_z^2 + nugget_sd_z^2))",
    }
    for name, text in raw.items():
        if name in out:
            out[name].attrs.update(units="1", long_name=text, scale="standardised (sampled)")
    prange = spec.practical_range_of(out["practical_range_z"])
    out["practical_range"] = prange.assign_attrs(
        units=du, long_name=f"practical range (distance where the correlation falls to 0.05{'; the range' if cov.name == 'spherical' else ''})")
    scale = prange / cov.range_factor
    out["scale"] = scale.assign_attrs(units=du, long_name=f"scale parameter phi of the {cov.label} correlation")
    psill = spec.variance_of(out["sd_z"])
    out["partial_sill"] = psill.assign_attrs(units=f"({vu})^2", long_name="partial sill sigma^2 (variance of the spatial field)")
    if spec.nugget:
        nug = spec.variance_of(out["nugget_sd_z"])
        out["nugget"] = nug.assign_attrs(units=f"({vu})^2", long_name="nugget tau^2 (variance not spatially correlated)")
        total = psill + nug
        out["total_sill"] = total.assign_attrs(units=f"({vu})^2", long_name="total sill sigma^2 + tau^2")
        out["nugget_ratio"] = (nug / total).assign_attrs(units="1", long_name="nugget / total sill")
    else:
        out["total_sill"] = psill.copy().assign_attrs(units=f"({vu})^2", long_name="total sill (no nugget: = partial sill)")
    if cov.microergodic_power is not None:
        p = cov.microergodic_power
        out["microergodic"] = (psill / scale**p).assign_attrs(
            units=f"({vu})^2 / ({du})^{p:g}", long_name=f"microergodic parameter sigma^2 / phi^{p:g} (Zhang 2004)")
    if "anisotropy_z" in out:
        from bayesgeo.gp.anisotropy import anisotropy_parameters

        out.update(anisotropy_parameters(out["anisotropy_z"], prange, du))
    if "censored_z" in out:
        out["censored_value"] = spec.values_of(out["censored_z"]).assign_attrs(
            units=vu, long_name="non-detect imputed below its reporting limit (modelled units), per draw")
    if "beta_z" in out:  # absent while the chains run when the trend is integrated out (bayesgeo.gp.trend_posterior)
        beta = out["beta_z"] * s
        intercept = xr.where(beta["term"] == "1", spec.value_mean, 0.0)
        out["beta"] = (beta + intercept).assign_attrs(
            units=vu, long_name="trend coefficients per unit of the centred and scaled design columns")
    for name in ("practical_range", "scale", "partial_sill", "nugget", "total_sill", "nugget_ratio",
                 "microergodic", "beta"):
        if name in out:
            out[name].attrs["scale"] = "data units" + (" (log of the values)" if spec.transform == "log" else "")
    return out


def cautions(spec: FitSpec, posterior: xr.Dataset | None = None, diagnostics: Mapping | None = None,
             approximation: Mapping | None = None) -> list[str]:
    """The cautions that go with a fit's numbers (model assumptions, regulation, convergence, range,
    and for nearest-neighbour fits the approximation check of :mod:`bayesgeo.gp.nn_accuracy`)."""
    out = [
        f"These are statistical summaries under stated assumptions (a stationary, "
        f"{'geometrically anisotropic' if spec.anisotropy else 'isotropic'} Gaussian process "
        f"with a {spec.covariance} covariance{', on the log scale' if spec.transform == 'log' else ''}). "
        "They support, but never replace, the judgement of a licensed professional.",
        "Decisions about contamination or exposure must follow the sampling, analysis and decision rules of "
        "the local regulator; check sampling design, laboratory quality and detection limits first.",
    ]
    if spec.transform == "log":
        out.append("Sills, nugget and trend are on the log scale of the values; back-transforming means "
                   "needs a bias correction (the median is exp(mean of the log), not the mean).")
    if posterior is not None and "practical_range" in posterior:
        med = float(posterior["practical_range"].median())
        if med > 0.5 * spec.distance_scale:
            out.append(f"The posterior median practical range ({med:.4g} {spec.distance_units}) exceeds half the "
                       f"largest distance between samples ({spec.distance_scale:.4g}); the data say little about "
                       "the range beyond that, so its upper interval reflects the prior (common practice).")
    if spec.censored:
        share = spec.censored / spec.n
        out.append(f"{spec.censored} of {spec.n} values are non-detects, modelled as left-censored at their reporting "
                   "limits (each one a latent value below its limit, sampled with the parameters), not replaced by a "
                   "number.")
        if share > 0.5:
            out.append(f"{100 * share:.0f}% of the values are non-detects: the range, sills and trend rest on few "
                       "detected values and on the model's assumptions below the limits; read them with extra care.")
    if approximation is not None:
        out.append(approximation["message"])
    if diagnostics is not None and diagnostics.get("verdict") == "fail":
        out.insert(0, "NOT CONVERGED: the sampler failed its convergence checks; do not use these numbers.")
    return out


def fit(ds: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None, nugget: bool = True,
        trend: int = 0, covariates: Sequence[str] = (), transform: str | None = None, priors=None,
        sampler: str = "nutpie", chains: int = CHAINS, draws: int = DRAWS, tune: int = TUNE,
        target_accept: float | None = None, seed: int | None = None, progressbar: bool = False,
        adaptation: str = "low_rank", approx: str = "auto", neighbours: int | None = None,
        max_draws: int | None = None, anisotropy: bool = False) -> xr.DataTree:
    """Fit the single-site Bayesian GP model and return the self-describing result.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data of one site (:func:`bayesgeo.read_points`).
    covariance, nu, nugget, trend, covariates, transform, priors, approx, neighbours, anisotropy
        Model settings, see :func:`bayesgeo.fitting.model.build_model`.
    sampler, chains, draws, tune, seed, progressbar, adaptation
        Sampler settings, see :func:`bayesgeo.fitting.sampling.sample`.
    target_accept : float, optional
        Target acceptance rate. ``None`` (default): 0.8, and when the kept draws hold divergent
        transitions the fit is sampled once more at 0.9 (:func:`bayesgeo.fitting.looks.rerun_if_divergent`;
        recorded in ``settings["sampler"]["rerun"]``). A number: exactly that, no rerun.
    max_draws : int, optional
        While the convergence check finds R-hat or ESS too poor, the same chains continue, up to
        this many draws per chain (default ``4 * draws``; ``draws`` turns it off); see
        :mod:`bayesgeo.fitting.looks`. The looks are recorded in ``settings["sampler"]["looks"]``.

    Returns
    -------
    xarray.DataTree
        See the module docstring for its groups and attributes.
    """
    model_kw = dict(covariance=covariance, nu=nu, nugget=nugget, trend=trend, covariates=tuple(covariates),
                    transform=transform, priors=priors, approx=approx, neighbours=neighbours, anisotropy=anisotropy)
    model, spec, y_z, design, dist = build_model_and_inputs(ds, **model_kw)
    look = convergence_look(lambda raw: xr.DataTree.from_dict({
        "/posterior": derive(raw["posterior"].to_dataset(), spec), "/sample_stats": raw["sample_stats"].to_dataset()}))
    seed = new_seed() if seed is None else seed  # one seed for the sampler (and a rerun) and the trend draws
    raw = sample_fit(model, target_accept=target_accept, default_accept=DEFAULT_ACCEPT, rerun_accept=RERUN_ACCEPT,
                     seed=seed, draws=draws, max_draws=max_draws, look=look, sampler=sampler, chains=chains,
                     tune=tune, progressbar=progressbar, adaptation=adaptation)
    post = raw["posterior"].to_dataset()
    if "beta_z" not in post:  # integrated out of the dense likelihood: exact conditional draws
        xy_z = np.column_stack([ds["x"].values, ds["y"].values]).astype(float) / spec.distance_scale
        beta = draw_trend(post, spec, values_per_draw(y_z, censored_index(ds), post), design.values, dist, seed=seed,
                          xy=xy_z)
        post["beta_z"] = beta.assign_attrs(drawn="after sampling, one draw per posterior draw from the exact "
                                                 "conditional N(m, V) given the covariance parameters")
    post = derive(post, spec)
    obs_coords = {"row": ("obs", ds["row"].values)} if "row" in ds.coords else {}
    observed = xr.Dataset({"value": ("obs", ds["value"].values, {"units": spec.value_units,
                                                                  "long_name": f"measured {spec.value_column}"})},
                          coords=obs_coords)
    if transform == "log":
        observed["model_value"] = ("obs", np.log(ds["value"].values), {"units": spec.model_units,
                                                                          "long_name": "log of the measured value"})
    if "censored" in ds:
        observed["censored"] = ds["censored"].copy()
    constant = xr.Dataset(
        {"x": ("obs", ds["x"].values, {"units": spec.distance_units}),
         "y": ("obs", ds["y"].values, {"units": spec.distance_units}),
         "design": (("obs", "term"), design.values, {"long_name": "trend design matrix (centred and scaled)"})},
        coords={**obs_coords, "term": list(spec.terms)},
    )
    sampler_settings = {k: raw.attrs[k] for k in ("sampler", "seed", "chains", "draws", "tune", "target_accept",
                                                  "adaptation", "seconds", "sampling_seconds", "max_draws", "looks",
                                                  "rerun")
                        if k in raw.attrs}
    settings = {
        "format": "bayesgeo single-site fit", "format_version": _FORMAT_VERSION,
        "model": spec.to_dict(), "sampler": sampler_settings, "versions": _versions(),
        "data": {**{k: plain_attr(ds.attrs.get(k, "")) for k in FIT_DATA_ATTRS}, "site": sites_of(ds)[0]},
    }
    groups = {"/posterior": post, "/sample_stats": raw["sample_stats"].to_dataset(),
              "/observed_data": observed, "/constant_data": constant}
    tree = xr.DataTree.from_dict(groups)
    approximation = engine(spec.approx).approximation_check(
        post, np.column_stack([ds["x"].values, ds["y"].values]), covariance=spec.covariance,
        neighbours=spec.neighbours, metric=spec.metric)
    tree.attrs = {"title": "bayesgeo single-site Gaussian-process fit", "settings": json.dumps(settings),
                  "cautions": json.dumps(cautions(spec, post, approximation=approximation))}
    if approximation is not None:
        tree.attrs["approximation"] = json.dumps(to_jsonable(approximation))
    return tree


def values_per_draw(y: np.ndarray, cens: np.ndarray, post: xr.Dataset) -> np.ndarray:
    """The standardised values of every posterior draw, (chain * draw, n) chain-major, the non-detects at
    their imputed ``censored_z``; ``y`` itself when there are none."""
    if not cens.size:
        return y
    latent = np.asarray(post["censored_z"].transpose("chain", "draw", "censored").values, dtype=float)
    return with_imputed(y, cens, latent.reshape(-1, cens.size))


def stored(tree: xr.DataTree, name: str, default=None):
    """The decoded JSON attribute ``name`` of a fit (``diagnostics``, ``cautions``, ``approximation``), or
    ``default`` when absent: the one decoder of these attributes (:func:`fit_settings` decodes ``settings``)."""
    raw = tree.attrs.get(name)
    return json.loads(raw) if raw else default


def approximation_of(tree: xr.DataTree) -> dict | None:
    """The stored nearest-neighbour approximation check of a fit (None for dense fits)."""
    return stored(tree, "approximation")



def with_diagnostics(tree: xr.DataTree, diagnostics: Mapping) -> xr.DataTree:
    """A copy of ``tree`` carrying the diagnostics JSON (and cautions updated for its verdict)."""
    out = tree.copy()
    spec = fit_spec(tree)
    out.attrs["diagnostics"] = json.dumps(to_jsonable(dict(diagnostics)))
    out.attrs["cautions"] = json.dumps(cautions(spec, tree["posterior"].to_dataset(), diagnostics,
                                                approximation_of(tree)))
    return out




def _scalar_names(post: xr.Dataset) -> list[str]:
    return [p for p in PARAMETERS if p in post]


def summary_table(tree: xr.DataTree, *, var_names: Sequence[str] | None = None, prob: float = 0.9) -> list[dict]:
    """Per parameter: mean, sd, q05, q50, q95 and the 90% highest-density interval, with units.

    Mean, sd and HDI come from ``arviz.summary``; quantiles are equal-tailed over all draws.
    Vector variables (``beta``) give one row per term (``beta[x]``). Returns a list of dicts.
    """
    import arviz as az

    post = tree["posterior"].to_dataset()
    names = list(var_names) if var_names is not None else [*_scalar_names(post), "beta"]
    lo_q, hi_q = (1 - prob) / 2, 1 - (1 - prob) / 2
    tag = f"{round(100 * prob):d}"
    stats = az.summary(post[names], kind="stats", ci_prob=prob, ci_kind="hdi", round_to="none")
    rows = []
    for name in names:
        da = post[name]
        extra = [d for d in da.dims if d not in ("chain", "draw")]
        keys = [None] if not extra else list(da[extra[0]].values)
        for key in keys:
            x = da if key is None else da.sel({extra[0]: key})
            label = name if key is None else f"{name}[{key}]"
            q = np.quantile(x.values.ravel(), [lo_q, 0.5, hi_q])
            r = stats.loc[label]
            rows.append({"parameter": label, "mean": float(r["mean"]), "sd": float(r["sd"]),
                         "q05": float(q[0]), "q50": float(q[1]), "q95": float(q[2]),
                         f"hdi{tag}_low": float(r[f"hdi{tag}_lb"]), f"hdi{tag}_high": float(r[f"hdi{tag}_ub"]),
                         "units": str(da.attrs.get("units", ""))})
    return rows


def fit_report(fit) -> dict:
    """The fit (:class:`bayesgeo.fitting.fitted.Fit` or its tree) as one JSON-able dict: parameters (data units),
    sampler, diagnostics, cautions, settings."""
    tree = getattr(fit, "tree", fit)  # a Fit or its tree
    settings, spec = fit_settings(tree), fit_spec(tree)
    rows = summary_table(tree)
    params = {r["parameter"]: {k: v for k, v in r.items() if k != "parameter"} for r in rows}
    if not spec.nugget:
        zero = {k: 0.0 for k in ("mean", "sd", "q05", "q50", "q95", "hdi90_low", "hdi90_high")}
        params["nugget"] = {**zero, "units": f"({spec.model_units})^2", "fixed": True}
        params["nugget_ratio"] = {**zero, "units": "1", "fixed": True}
    smp = settings["sampler"]
    diag = stored(tree, "diagnostics")
    return to_jsonable({
        "parameters": params,
        "sampler": {"name": smp["sampler"], "chains": smp["chains"], "draws": smp["draws"], "tune": smp["tune"],
                    "seed": smp["seed"], "seconds": smp["seconds"], "sampling_seconds": smp["sampling_seconds"],
                    "target_accept": smp["target_accept"],
                    "adaptation": smp["adaptation"],
                    **({k: smp[k] for k in ("attempts", "stopped", "budget_minutes")} if "attempts" in smp else {}),
                    **report_fields(smp)},
        "diagnostics": diag,
        "converged": None if diag is None else diag.get("verdict") != "fail",
        "approximation": approximation_of(tree),
        "model": {"covariance": spec.covariance, "nu": spec.nu, "nugget": spec.nugget, "trend": spec.trend,
                  "covariates": list(spec.covariates), "categories": design_categories(spec.design_attrs),
                  "transform": spec.transform, "n": spec.n, "anisotropy": spec.anisotropy,
                  "value_units": spec.model_units, "distance_units": spec.distance_units,
                  "priors": spec.priors.to_dict()},
        "cautions": stored(tree, "cautions", []),
    })


def summary_text(report: dict) -> str:
    """Human-readable summary of a :func:`fit_report` (table, verdict, cautions)."""
    lines = []
    diag = report.get("diagnostics")
    if diag is not None and diag.get("verdict") == "fail":
        lines += ["*** NOT CONVERGED: do not use these numbers ***", ""]
    m = report["model"]
    lines.append(f"bayesgeo fit: {m['covariance']} covariance, nugget {'yes' if m['nugget'] else 'no'}, "
                 f"trend order {m['trend']}, transform {m['transform'] or 'none'}, n = {m['n']}")
    for name, c in (m.get("categories") or {}).items():
        lines.append(f"category {name}: baseline {c['baseline']!r} (levels {', '.join(c['levels'])}); each "
                     f"coefficient {name}=<level> is that level's mean minus the baseline's")
    s = report["sampler"]
    lines.append(f"sampler {s['name']}: {s['chains']} chains x {s['draws']} draws (tune {s['tune']}), "
                 f"seed {s['seed']}, {s['seconds']:.1f} s in all ({s['sampling_seconds']:.1f} s sampling the kept draws; the "
                 f"rest compiling{', the first run' if s.get('rerun') else ''})")
    if looks_line(s):
        lines.append(looks_line(s))
    if s.get("attempts"):
        verdicts = ", ".join(f"{a['verdict']} ({a['tune']} + {a['draws']})" for a in s["attempts"])
        lines.append(f"--keep-sampling {s['budget_minutes']:g} min: {len(s['attempts'])} attempt(s): {verdicts}; "
                     f"stopped: {s['stopped']}")
    lines.append("")
    cols = ["mean", "sd", "q05", "q50", "q95", "hdi90_low", "hdi90_high"]
    width = max(len(k) for k in report["parameters"]) + 2
    lines.append("parameter".ljust(width) + "".join(c.rjust(12) for c in cols) + "  units")
    for name, p in report["parameters"].items():
        lines.append(name.ljust(width) + "".join(f"{p[c]:12.4g}" for c in cols) + f"  {p['units']}")
    lines.append("")
    lines.append(f"diagnostics: {diag.get('verdict', '?').upper() if diag else 'not checked'}")
    appr = report.get("approximation")
    if appr is not None:
        lines.append(f"nearest-neighbour approximation: {appr['status'].upper()} (interval width ratio up to "
                     f"{max(appr[p]['width_ratio'] for p in appr['parameters']):.2f}, limit {appr['limit']:.2f})")
    lines.append("")
    lines += [f"- {c}" for c in report["cautions"]]
    return "\n".join(lines) + "\n"


def prior_check_figure(tree: xr.DataTree, *, draws: int = 4000, seed: int = 0):
    """Prior predictive check of a fit: the semivariogram band implied by its priors against the
    empirical semivariogram (Matheron estimator, :func:`bayesgeo.explore.variogram.semivariogram`) of the
    modelled values after removing the least-squares trend. Returns the matplotlib Figure."""
    import warnings

    from bayesgeo.data.points import points_dataset
    from bayesgeo.explore.variogram import semivariogram
    from bayesgeo.fitting.priors import plot_prior_semivariogram, prior_semivariogram

    spec = fit_spec(tree)
    obs = tree["observed_data"]
    z = obs["model_value"].values if "model_value" in obs else obs["value"].values
    cdata = tree["constant_data"]
    x = cdata["design"].values
    coef, *_ = np.linalg.lstsq(x, z, rcond=None)
    pts = points_dataset(cdata["x"].values, cdata["y"].values, z,
                         attrs={"coords": "lonlat" if spec.metric == "greatcircle" else "xy"})
    pts["residual"] = ("obs", z - x @ coef)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # few-pairs bins are fine for a visual check
        emp = semivariogram(pts)
    lags = np.linspace(0.0, float(emp["bin_upper"].values[-1]), 60)
    band = prior_semivariogram(spec.priors, lags, covariance=spec.covariance,
                               nu=spec.nu if spec.covariance == "matern" else None,
                               nugget=spec.nugget, draws=draws, seed=seed)
    return plot_prior_semivariogram(band, emp, distance_units=spec.distance_units, value_units=spec.model_units)
