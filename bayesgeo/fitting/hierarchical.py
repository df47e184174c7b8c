"""Several sites in one model: hierarchical, independent or complete pooling of the covariance.

Each site ``s`` has its own Gaussian-process model (:mod:`bayesgeo.fitting.model`)

    z_s = F_s beta_s + w_s + e_s,   w_s ~ GP(0, sigma2_s rho(d / phi_s)),   e_s ~ N(0, tau2_s I),

and sites are independent given the parameters, so the log-likelihood is a sum of one marginal
Gaussian term per site (:func:`bayesgeo.gp.dense.marginal_loglik` once per site, or the
nearest-neighbour approximation :func:`bayesgeo.gp.nn.nn_loglik` for a site fitted with
``approx="nn"``; no matrix spans two sites).

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

``pooling="hierarchical"``::

    log r_s       ~ Normal(log R, s_r)         R ~ InverseGamma(1, lambda1)  (PC prior, Fuglstad et al. 2019)
    log sigma2_s  ~ Normal(2 log S, s_v)       S ~ Exponential(lambda2)      (PC prior of an sd)
    logit f_s     ~ Normal(mu_f, s_f)          mu_f ~ Normal(logit 0.25, 1.5)
    beta_s,k      ~ Normal(mu_b,k, s_b,k)      mu_b,k ~ Normal(0, beta_sd)
    s_r, s_v, s_f ~ HalfNormal(0.5),  s_b,k ~ HalfNormal(1)

Each site effect ``x_s ~ Normal(mu, s)`` is sampled through a free variable ``u_s`` with
``x_s = w_s mu + s^w_s u_s`` and ``u_s ~ Normal((1 - w_s) mu, s^(1 - w_s))`` (Papaspiliopoulos,
Roberts and Sköld 2007): ``w_s = 0`` is the centred form (``u_s = x_s``), ``w_s = 1`` the
non-centred one (``u_s = (x_s - mu) / s ~ N(0, 1)``). ``parametrisation="noncentred"`` (default)
non-centres every site: measured faster than centring at 60 points per site
(``docs/hierarchical.md``, "Sampling efficiency"); ``"centred"`` centres every site and ``"auto"``
centres only sites of at least :data:`bayesgeo.fitting.site_inputs.CENTRED_MIN_POINTS` points.

``R`` and ``S^2`` are the population medians of the practical range and of the partial sill;
lambda1 and lambda2 are the single-site PC-prior rates (:mod:`bayesgeo.fitting.priors`) computed with the
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
import warnings
from collections.abc import Mapping, Sequence

import numpy as np
import xarray as xr

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.common.io import plain_attr, to_jsonable
from bayesgeo.fitting.priors import Priors
from bayesgeo.fitting.hier_outputs import site_cautions
from bayesgeo.fitting.site_inputs import SiteSpec, site_inputs, site_spec
from bayesgeo.data.points import FIT_DATA_ATTRS
from bayesgeo.common.defaults import CHAINS, DRAWS, TUNE
from bayesgeo.gp.engines import engine

__all__ = ["SITES_ACCEPT", "SITES_RERUN_ACCEPT", "build_site_model", "fit_sites", "site_fit"]

#: Target acceptance of a several-site fit when the user gives none (funnels need smaller steps).
SITES_ACCEPT = 0.9
#: Target acceptance of the rerun of such a fit whose kept draws hold divergent transitions.
SITES_RERUN_ACCEPT = 0.95


def build_site_model(ds: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None,
                     nugget: bool = True, trend: int = 0, covariates: Sequence[str] = (),
                     transform: str | None = None, pooling: str = "hierarchical",
                     priors: Priors | Mapping | None = None, small_sites: str = "error",
                     parametrisation: str = "noncentred", approx: str = "auto", neighbours: int | None = None,
                     anisotropy: bool = False, _variance: str = "sill"):
    """Build one PyMC model for the points of several sites.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data along ``obs`` with a ``site`` coordinate (:func:`bayesgeo.read_points` with
        ``site=COL``); without one the data are a single site labelled ``"all"``.
    covariance, nu, nugget, trend, covariates, transform :
        As in :func:`bayesgeo.fitting.model.build_model`; shared by all sites.
    pooling : {"hierarchical", "independent", "complete"}
        How the covariance parameters are shared (module docstring).
    priors : Priors or dict, optional
        Overrides of the population-location priors (data units): ``range`` (r0, a1) and ``sd``
        (s0, a2) as in :mod:`bayesgeo.fitting.priors`, ``beta_sd``. The ``nugget`` pair is not used: the
        nugget enters as a fraction of the sill (:data:`HYPERPRIORS`).
    small_sites : {"error", "keep"}
        A site with fewer than :data:`bayesgeo.data.points.MIN_POINTS` points raises an InputError naming
        the site and its rows, or (``"keep"``) is kept with a warning.
    parametrisation : {"noncentred", "centred", "auto"}
        Form of the site effects of the hierarchical model (module docstring): non-centred for
        every site (default, the faster one measured), centred for every site, or ``auto``
        (centred for sites of at least :data:`CENTRED_MIN_POINTS` points). Only the sampling
        efficiency differs: the posterior is the same.
    approx : {"auto", "dense", "nn"}
        Likelihood of each site block: exact dense, nearest-neighbour (Vecchia; maximin ordering
        and neighbour sets computed once per site), or ``auto`` (dense up to
        :data:`bayesgeo.gp.engines.DENSE_LIMIT` points per site, nn beyond).
    neighbours : int, optional
        m of the nearest-neighbour likelihood (default :data:`bayesgeo.gp.nn.DEFAULT_NEIGHBOURS`).
    _variance : {"sill", "total"}
        Private, for ``bench/bench_hier_coordinates.py`` only: ``"sill"`` is the documented model,
        ``"total"`` puts the population on the total sill (a different prior, measured and not
        adopted: docs/hierarchical.md, "Site-level coordinates").

    Returns
    -------
    model : pymc.Model
        Dims ``site`` and ``term``. Per-site deterministic (or free, when independent) variables
        ``practical_range_z``, ``sd_z``, ``nugget_sd_z`` (with a nugget) along ``site`` and
        ``beta_z`` along ``(site, term)`` on the standardised scale: the single-site layout of
        :mod:`bayesgeo.fitting.model` with an extra ``site`` dim. Hierarchical pooling samples the site
        effects through ``range_u``, ``sill_u``, ``nugget_u`` (site) and ``beta_u`` (site, term).
        One potential ``loglik_<i>`` per site.
    spec : SiteSpec

    References
    ----------
    Gelman, Carlin, Stern, Dunson, Vehtari and Rubin (2013), *Bayesian Data Analysis*, 3rd ed.,
    ch. 5 (hierarchical models); Betancourt and Girolami (2015), "Hamiltonian Monte Carlo for
    hierarchical models" (non-centred parametrisation); Papaspiliopoulos, Roberts and Sköld (2007),
    "A general framework for the parametrization of hierarchical models", Statistical Science 22
    (centred, non-centred and partially non-centred forms); Fuglstad, Simpson, Lindgren and Rue
    (2019), JASA 114 (PC priors).
    """
    import pymc as pm
    import pytensor.tensor as pt

    spec, data = site_inputs(ds, covariance=covariance, nu=nu, nugget=nugget, trend=trend, covariates=covariates,
                             transform=transform, pooling=pooling, priors=priors, small_sites=small_sites,
                             parametrisation=parametrisation, approx=approx, neighbours=neighbours,
                             anisotropy=anisotropy)
    if _variance not in ("sill", "total"):
        raise ValueError(f"_variance must be 'sill' or 'total', got {_variance!r}")
    cov = get_covariance(spec.covariance, None if spec.covariance != "matern" else spec.nu)
    rates, hp, beta_sd = spec.rates, spec.hyperpriors, spec.priors.beta_sd
    n_sites = len(spec.sites)
    coords = {"site": list(spec.sites), "term": list(spec.terms)}
    if spec.anisotropy:
        from bayesgeo.fitting.model import ANISOTROPY_COORDS

        coords["anisotropy_coord"] = list(ANISOTROPY_COORDS)
    cens = [np.flatnonzero(d.censored) if d.censored is not None else np.zeros(0, int) for d in data]
    if any(c.size for c in cens):
        coords["censored"] = [int(d.rows[c_i][k]) for d, c_i in zip(data, cens) for k in range(c_i.size)]
    with pm.Model(coords=coords) as model:
        if spec.pooling == "hierarchical":
            w = 1.0 - spec.centred()  # per site: 1 = non-centred, 0 = centred
            pop_range = pm.InverseGamma("population_range_z", alpha=1.0, beta=rates["range"])
            range_sd = pm.HalfNormal("range_site_sd", sigma=hp["range_site_sd_scale"])
            log_r = _site_effect("range_u", pt.log(pop_range), range_sd, w, "site")
            prange = pm.Deterministic("practical_range_z", pt.exp(log_r), dims="site")
            if _variance == "total":
                pop_sd = pm.Exponential("population_total_sd_z", lam=rates["sd"])
                sill_sd = pm.HalfNormal("total_site_sd", sigma=hp["sill_site_sd_scale"])
                log_v = _site_effect("total_u", 2.0 * pt.log(pop_sd), sill_sd, w, "site")
            else:
                pop_sd = pm.Exponential("population_sd_z", lam=rates["sd"])
                sill_sd = pm.HalfNormal("sill_site_sd", sigma=hp["sill_site_sd_scale"])
                log_v = _site_effect("sill_u", 2.0 * pt.log(pop_sd), sill_sd, w, "site")
            if spec.nugget:
                mu_f = pm.Normal("nugget_logit_mu", hp["nugget_logit_loc"], hp["nugget_logit_sd"])
                f_sd = pm.HalfNormal("nugget_site_sd", sigma=hp["nugget_site_sd_scale"])
                logit_f = _site_effect("nugget_u", mu_f, f_sd, w, "site")
            if _variance == "total" and spec.nugget:
                sd = pm.Deterministic("sd_z", pt.exp(0.5 * (log_v - pt.softplus(logit_f))), dims="site")
            else:
                sd = pm.Deterministic("sd_z", pt.exp(0.5 * log_v), dims="site")
            beta_mu = pm.Normal("beta_mu_z", 0.0, beta_sd, dims="term")
            beta_site_sd = pm.HalfNormal("beta_site_sd_z", sigma=hp["beta_site_sd_scale"], dims="term")
            beta = pm.Deterministic("beta_z", _site_effect("beta_u", beta_mu[None, :], beta_site_sd[None, :],
                                                           w[:, None], ("site", "term")), dims=("site", "term"))
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
        aniso = None
        if spec.anisotropy:  # each site its own direction and ratio (complete pooling: one for all)
            from bayesgeo.gp.anisotropy import prior_scale

            if spec.pooling == "complete":
                shared = pm.Normal("shared_anisotropy_z", 0.0, prior_scale(), dims="anisotropy_coord")
                aniso = pm.Deterministic("anisotropy_z", pt.ones((n_sites, 1)) * shared[None, :],
                                         dims=("site", "anisotropy_coord"))
            else:
                aniso = pm.Normal("anisotropy_z", 0.0, prior_scale(), dims=("site", "anisotropy_coord"))
        ys = _site_values(data, cens) if "censored" in coords else [d.y for d in data]
        for i, sd_i in enumerate(data):
            resid = ys[i] - pt.dot(sd_i.design, beta[i])
            tau2 = tau[i] ** 2 if spec.nugget else 0.0
            loglik = engine(spec.site_approx[i]).loglik(
                resid, xy=sd_i.xy, dist=sd_i.dist, covariance=cov, scale=prange[i] / spec.range_factor,
                partial_sill=sd[i] ** 2, nugget=tau2, neighbours=spec.site_neighbours[i], metric=spec.metric,
                distance_scale=spec.distance_scale, anisotropy=None if aniso is None else aniso[i])
            pm.Potential(f"loglik_{i}", loglik)
    return model, spec


def _site_values(data, cens: list[np.ndarray]) -> list:
    """Each site's standardised values with its non-detects latent below their limits: one ``censored`` vector
    of gaps for all sites, in site order (the data augmentation of :func:`bayesgeo.fitting.model.censored_index`)."""
    import pytensor.tensor as pt

    from bayesgeo.fitting.model import censored_latent

    latent = censored_latent(np.concatenate([d.y[c] for d, c in zip(data, cens)]))
    out, start = [], 0
    for d, c in zip(data, cens):
        y = pt.as_tensor_variable(np.asarray(d.y, dtype=float))
        out.append(pt.set_subtensor(y[c], latent[start:start + c.size]) if c.size else y)
        start += c.size
    return out


def _site_effect(name: str, mu, spread, w: np.ndarray, dims):
    """Site effects x ~ Normal(mu, spread) as x = w mu + spread^w u, u ~ Normal((1 - w) mu, spread^(1 - w)).

    ``w`` (constant, per site) is 1 for the non-centred form (u standard normal) and 0 for the
    centred one (u = x); Papaspiliopoulos, Roberts and Sköld (2007), Statistical Science 22.
    """
    import pymc as pm

    if np.all(w == 1.0):  # plain forms when every site has the same one (simpler graph)
        return mu + spread * pm.Normal(name, 0.0, 1.0, dims=dims)
    if np.all(w == 0.0):
        return pm.Normal(name, mu=mu * np.ones(w.shape), sigma=spread, dims=dims)
    u = pm.Normal(name, mu=(1.0 - w) * mu, sigma=spread ** (1.0 - w), dims=dims)
    return w * mu + spread**w * u


def fit_sites(ds: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None, nugget: bool = True,
              trend: int = 0, covariates: Sequence[str] = (), transform: str | None = None,
              pooling: str = "hierarchical", priors: Priors | Mapping | None = None, small_sites: str = "error",
              sampler: str = "nutpie", chains: int = CHAINS, draws: int = DRAWS, tune: int = TUNE,
              target_accept: float | None = None, seed: int | None = None, progressbar: bool = False,
              adaptation: str = "low_rank", parametrisation: str = "noncentred", approx: str = "auto",
              neighbours: int | None = None, max_draws: int | None = None, anisotropy: bool = False) -> xr.DataTree:
    """Fit the several-site model and return the explicit fit result.

    Parameters
    ----------
    ds, covariance, nu, nugget, trend, covariates, transform, pooling, priors, small_sites :
        As in :func:`build_site_model`.
    parametrisation, approx, neighbours, anisotropy :
        As in :func:`build_site_model`.
    sampler, chains, draws, tune, seed, progressbar, adaptation :
        As in :func:`bayesgeo.fitting.sampling.sample`.
    target_accept : float, optional
        ``None`` (default): :data:`SITES_ACCEPT` (0.9: funnels of hierarchical models need smaller
        steps, common practice), and when the kept draws hold divergent transitions the fit is
        sampled once more at :data:`SITES_RERUN_ACCEPT` (:func:`bayesgeo.fitting.looks.rerun_if_divergent`,
        recorded in ``settings["sampler"]["rerun"]``). A number: exactly that, no rerun.
    max_draws : int, optional
        While the convergence check (every site and the population) finds R-hat or ESS too poor,
        the same chains continue up to this many draws per chain (default ``4 * draws``;
        ``draws``: off); see :mod:`bayesgeo.fitting.looks`.

    Returns
    -------
    xarray.DataTree
        In the layout of the single-site fit (:mod:`bayesgeo.fitting.posterior`) with a ``site`` dim.
        ``posterior``: raw variables, per-site ``practical_range_z``, ``sd_z``, ``nugget_sd_z``,
        ``beta_z`` and derived variables in data units along ``site`` (``practical_range``,
        ``scale``, ``partial_sill``, ``nugget``, ``total_sill``, ``nugget_ratio``,
        ``microergodic``, ``beta`` along ``(site, term)``) and, unless ``pooling="independent"``,
        population-level ones (``population_*``, see :func:`bayesgeo.fitting.hier_outputs.add_derived`);
        ``new_site``: the posterior predictive distribution of a new site's parameters (one fresh
        eta ~ N(0, 1) per draw; absent when independent); ``sample_stats``; ``observed_data``
        (``value`` with ``site`` and ``row``); ``constant_data`` (``x``, ``y``, ``design``). Root
        attrs: ``settings`` (JSON: format, :class:`SiteSpec`, sampler settings, versions),
        ``pooling`` and ``cautions``.
    """
    from bayesgeo.fitting.hier_outputs import add_derived, new_site_draws
    from bayesgeo.fitting.looks import convergence_look, sample_fit

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", UserWarning)
        model_kw = dict(covariance=covariance, nu=nu, nugget=nugget, trend=trend, covariates=covariates,
                        transform=transform, pooling=pooling, priors=priors, small_sites=small_sites,
                        parametrisation=parametrisation, approx=approx, neighbours=neighbours,
                        anisotropy=anisotropy)
        model, spec = build_site_model(ds, **model_kw)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        _, data = site_inputs(ds, **model_kw)
    for w in caught:
        warnings.warn(w.message, w.category, stacklevel=2)
    import pytensor

    # Centred site effects trigger a harmless PyTensor graph-rewrite failure (local_subtensor_SpecifyShape_lift
    # is skipped; values are unaffected, see tests): keep its traceback off the user's terminal.
    look = convergence_look(lambda raw: xr.DataTree.from_dict({
        "/posterior": add_derived(raw["posterior"].to_dataset(), spec),
        "/sample_stats": raw["sample_stats"].to_dataset()}))
    with pytensor.config.change_flags(on_opt_error="ignore"):
        raw = sample_fit(model, target_accept=target_accept, default_accept=SITES_ACCEPT,
                         rerun_accept=SITES_RERUN_ACCEPT, seed=seed, draws=draws, max_draws=max_draws, look=look,
                         sampler=sampler, chains=chains, tune=tune, progressbar=progressbar, adaptation=adaptation)
    post = add_derived(raw["posterior"].to_dataset(), spec)
    if "censored_z" in post:  # which site each non-detect belongs to
        post = post.assign_coords(censored_site=("censored", [s for s, k in zip(spec.sites, spec.site_censored)
                                                              for _ in range(k)]))
    site_of = np.asarray(ds["site"].values if "site" in ds.coords else np.full(ds.sizes["obs"], "all"), dtype=str)
    obs_coords = {"row": ("obs", np.asarray(ds["row"].values)), "site": ("obs", site_of)}
    observed = xr.Dataset({"value": ("obs", np.asarray(ds["value"].values, dtype=float),
                                     {"units": spec.value_units, "long_name": f"measured {spec.value_column}"})},
                          coords=obs_coords)
    if spec.transform == "log":
        observed["model_value"] = ("obs", np.log(observed["value"].values),
                                   {"units": spec.model_units, "long_name": "log of the measured value"})
    if "censored" in ds:
        observed["censored"] = ds["censored"].copy()
    design = np.zeros((ds.sizes["obs"], len(spec.terms)))
    for one in data:  # rows of each site, in data order
        design[np.isin(np.asarray(ds["row"].values), one.rows) & (site_of == one.label)] = one.design
    constant = xr.Dataset(
        {"x": ("obs", np.asarray(ds["x"].values, float), {"units": spec.distance_units}),
         "y": ("obs", np.asarray(ds["y"].values, float), {"units": spec.distance_units}),
         "design": (("obs", "term"), design, {"long_name": "trend design matrix (each site centred and scaled)"})},
        coords={**obs_coords, "term": list(spec.terms)},
    )
    from bayesgeo.data.categories import is_category

    for c in spec.covariates:  # a category keeps its labels (and its levels and baseline)
        constant[c] = (("obs", np.asarray(ds[c].values).astype(str), dict(ds[c].attrs)) if is_category(ds[c])
                       else ("obs", np.asarray(ds[c].values, dtype=float)))
    groups = {"/posterior": post, "/sample_stats": raw["sample_stats"].to_dataset(),
              "/observed_data": observed, "/constant_data": constant}
    if spec.pooling != "independent":
        groups["/new_site"] = new_site_draws(post, spec, seed=int(raw.attrs["seed"]))
    tree = xr.DataTree.from_dict(groups)
    sampler_settings = {k: raw.attrs[k] for k in ("sampler", "seed", "chains", "draws", "tune", "target_accept",
                                                  "adaptation", "seconds", "sampling_seconds", "max_draws", "looks",
                                                  "rerun")
                        if k in raw.attrs}
    settings = {
        "format": "bayesgeo several-site fit", "format_version": 1, "model": spec.to_dict(),
        "sampler": sampler_settings, "versions": _versions(),
        "data": {k: plain_attr(ds.attrs.get(k, "")) for k in FIT_DATA_ATTRS},
    }
    approximation = _site_approximation(spec, post, constant)
    tree.attrs = {"title": f"bayesgeo several-site Gaussian-process fit ({spec.pooling} pooling)",
                  "settings": json.dumps(settings), "pooling": spec.pooling,
                  "cautions": json.dumps(site_cautions(spec, post, approximation=approximation))}
    if approximation:
        tree.attrs["approximation"] = json.dumps(to_jsonable(approximation))
    return tree


def _site_approximation(spec: SiteSpec, post: xr.Dataset, constant: xr.Dataset) -> dict:
    """{site: approximation check} for the sites fitted with an approximate (nearest-neighbour) likelihood."""
    out = {}
    for i, site in enumerate(spec.sites):
        pick = np.flatnonzero(constant["site"].values == site)
        xy = np.column_stack([constant["x"].values[pick], constant["y"].values[pick]])
        check = engine(spec.site_approx[i] if spec.site_approx else None).approximation_check(
            post.sel(site=site), xy, covariance=spec.covariance,
            neighbours=spec.site_neighbours[i] if spec.site_neighbours else 0, metric=spec.metric)
        if check is not None:
            out[site] = check
    return out



def _versions() -> dict:
    from bayesgeo.fitting.posterior import _versions as single_site_versions

    return single_site_versions()


def site_fit(tree: xr.DataTree, site: str) -> xr.DataTree:
    """One site's draws in the single-site layout of :mod:`bayesgeo.fitting.posterior`.

    The ``posterior`` group holds ``practical_range_z``, ``sd_z``, ``nugget_sd_z`` (with a nugget),
    ``beta_z`` (dim ``term``) and the derived variables in data units, without the ``site`` dim;
    ``observed_data`` and ``constant_data`` hold that site's points and design; the root attr
    ``settings`` is in the single-site format with that site's :class:`bayesgeo.fitting.model.FitSpec`
    (common standardisation constants), so :func:`bayesgeo.fitting.posterior.fit_spec` and single-site
    code (prediction, maps, checks) run on it unchanged.
    """
    spec = site_spec(tree)
    spec.site_index(site)
    post = tree["posterior"].to_dataset()
    keep = [v for v in post.data_vars if "site" in post[v].dims]
    one_post = post[keep].sel(site=site, drop=True)
    latent = [v for v in post.data_vars if "censored" in post[v].dims]
    if latent and np.any(post["censored_site"].values == site):  # the site's own non-detects
        mine = post[latent].isel(censored=np.flatnonzero(post["censored_site"].values == site))
        one_post = xr.merge([one_post, mine.drop_vars("censored_site")])
    if "anisotropy_z" in one_post:  # the site's own circular mean of the direction
        from bayesgeo.gp.anisotropy import anisotropy_parameters

        one_post.update(anisotropy_parameters(one_post["anisotropy_z"], one_post["practical_range"],
                                              spec.distance_units))
    groups = {"/posterior": one_post}
    if "sample_stats" in tree.children:
        groups["/sample_stats"] = tree["sample_stats"].to_dataset()
    for name in ("observed_data", "constant_data"):
        if name in tree.children:
            g = tree[name].to_dataset()
            groups[f"/{name}"] = g.isel(obs=np.flatnonzero(g["site"].values == site)).drop_vars("site")
    out = xr.DataTree.from_dict(groups)
    from bayesgeo.fitting.posterior import fit_settings

    settings = fit_settings(tree)
    fs = spec.fit_spec(site)
    one = {"format": "bayesgeo single-site fit", "format_version": 1, "model": fs.to_dict(),
           "sampler": settings.get("sampler", {}), "versions": settings.get("versions", {}),
           "data": settings.get("data", {}),
           "extracted_from": {"format": settings.get("format"), "pooling": spec.pooling, "site": site}}
    from bayesgeo.fitting.posterior import approximation_of, cautions

    appr = (approximation_of(tree) or {}).get(site)
    cav = cautions(fs, groups["/posterior"], approximation=appr)
    cav.append(f"Site {site!r} extracted from a {spec.pooling} several-site fit: its parameters borrow strength "
               "from the other sites." if spec.pooling != "independent"
               else f"Site {site!r} extracted from an independent several-site fit.")
    out.attrs = {"title": f"bayesgeo fit of site {site!r} ({spec.pooling} several-site model)",
                 "settings": json.dumps(one), "cautions": json.dumps(cav), "site": site}
    if "diagnostics" in tree.attrs:
        out.attrs["diagnostics"] = tree.attrs["diagnostics"]
    if appr is not None:
        out.attrs["approximation"] = json.dumps(appr)
    return out
