"""Several sites in one model: hierarchical, independent or complete pooling of the covariance.

Each site ``s`` has its own Gaussian-process model (:mod:`bayesgeo.model`)

    z_s = F_s beta_s + w_s + e_s,   w_s ~ GP(0, sigma2_s rho(d / phi_s)),   e_s ~ N(0, tau2_s I),

and sites are independent given the parameters, so the log-likelihood is a sum of one dense
marginal Gaussian term per site (:func:`bayesgeo.likelihood.marginal_loglik` once per site; no
matrix spans two sites).

Common standardisation (the same for every site, so that a population of sites is meaningful):

* values ``y = (z - m) / s`` with ``m`` the mean of all (transformed) values and ``s`` the pooled
  within-site residual sd after each site's own least-squares trend,
  ``s^2 = sum_s RSS_s / sum_s (n_s - p)``, so that between-site differences of level do not
  inflate the scale;
* distances divided by ``D``, the median over sites of the largest distance between two points of
  one site.

With one site this is exactly the standardisation of the single-site model.

Per-site parameters on that scale: ``r_s`` (practical range / D), ``sigma2_s`` (partial sill /
s^2), nugget fraction ``f_s = tau2_s / (sigma2_s + tau2_s)`` on the logit scale (so
``tau2_s = sigma2_s exp(logit f_s)``) and trend coefficients ``beta_s``.

``pooling="hierarchical"`` (non-centred; eta ~ N(0, 1) independently)::

    log r_s       = log R + s_r eta_r,s        R ~ InverseGamma(1, lambda1)  (PC prior, Fuglstad et al. 2019)
    log sigma2_s  = 2 log S + s_v eta_v,s      S ~ Exponential(lambda2)      (PC prior of an sd)
    logit f_s     = mu_f + s_f eta_f,s         mu_f ~ Normal(logit 0.25, 1.5)
    beta_s,k      = mu_b,k + s_b,k eta_b,s,k   mu_b,k ~ Normal(0, beta_sd)
    s_r, s_v, s_f ~ HalfNormal(0.5),  s_b,k ~ HalfNormal(1)

``R`` and ``S^2`` are the population medians of the practical range and of the partial sill;
lambda1 and lambda2 are the single-site PC-prior rates (:mod:`bayesgeo.priors`) computed with the
common ``D`` and ``s``, so with one site the model differs from the single-site one only by the
between-site spreads (and the nugget parametrisation).

``pooling="independent"``: each site gets the population-location priors itself
(``r_s ~ InverseGamma(1, lambda1)``, ``sqrt(sigma2_s) ~ Exponential(lambda2)``,
``logit f_s ~ Normal(logit 0.25, 1.5)``, ``beta_s,k ~ Normal(0, beta_sd)``): no sharing.

``pooling="complete"``: one practical range, partial sill and nugget fraction for every site with
the same priors; trend coefficients stay per site (independent ``Normal(0, beta_sd)``) because
sites usually differ in level and a shared covariance does not imply a shared mean.

The full statement and the reasons are in ``docs/hierarchical.md``.
"""

from __future__ import annotations

import json
import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field

import numpy as np
import xarray as xr

from bayesgeo.covariance import get_covariance
from bayesgeo.data import MIN_POINTS, sites_of
from bayesgeo.geometry import distance_matrix, metric_of
from bayesgeo.model import FitSpec, transform_values
from bayesgeo.priors import Priors, pc_range_rate, pc_sd_rate, resolve_priors
from bayesgeo.trend import design_matrix
from bayesgeo.validate import InputError, check_choice, format_rows
from bayesgeo.io import plain_attr, to_jsonable

__all__ = [
    "POOLINGS",
    "MIN_POINTS_POLICIES",
    "HYPERPRIORS",
    "SiteSpec",
    "site_inputs",
    "build_site_model",
    "fit_sites",
    "site_fit",
    "site_spec",
    "site_cautions",
]

#: Pooling of the covariance parameters across sites.
POOLINGS = ("hierarchical", "independent", "complete")
#: What to do with a site of fewer than :data:`bayesgeo.data.MIN_POINTS` points.
MIN_POINTS_POLICIES = ("error", "pool")
#: Fewest points a site may have even when pooled.
ABSOLUTE_MIN_POINTS = 3

#: Hyperprior constants (standardised scale); see docs/hierarchical.md for the reasons.
HYPERPRIORS: dict[str, float] = {
    "range_site_sd_scale": 0.5,      # HalfNormal scale of the between-site sd of log practical range
    "sill_site_sd_scale": 0.5,       # ... of log partial sill
    "nugget_logit_loc": math.log(0.25 / 0.75),  # Normal location of the population logit nugget fraction
    "nugget_logit_sd": 1.5,          # Normal sd of it
    "nugget_site_sd_scale": 0.5,     # HalfNormal scale of the between-site sd of logit nugget fraction
    "beta_site_sd_scale": 1.0,       # HalfNormal scale of the between-site sd of each trend coefficient
}


@dataclass(frozen=True)
class SiteSpec:
    """Every setting of a several-site fit and the constants of its common standardisation.

    Attributes
    ----------
    pooling : str
        One of :data:`POOLINGS`.
    sites : tuple of str
        Site labels, in order of first appearance in the data (the ``site`` dimension).
    n : tuple of int
        Points per site.
    small_sites : tuple of str
        Sites with fewer than :data:`bayesgeo.data.MIN_POINTS` points kept under ``min_points="pool"``.
    covariance, nu, nugget, trend, covariates, transform, terms :
        As in :class:`bayesgeo.model.FitSpec` (shared by all sites).
    design_attrs : dict
        Site label -> attributes of that site's design matrix (each site's coordinates are
        centred and scaled on their own, :func:`bayesgeo.trend.design_matrix`).
    value_mean, value_sd : float
        ``m`` and ``s`` of the common standardisation (units of the modelled values).
    distance_scale : float
        ``D``, the median over sites of the largest within-site distance (distance units).
    site_extents : tuple of float
        Largest within-site distance per site.
    range_factor : float
        Practical range / scale parameter of the covariance family.
    metric, distance_units, value_units, value_column : str
        From the data.
    priors : Priors
        Resolved population-location priors (data units), as in :mod:`bayesgeo.priors`.
    hyperpriors : dict
        :data:`HYPERPRIORS` as used.
    warnings : tuple of str
        Warnings issued while building the model (small sites).
    """

    pooling: str
    sites: tuple[str, ...]
    n: tuple[int, ...]
    small_sites: tuple[str, ...]
    covariance: str
    nu: float | None
    nugget: bool
    trend: int
    covariates: tuple[str, ...]
    transform: str | None
    terms: tuple[str, ...]
    design_attrs: dict = field(hash=False)
    value_mean: float = 0.0
    value_sd: float = 1.0
    distance_scale: float = 1.0
    site_extents: tuple[float, ...] = ()
    range_factor: float = 1.0
    metric: str = "euclidean"
    distance_units: str = ""
    value_units: str = ""
    value_column: str = "value"
    priors: Priors = field(default_factory=Priors)
    hyperpriors: dict = field(default_factory=lambda: dict(HYPERPRIORS), hash=False)
    warnings: tuple[str, ...] = ()

    @property
    def model_units(self) -> str:
        """Units of the modelled values: the value units, or ``log(units)`` under the log transform."""
        u = self.value_units or "value units"
        return f"log({u})" if self.transform == "log" else u

    @property
    def rates(self) -> dict[str, float]:
        """PC-prior rates on the standardised scale (population location, or per site when independent)."""
        p = self.priors
        return {"range": pc_range_rate(p.range[0] / self.distance_scale, p.range[1]),
                "sd": pc_sd_rate(p.sd[0] / self.value_sd, p.sd[1])}

    def to_dict(self) -> dict:
        """JSON-able dictionary; :meth:`from_dict` inverts it."""
        d = asdict(self)
        for key in ("sites", "n", "small_sites", "covariates", "terms", "site_extents", "warnings"):
            d[key] = list(d[key])
        d["priors"] = self.priors.to_dict()
        d["design_attrs"] = to_jsonable(self.design_attrs)
        return d

    @classmethod
    def from_dict(cls, d: Mapping) -> SiteSpec:
        """Rebuild a spec from :meth:`to_dict` output."""
        d = dict(d)
        for key in ("sites", "small_sites", "covariates", "terms", "warnings"):
            d[key] = tuple(str(v) for v in d.get(key) or ())
        d["n"] = tuple(int(v) for v in d["n"])
        d["site_extents"] = tuple(float(v) for v in d["site_extents"])
        d["priors"] = Priors.from_dict(d["priors"])
        d["nu"] = None if d.get("nu") is None else float(d["nu"])
        return cls(**d)

    def to_json(self) -> str:
        """:meth:`to_dict` as a JSON string."""
        return json.dumps(self.to_dict())

    def fit_spec(self, site: str) -> FitSpec:
        """The single-site :class:`bayesgeo.model.FitSpec` of one site (common standardisation)."""
        i = self.site_index(site)
        return FitSpec(
            covariance=self.covariance, nu=self.nu, nugget=self.nugget, trend=self.trend,
            covariates=self.covariates, transform=self.transform, terms=self.terms,
            design_attrs=self.design_attrs[site], value_mean=self.value_mean, value_sd=self.value_sd,
            distance_scale=self.distance_scale, range_factor=self.range_factor, metric=self.metric,
            distance_units=self.distance_units, value_units=self.value_units, value_column=self.value_column,
            n=self.n[i], priors=self.priors,
        )

    def site_index(self, site: str) -> int:
        """Position of ``site`` along the ``site`` dimension; InputError naming the known sites."""
        if site not in self.sites:
            raise InputError(f"site {site!r} is not in this fit; sites: {', '.join(self.sites)}")
        return self.sites.index(site)




@dataclass(frozen=True)
class SiteData:
    """Model inputs of one site on the common standardised scale."""

    label: str
    y: np.ndarray
    design: np.ndarray
    dist: np.ndarray
    rows: np.ndarray
    xy: np.ndarray


def _source(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("source") or "data")


def _split_sites(ds: xr.Dataset) -> list[tuple[str, xr.Dataset]]:
    labels = sites_of(ds)
    if labels == [""]:
        return [("all", ds)]
    site = ds["site"].values
    return [(lab, ds.isel(obs=np.flatnonzero(site == lab))) for lab in labels]


def site_inputs(ds: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None, nugget: bool = True,
                trend: int = 0, covariates: Sequence[str] = (), transform: str | None = None,
                pooling: str = "hierarchical", priors: Priors | Mapping | None = None,
                min_points: str = "error") -> tuple[SiteSpec, list[SiteData]]:
    """Check the data and settings and compute the common standardisation and per-site inputs.

    Returns
    -------
    spec : SiteSpec
    sites : list of SiteData
        One per site, in the order of ``spec.sites``.

    Raises
    ------
    InputError
        Unknown pooling or policy, a site with fewer than ``MIN_POINTS`` points (unless
        ``min_points="pool"``), unknown covariance, bad trend, non-positive values under log.
    """
    check_choice(pooling, POOLINGS, "--pooling")
    check_choice(min_points, MIN_POINTS_POLICIES, "--min-points")
    for key in ("x", "y", "value"):
        if key not in ds.variables:
            raise InputError(f"{_source(ds)}: not point data (variable {key!r} missing)")
    try:
        cov = get_covariance(covariance, nu)
    except (ValueError, TypeError) as err:
        raise InputError(f"--covariance/--nu: {err}") from None
    if not isinstance(nugget, (bool, np.bool_)):
        raise InputError(f"nugget: expected True or False, got {nugget!r}")
    z_all = transform_values(ds, transform)
    ds = ds.assign(_z=("obs", z_all))
    parts = _split_sites(ds)
    metric = metric_of(ds)
    small, notes = [], []
    raw = []
    for label, part in parts:
        n = part.sizes["obs"]
        rows = np.asarray(part["row"].values)
        if n < MIN_POINTS:
            if min_points == "error" or n < ABSOLUTE_MIN_POINTS:
                hint = ("; pass --min-points pool (min_points='pool') to keep it in the hierarchical model"
                        if min_points == "error" and n >= ABSOLUTE_MIN_POINTS else "")
                need = MIN_POINTS if min_points == "error" else ABSOLUTE_MIN_POINTS
                raise InputError(f"{_source(ds)}: site {label!r} has only {n} points (rows {format_rows(rows)}); "
                                 f"a site needs at least {need}{hint}")
            small.append(label)
            borrow = ("it borrows strength from the other sites through the population distribution"
                      if pooling != "independent" else "under independent pooling its parameters rest mostly on the prior")
            notes.append(f"site {label!r} has only {n} points (fewer than {MIN_POINTS}), kept with "
                         f"--min-points pool: {borrow}; treat its estimates with extra caution")
        design = design_matrix(part, trend, tuple(covariates))
        p = design.shape[1]
        if n < p + 1 or np.linalg.matrix_rank(design.values) < p:
            raise InputError(f"--trend: site {label!r} ({n} points, rows {format_rows(rows)}) cannot pin down the "
                             f"{p} trend terms ({', '.join(design.attrs['terms'])}); use a lower order")
        xy = np.column_stack([part["x"].values, part["y"].values]).astype(float)
        d = distance_matrix(xy, metric)
        extent = float(d.max())
        if not extent > 0:
            raise InputError(f"{_source(ds)}: all points of site {label!r} share one location (rows {format_rows(rows)})")
        z = np.asarray(part["_z"].values, dtype=float)
        coef, *_ = np.linalg.lstsq(design.values, z, rcond=None)
        rss = float(np.sum((z - design.values @ coef) ** 2))
        raw.append((label, part, design, d, extent, z, rss, rows, xy))
    for msg in notes:
        warnings.warn(msg, UserWarning, stacklevel=3)
    p = raw[0][2].shape[1]
    dof = sum(len(r[5]) - p for r in raw)
    vsd = math.sqrt(sum(r[6] for r in raw) / dof) if dof > 0 else 0.0
    if not vsd > 0:
        vsd = float(np.std(z_all, ddof=1))
    if not vsd > 0:
        raise InputError(f"{_source(ds)}: the values do not vary; nothing to model")
    vmean = float(np.mean(z_all))
    extents = [r[4] for r in raw]
    dscale = float(np.median(extents))
    resolved = resolve_priors(priors, extent=dscale, value_sd=vsd)
    design0 = raw[0][2]
    spec = SiteSpec(
        pooling=pooling, sites=tuple(r[0] for r in raw), n=tuple(len(r[5]) for r in raw), small_sites=tuple(small),
        covariance=cov.name, nu=cov.nu, nugget=bool(nugget), trend=int(design0.attrs["order"]),
        covariates=tuple(design0.attrs["covariates"]), transform=transform, terms=tuple(design0.attrs["terms"]),
        design_attrs={r[0]: to_jsonable(dict(r[2].attrs)) for r in raw}, value_mean=vmean, value_sd=vsd,
        distance_scale=dscale, site_extents=tuple(extents), range_factor=float(cov.range_factor), metric=metric,
        distance_units=str(ds.attrs.get("distance_units", "")),
        value_units=str(ds.attrs.get("value_units", "") or ds["value"].attrs.get("units", "")),
        value_column=str(ds.attrs.get("value_column", "value")), priors=resolved,
        hyperpriors=dict(HYPERPRIORS), warnings=tuple(notes),
    )
    data = [SiteData(label=r[0], y=(r[5] - vmean) / vsd, design=np.asarray(r[2].values, dtype=float),
                     dist=r[3] / dscale, rows=r[7], xy=r[8]) for r in raw]
    return spec, data


def build_site_model(ds: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None,
                     nugget: bool = True, trend: int = 0, covariates: Sequence[str] = (),
                     transform: str | None = None, pooling: str = "hierarchical",
                     priors: Priors | Mapping | None = None, min_points: str = "error"):
    """Build one PyMC model for the points of several sites.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data along ``obs`` with a ``site`` coordinate (:func:`bayesgeo.read_points` with
        ``site=COL``); without one the data are a single site labelled ``"all"``.
    covariance, nu, nugget, trend, covariates, transform :
        As in :func:`bayesgeo.model.build_model`; shared by all sites.
    pooling : {"hierarchical", "independent", "complete"}
        How the covariance parameters are shared (module docstring).
    priors : Priors or dict, optional
        Overrides of the population-location priors (data units): ``range`` (r0, a1) and ``sd``
        (s0, a2) as in :mod:`bayesgeo.priors`, ``beta_sd``. The ``nugget`` pair is not used: the
        nugget enters as a fraction of the sill (:data:`HYPERPRIORS`).
    min_points : {"error", "pool"}
        A site with fewer than :data:`bayesgeo.data.MIN_POINTS` points raises an InputError naming
        the site and its rows, or (``"pool"``) is kept with a warning.

    Returns
    -------
    model : pymc.Model
        Dims ``site`` and ``term``. Per-site deterministic (or free, when independent) variables
        ``practical_range_z``, ``sd_z``, ``nugget_sd_z`` (with a nugget) along ``site`` and
        ``beta_z`` along ``(site, term)`` on the standardised scale: the single-site layout of
        :mod:`bayesgeo.model` with an extra ``site`` dim. One potential ``loglik_<i>`` per site.
    spec : SiteSpec

    References
    ----------
    Gelman, Carlin, Stern, Dunson, Vehtari and Rubin (2013), *Bayesian Data Analysis*, 3rd ed.,
    ch. 5 (hierarchical models); Betancourt and Girolami (2015), "Hamiltonian Monte Carlo for
    hierarchical models" (non-centred parametrisation); Fuglstad, Simpson, Lindgren and Rue
    (2019), JASA 114 (PC priors).
    """
    import pymc as pm
    import pytensor.tensor as pt

    from bayesgeo.likelihood import marginal_loglik

    spec, data = site_inputs(ds, covariance=covariance, nu=nu, nugget=nugget, trend=trend, covariates=covariates,
                             transform=transform, pooling=pooling, priors=priors, min_points=min_points)
    cov = get_covariance(spec.covariance, None if spec.covariance != "matern" else spec.nu)
    rates, hp, beta_sd = spec.rates, spec.hyperpriors, spec.priors.beta_sd
    n_sites = len(spec.sites)
    coords = {"site": list(spec.sites), "term": list(spec.terms)}
    with pm.Model(coords=coords) as model:
        if spec.pooling == "hierarchical":
            pop_range = pm.InverseGamma("population_range_z", alpha=1.0, beta=rates["range"])
            range_sd = pm.HalfNormal("range_site_sd", sigma=hp["range_site_sd_scale"])
            eta_r = pm.Normal("range_eta", 0.0, 1.0, dims="site")
            prange = pm.Deterministic("practical_range_z", pop_range * pt.exp(range_sd * eta_r), dims="site")
            pop_sd = pm.Exponential("population_sd_z", lam=rates["sd"])
            sill_sd = pm.HalfNormal("sill_site_sd", sigma=hp["sill_site_sd_scale"])
            eta_v = pm.Normal("sill_eta", 0.0, 1.0, dims="site")
            sd = pm.Deterministic("sd_z", pop_sd * pt.exp(0.5 * sill_sd * eta_v), dims="site")
            if spec.nugget:
                mu_f = pm.Normal("nugget_logit_mu", hp["nugget_logit_loc"], hp["nugget_logit_sd"])
                f_sd = pm.HalfNormal("nugget_site_sd", sigma=hp["nugget_site_sd_scale"])
                eta_f = pm.Normal("nugget_eta", 0.0, 1.0, dims="site")
                logit_f = mu_f + f_sd * eta_f
            beta_mu = pm.Normal("beta_mu_z", 0.0, beta_sd, dims="term")
            beta_site_sd = pm.HalfNormal("beta_site_sd_z", sigma=hp["beta_site_sd_scale"], dims="term")
            beta_eta = pm.Normal("beta_eta", 0.0, 1.0, dims=("site", "term"))
            beta = pm.Deterministic("beta_z", beta_mu[None, :] + beta_site_sd[None, :] * beta_eta,
                                    dims=("site", "term"))
        elif spec.pooling == "independent":
            prange = pm.InverseGamma("practical_range_z", alpha=1.0, beta=rates["range"], dims="site")
            sd = pm.Exponential("sd_z", lam=rates["sd"], dims="site")
            if spec.nugget:
                logit_f = pm.Normal("nugget_logit", hp["nugget_logit_loc"], hp["nugget_logit_sd"], dims="site")
            beta = pm.Normal("beta_z", 0.0, beta_sd, dims=("site", "term"))
        else:  # complete
            shared_range = pm.InverseGamma("shared_range_z", alpha=1.0, beta=rates["range"])
            shared_sd = pm.Exponential("shared_sd_z", lam=rates["sd"])
            prange = pm.Deterministic("practical_range_z", pt.ones(n_sites) * shared_range, dims="site")
            sd = pm.Deterministic("sd_z", pt.ones(n_sites) * shared_sd, dims="site")
            if spec.nugget:
                logit_f = pt.ones(n_sites) * pm.Normal("shared_nugget_logit", hp["nugget_logit_loc"],
                                                       hp["nugget_logit_sd"])
            beta = pm.Normal("beta_z", 0.0, beta_sd, dims=("site", "term"))
        if spec.nugget:
            # tau = sigma sqrt(f / (1 - f)) = sigma exp(logit(f) / 2)
            tau = pm.Deterministic("nugget_sd_z", sd * pt.exp(0.5 * logit_f), dims="site")
        for i, sd_i in enumerate(data):
            resid = sd_i.y - pt.dot(sd_i.design, beta[i])
            tau2 = tau[i] ** 2 if spec.nugget else 0.0
            pm.Potential(f"loglik_{i}", marginal_loglik(resid, sd_i.dist, cov, prange[i] / spec.range_factor,
                                                        sd[i] ** 2, tau2))
    return model, spec


def fit_sites(ds: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None, nugget: bool = True,
              trend: int = 0, covariates: Sequence[str] = (), transform: str | None = None,
              pooling: str = "hierarchical", priors: Priors | Mapping | None = None, min_points: str = "error",
              sampler: str = "nutpie", chains: int = 4, draws: int = 1000, tune: int = 1000,
              target_accept: float = 0.9, seed: int | None = None, progressbar: bool = False,
              adaptation: str = "low_rank") -> xr.DataTree:
    """Fit the several-site model and return the explicit fit result.

    Parameters
    ----------
    ds, covariance, nu, nugget, trend, covariates, transform, pooling, priors, min_points :
        As in :func:`build_site_model`.
    sampler, chains, draws, tune, target_accept, seed, progressbar, adaptation :
        As in :func:`bayesgeo.sampling.sample` (``target_accept`` defaults to 0.9 here: funnels
        of hierarchical models need smaller steps, common practice).

    Returns
    -------
    xarray.DataTree
        In the layout of the single-site fit (:mod:`bayesgeo.posterior`) with a ``site`` dim.
        ``posterior``: raw variables, per-site ``practical_range_z``, ``sd_z``, ``nugget_sd_z``,
        ``beta_z`` and derived variables in data units along ``site`` (``practical_range``,
        ``scale``, ``partial_sill``, ``nugget``, ``total_sill``, ``nugget_ratio``,
        ``microergodic``, ``beta`` along ``(site, term)``) and, unless ``pooling="independent"``,
        population-level ones (``population_*``, see :func:`bayesgeo.hier_outputs.add_derived`);
        ``new_site``: the posterior predictive distribution of a new site's parameters (one fresh
        eta ~ N(0, 1) per draw; absent when independent); ``sample_stats``; ``observed_data``
        (``value`` with ``site`` and ``row``); ``constant_data`` (``x``, ``y``, ``design``). Root
        attrs: ``settings`` (JSON: format, :class:`SiteSpec`, sampler settings, versions),
        ``pooling`` and ``cautions``.
    """
    from bayesgeo.hier_outputs import add_derived, new_site_draws
    from bayesgeo.sampling import sample

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", UserWarning)
        model_kw = dict(covariance=covariance, nu=nu, nugget=nugget, trend=trend, covariates=covariates,
                        transform=transform, pooling=pooling, priors=priors, min_points=min_points)
        model, spec = build_site_model(ds, **model_kw)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        _, data = site_inputs(ds, **model_kw)
    for w in caught:
        warnings.warn(w.message, w.category, stacklevel=2)
    raw = sample(model, sampler=sampler, chains=chains, draws=draws, tune=tune, target_accept=target_accept,
                 seed=seed, progressbar=progressbar, adaptation=adaptation)
    post = add_derived(raw["posterior"].to_dataset(), spec)
    site_of = np.asarray(ds["site"].values if "site" in ds.coords else np.full(ds.sizes["obs"], "all"), dtype=str)
    obs_coords = {"row": ("obs", np.asarray(ds["row"].values)), "site": ("obs", site_of)}
    observed = xr.Dataset({"value": ("obs", np.asarray(ds["value"].values, dtype=float),
                                     {"units": spec.value_units, "long_name": f"measured {spec.value_column}"})},
                          coords=obs_coords)
    if spec.transform == "log":
        observed["model_value"] = ("obs", np.log(observed["value"].values),
                                   {"units": spec.model_units, "long_name": "log of the measured value"})
    design = np.zeros((ds.sizes["obs"], len(spec.terms)))
    for one in data:  # rows of each site, in data order
        design[np.isin(np.asarray(ds["row"].values), one.rows) & (site_of == one.label)] = one.design
    constant = xr.Dataset(
        {"x": ("obs", np.asarray(ds["x"].values, float), {"units": spec.distance_units}),
         "y": ("obs", np.asarray(ds["y"].values, float), {"units": spec.distance_units}),
         "design": (("obs", "term"), design, {"long_name": "trend design matrix (each site centred and scaled)"})},
        coords={**obs_coords, "term": list(spec.terms)},
    )
    for c in spec.covariates:
        constant[c] = ("obs", np.asarray(ds[c].values, dtype=float))
    groups = {"/posterior": post, "/sample_stats": raw["sample_stats"].to_dataset(),
              "/observed_data": observed, "/constant_data": constant}
    if spec.pooling != "independent":
        groups["/new_site"] = new_site_draws(post, spec, seed=int(raw.attrs["seed"]))
    tree = xr.DataTree.from_dict(groups)
    sampler_settings = {k: raw.attrs[k] for k in ("sampler", "seed", "chains", "draws", "tune", "target_accept",
                                                  "adaptation", "seconds", "sampling_seconds") if k in raw.attrs}
    settings = {
        "format": "bayesgeo several-site fit", "format_version": 1, "model": spec.to_dict(),
        "sampler": sampler_settings, "versions": _versions(),
        "data": {k: plain_attr(ds.attrs.get(k, "")) for k in ("source", "source_sha256", "coords", "crs", "x_column",
                                                           "y_column", "value_column", "site_column")},
    }
    tree.attrs = {"title": f"bayesgeo several-site Gaussian-process fit ({spec.pooling} pooling)",
                  "settings": json.dumps(settings), "pooling": spec.pooling,
                  "cautions": json.dumps(site_cautions(spec, post))}
    return tree



def _versions() -> dict:
    from bayesgeo.posterior import _versions as single_site_versions

    return single_site_versions()


def site_spec(tree: xr.DataTree) -> SiteSpec:
    """The :class:`SiteSpec` recorded in a several-site fit's ``settings`` attribute."""
    try:
        settings = json.loads(tree.attrs["settings"])
        if settings.get("format") != "bayesgeo several-site fit":
            raise ValueError(f"format {settings.get('format')!r}")
        return SiteSpec.from_dict(settings["model"])
    except (KeyError, TypeError, ValueError) as err:
        raise InputError(f"not a bayesgeo several-site fit (settings missing or unreadable: {err})") from None


def site_cautions(spec: SiteSpec, posterior: xr.Dataset | None = None, diagnostics: Mapping | None = None) -> list[str]:
    """Cautions of a several-site fit: the single-site ones, the pooling ones and small-site warnings."""
    from bayesgeo.hier_outputs import CAUTIONS
    from bayesgeo.posterior import cautions

    out = cautions(spec.fit_spec(spec.sites[0]), None, diagnostics)
    if posterior is not None and "practical_range" in posterior:
        med = posterior["practical_range"].median(dim=("chain", "draw")).values
        far = [s for s, m, e in zip(spec.sites, med, spec.site_extents) if m > 0.5 * e]
        if far:
            out.append(f"At site(s) {', '.join(far)} the posterior median practical range exceeds half the largest "
                       "distance between that site's samples; the data say little about the range beyond that, so "
                       "its upper interval reflects the prior and the population (common practice).")
    out += list(CAUTIONS) if spec.pooling != "independent" else list(CAUTIONS[:2])
    out += list(spec.warnings)
    return out


def site_fit(tree: xr.DataTree, site: str) -> xr.DataTree:
    """One site's draws in the single-site layout of :mod:`bayesgeo.posterior`.

    The ``posterior`` group holds ``practical_range_z``, ``sd_z``, ``nugget_sd_z`` (with a nugget),
    ``beta_z`` (dim ``term``) and the derived variables in data units, without the ``site`` dim;
    ``observed_data`` and ``constant_data`` hold that site's points and design; the root attr
    ``settings`` is in the single-site format with that site's :class:`bayesgeo.model.FitSpec`
    (common standardisation constants), so :func:`bayesgeo.posterior.fit_spec` and single-site
    code (prediction, maps, checks) run on it unchanged.
    """
    spec = site_spec(tree)
    spec.site_index(site)
    post = tree["posterior"].to_dataset()
    keep = [v for v in post.data_vars if "site" in post[v].dims]
    groups = {"/posterior": post[keep].sel(site=site, drop=True)}
    if "sample_stats" in tree.children:
        groups["/sample_stats"] = tree["sample_stats"].to_dataset()
    for name in ("observed_data", "constant_data"):
        if name in tree.children:
            g = tree[name].to_dataset()
            groups[f"/{name}"] = g.isel(obs=np.flatnonzero(g["site"].values == site)).drop_vars("site")
    out = xr.DataTree.from_dict(groups)
    settings = json.loads(tree.attrs["settings"])
    fs = spec.fit_spec(site)
    one = {"format": "bayesgeo single-site fit", "format_version": 1, "model": fs.to_dict(),
           "sampler": settings.get("sampler", {}), "versions": settings.get("versions", {}),
           "data": settings.get("data", {}),
           "extracted_from": {"format": settings.get("format"), "pooling": spec.pooling, "site": site}}
    from bayesgeo.posterior import cautions

    cav = cautions(fs, groups["/posterior"])
    cav.append(f"Site {site!r} extracted from a {spec.pooling} several-site fit: its parameters borrow strength "
               "from the other sites." if spec.pooling != "independent"
               else f"Site {site!r} extracted from an independent several-site fit.")
    out.attrs = {"title": f"bayesgeo fit of site {site!r} ({spec.pooling} several-site model)",
                 "settings": json.dumps(one), "cautions": json.dumps(cav), "site": site}
    if "diagnostics" in tree.attrs:
        out.attrs["diagnostics"] = tree.attrs["diagnostics"]
    return out
