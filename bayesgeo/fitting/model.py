"""The single-site Bayesian Gaussian-process model in PyMC.

    z(s) = f(s)^T beta + w(s) + e(s),
    w ~ GP(0, sigma^2 rho(d / phi)),   e ~ N(0, tau^2) independent,

with ``z`` the measured value (or its logarithm under ``transform="log"``), ``f(s)`` the trend
design row of :func:`bayesgeo.explore.trend.design_matrix` (intercept, polynomial in the centred and
scaled coordinates, covariates), ``rho`` a family of :mod:`bayesgeo.gp.covariance` with practical
range ``r = range_factor * phi``, partial sill ``sigma^2`` and nugget ``tau^2``. The field ``w``
is integrated out: the likelihood is the marginal Gaussian
``z ~ N(F beta, sigma^2 R + (tau^2 + jitter) I)`` (:func:`bayesgeo.gp.dense.marginal_loglik`).

Internally the model works on a standardised scale: values ``y = (z - m) / s`` with ``m`` and
``s`` the sample mean and sd of ``z``, distances divided by ``D``, the largest distance between
two data points. The parameters are ``practical_range_z = r / D``, ``sd_z = sigma / s``,
``nugget_sd_z = tau / s`` and ``beta_z``. PyMC samples them in coordinates chosen for the geometry
of the posterior (docs/model.md, "Parametrisation"; bench/bench_convergence.py): the log range;
with a nugget ``variance_coords_z`` = (log(sd_z^2 + nugget_sd_z^2), logit of the spatial share
sd_z^2 / (sd_z^2 + nugget_sd_z^2)), with the same PC priors carried over by the change-of-variables
Jacobian and ``sd_z``, ``nugget_sd_z`` as Deterministics, without one log ``sd_z``. The dense
likelihood integrates the Gaussian trend coefficients out and they are drawn after sampling from
their exact conditional (:mod:`bayesgeo.gp.trend_posterior`); the nearest-neighbour likelihood samples
them. The private options ``_coordinates="legacy"`` and ``_trend="sampled"`` keep the earlier
coordinates (log sds, sampled coefficients) for comparison: the same model and priors.
:mod:`bayesgeo.fitting.posterior` converts draws back to data units. The full statement, priors and the
reasons for this parametrisation are in ``docs/model.md``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import xarray as xr

from bayesgeo.gp.covariance import Covariance, get_covariance
from bayesgeo.data.points import TRANSFORMS, apply_transform, sites_of
from bayesgeo.common.geometry import metric_of
from bayesgeo.fitting.priors import Priors, pc_sd_rate, resolve_priors
from bayesgeo.fitting.spec import SpecBase
from bayesgeo.explore.trend import design_matrix
from bayesgeo.common.validate import InputError
from bayesgeo.common.io import to_jsonable
from bayesgeo.gp.engines import choose, engine

__all__ = ["ANISOTROPY_COORDS", "TRANSFORMS", "VARIANCE_COORDS", "FitSpec", "build_model", "censored_index",
           "check_model_inputs",
           "model_inputs",
           "build_model_and_inputs", "transform_values", "variance_split_logp"]

#: Labels of the two sampled coordinates of the variances in a model with a nugget:
#: log(sigma_z^2 + tau_z^2) and logit(sigma_z^2 / (sigma_z^2 + tau_z^2)) (docs/model.md, "Parametrisation").
VARIANCE_COORDS = ("log_total_variance", "logit_spatial_share")
_LOG4 = math.log(4.0)



#: Coordinates of the sampled anisotropy vector alpha = log(ratio) (cos 2 theta, sin 2 theta)
#: (:mod:`bayesgeo.gp.anisotropy`).
ANISOTROPY_COORDS = ("log_ratio_cos2angle", "log_ratio_sin2angle")


@dataclass(frozen=True, kw_only=True)
class FitSpec(SpecBase):
    """Every setting of a single-site fit and the constants of its standardisation: those of
    :class:`bayesgeo.fitting.spec.SpecBase` and

    Attributes
    ----------
    n : int
        Number of observations.
    neighbours : int
        m of the nearest-neighbour likelihood (0 for dense).
    censored : int
        Number of non-detects, modelled as left-censored at their reporting limits (:func:`censored_index`).
    """

    n: int
    neighbours: int = 0
    censored: int = 0

    @property
    def rates(self) -> dict[str, float]:
        """Rates of the PC priors on the standardised scale (practical_range_z, sd_z, nugget_sd_z)."""
        p = self.priors
        return {**self._pc_rates(), "nugget": pc_sd_rate(p.nugget[0] / self.value_sd, p.nugget[1])}


def _source(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("source") or "data")


def transform_values(ds: xr.Dataset, transform: str | None) -> np.ndarray:
    """The values to model: ``ds["value"]`` or its natural logarithm (see
    :func:`bayesgeo.data.points.apply_transform`, which raises the InputError for bad input)."""
    return np.asarray(apply_transform(ds, transform)["value"].values, dtype=float)


def _check_single_site(ds: xr.Dataset) -> None:
    labels = sites_of(ds)
    if len(labels) > 1:
        shown = ", ".join(labels[:5]) + (", ..." if len(labels) > 5 else "")
        raise InputError(
            f"{_source(ds)}: --site: the data hold {len(labels)} sites ({shown}); this model fits one site "
            "at a time (select one site's rows); a several-site model is not available yet"
        )


def check_model_inputs(ds: xr.Dataset, covariance: str, nu: float | None, nugget) -> Covariance:
    """The covariance family of a model of ``ds`` after the checks every model makes (single- and
    several-site): point data, a known family and smoothness, a True/False nugget.

    Raises
    ------
    InputError
        One line naming the data source or the argument.
    """
    for key in ("x", "y", "value"):
        if key not in ds.variables:
            raise InputError(f"{_source(ds)}: not point data (variable {key!r} missing)")
    try:
        cov = get_covariance(covariance, nu)
    except (ValueError, TypeError) as err:
        raise InputError(f"covariance: {err}") from None
    if not isinstance(nugget, (bool, np.bool_)):
        raise InputError(f"nugget: expected True or False, got {nugget!r}")
    return cov


def model_inputs(ds: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None,
                 nugget: bool = True, trend: int = 0, covariates: Sequence[str] = (),
                 transform: str | None = None, priors: Priors | Mapping | None = None,
                 approx: str = "auto", neighbours: int | None = None, anisotropy: bool = False,
                 _standardise: tuple[float, float] | None = None):
    """Check the data and settings and compute everything the model needs.

    The private ``_standardise=(mean, sd)`` fixes the standardisation constants instead of taking them
    from the values (simulation-based calibration builds each replicate's model with its template's
    constants and resolved priors, so that the prior stays the same; :mod:`bayesgeo.calibration.validation`).

    Returns
    -------
    spec : FitSpec
    y : ndarray (n,)
        Standardised values.
    design : xarray.DataArray (obs, term)
        Trend design matrix (:func:`bayesgeo.explore.trend.design_matrix`).
    dist : ndarray (n, n) or None
        Distances divided by ``spec.distance_scale``; ``None`` for the nearest-neighbour
        likelihood, which never builds an n x n matrix.
    """
    cov = check_model_inputs(ds, covariance, nu, nugget)
    _check_single_site(ds)
    z = transform_values(ds, transform)
    design = design_matrix(ds, trend, tuple(covariates))
    n, p = design.shape
    if n < p + 3:
        raise InputError(f"trend: {p} trend terms and 3 covariance parameters need more than {n} points")
    if np.linalg.matrix_rank(design.values) < p:
        raise InputError(f"trend: the trend terms ({', '.join(design.attrs['terms'])}) are not identifiable "
                         "from these locations and covariates; use a lower order or drop a covariate")
    approx, neighbours = choose(approx, neighbours, n, cov.name)
    metric = metric_of(ds)
    if anisotropy:
        check_anisotropy(metric, approx, _source(ds))
    xy = np.column_stack([ds["x"].values, ds["y"].values]).astype(float)
    extent, d = engine(approx).distances(xy, metric)  # d: None for nn, which never builds an n x n matrix
    if not extent > 0:
        raise InputError(f"{_source(ds)}: all points share one location")
    vmean, vsd = (float(np.mean(z)), float(np.std(z, ddof=1))) if _standardise is None else map(float, _standardise)
    if not vsd > 0:
        raise InputError(f"{_source(ds)}: the values do not vary; nothing to model")
    coef, *_ = np.linalg.lstsq(design.values, z, rcond=None)
    resid_sd = float(np.std(z - design.values @ coef, ddof=min(p, n - 1)))
    resolved = resolve_priors(priors, extent=extent, value_sd=resid_sd if resid_sd > 0 else vsd)
    spec = FitSpec(
        covariance=cov.name, nu=cov.nu, nugget=bool(nugget), trend=int(design.attrs["order"]),
        covariates=tuple(design.attrs["covariates"]), transform=transform,
        terms=tuple(design.attrs["terms"]), design_attrs=to_jsonable(dict(design.attrs)),
        value_mean=vmean, value_sd=vsd, distance_scale=extent, range_factor=float(cov.range_factor),
        metric=metric, distance_units=str(ds.attrs.get("distance_units", "")),
        value_units=str(ds.attrs.get("value_units", "") or ds["value"].attrs.get("units", "")),
        value_column=str(ds.attrs.get("value_column", "value")), n=int(n), priors=resolved,
        approx=approx, neighbours=int(neighbours), censored=int(censored_index(ds).size), anisotropy=bool(anisotropy),
    )
    return spec, (z - vmean) / vsd, design, None if d is None else d / extent


def build_model(ds: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None,
                nugget: bool = True, trend: int = 0, covariates: Sequence[str] = (),
                transform: str | None = None, priors: Priors | Mapping | None = None,
                approx: str = "auto", neighbours: int | None = None, anisotropy: bool = False,
                _coordinates: str = "share", _trend: str = "auto"):
    """Build the PyMC model of one site's point data.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data along ``obs`` (:func:`bayesgeo.read_points`), one site.
    covariance : str
        Covariance family (:data:`bayesgeo.gp.covariance.FAMILIES`); ``nu`` its smoothness for
        ``"matern"``.
    nugget : bool
        Include the nugget tau^2 (default). Without it a small jitter keeps K invertible.
    trend : int
        Polynomial order 0-3 of the trend in the coordinates.
    covariates : sequence of str
        Data variables added to the trend.
    transform : {None, "log"}
        Model log(values); zero or negative values are refused.
    priors : Priors or dict, optional
        Overrides of the default priors (data units; see :mod:`bayesgeo.fitting.priors`).
    approx : {"auto", "dense", "nn"}
        Exact dense likelihood, or the nearest-neighbour (Vecchia) approximation of
        :mod:`bayesgeo.gp.nn`; ``auto`` (default) is dense up to :data:`bayesgeo.gp.engines.DENSE_LIMIT` points.
    neighbours : int, optional
        Conditioning set size m of the nearest-neighbour likelihood (default
        :data:`bayesgeo.gp.nn.DEFAULT_NEIGHBOURS`).
    anisotropy : bool
        Geometric anisotropy (:mod:`bayesgeo.gp.anisotropy`): the anisotropy vector ``anisotropy_z`` (dim
        ``anisotropy_coord``) is sampled with prior Normal(0, s^2 I) (s from
        :func:`bayesgeo.gp.anisotropy.prior_scale`); dense likelihood and planar coordinates only.

    Returns
    -------
    model : pymc.Model
        Free variables on the standardised scale: ``practical_range_z``; with a nugget
        ``variance_coords_z`` (dim ``variance_coord``: :data:`VARIANCE_COORDS`, the log total
        variance and logit spatial share, with ``sd_z`` and ``nugget_sd_z`` as Deterministics),
        without one ``sd_z``; and, for the nearest-neighbour likelihood only, ``beta_z`` (dim
        ``term``). The dense likelihood integrates the trend coefficients out (the potential
        ``"loglik"`` is log N(y | 0, K + b^2 F F^T), :mod:`bayesgeo.gp.trend_posterior`), and
        :func:`bayesgeo.fitting.posterior.fit` draws ``beta_z`` afterwards from its exact conditional.
        The private ``_coordinates="legacy"`` samples ``sd_z`` and ``nugget_sd_z`` on the log
        scale instead and ``_trend="sampled"`` samples ``beta_z`` with the dense likelihood too:
        the alternatives measured in bench/bench_convergence.py (docs/model.md, "Parametrisation").
    spec : FitSpec
        Settings and standardisation constants.

    Raises
    ------
    InputError
        Several sites, unknown covariance, bad trend order, non-positive values under log, bad priors.
    """
    model, spec, *_ = build_model_and_inputs(ds, covariance=covariance, nu=nu, nugget=nugget, trend=trend,
                                             covariates=covariates, transform=transform, priors=priors,
                                             approx=approx, neighbours=neighbours, anisotropy=anisotropy,
                                             _coordinates=_coordinates, _trend=_trend)
    return model, spec


def build_model_and_inputs(ds: xr.Dataset, *, _coordinates: str = "share", _trend: str = "auto", **settings):
    """:func:`build_model` and the inputs it was built from, computed once.

    ``settings`` are those of :func:`model_inputs`. Returns ``(model, spec, y, design, dist)``: the
    model and spec of :func:`build_model` and the standardised values, design matrix and scaled
    distances of :func:`model_inputs` (what a fit needs again to draw the trend coefficients).
    """
    import pymc as pm

    spec, y, design, dist = model_inputs(ds, **settings)
    cov = get_covariance(spec.covariance, None if spec.covariance != "matern" else spec.nu)
    rates = spec.rates
    if _coordinates not in ("share", "legacy"):
        raise ValueError(f"_coordinates must be 'share' or 'legacy', got {_coordinates!r}")
    if _trend not in ("auto", "integrated", "sampled"):
        raise ValueError(f"_trend must be 'auto', 'integrated' or 'sampled', got {_trend!r}")
    integrated = _trend_integrated(spec, _trend)
    coords = {"term": list(spec.terms)}
    if spec.anisotropy:
        coords["anisotropy_coord"] = list(ANISOTROPY_COORDS)
    if spec.nugget and _coordinates == "share":
        coords["variance_coord"] = list(VARIANCE_COORDS)
    cens = censored_index(ds)
    if cens.size:
        coords["censored"] = ds["row"].values[cens].tolist() if "row" in ds.coords else cens.tolist()
    with pm.Model(coords=coords) as model:
        prange = pm.InverseGamma("practical_range_z", alpha=1.0, beta=rates["range"])
        if not spec.nugget:
            sd = pm.Exponential("sd_z", lam=rates["sd"])
            sd2, tau2 = sd**2, 0.0
        elif _coordinates == "legacy":
            sd = pm.Exponential("sd_z", lam=rates["sd"])
            sd2, tau2 = sd**2, pm.Exponential("nugget_sd_z", lam=rates["nugget"]) ** 2
        else:
            sd2, tau2 = _variance_split(rates["sd"], rates["nugget"])
        y_model = _censored_values(y, cens) if cens.size else y
        if integrated:
            from bayesgeo.gp.trend_posterior import trend_prior_covariance

            resid, extra = y_model, trend_prior_covariance(design.values, spec.priors.beta_sd)
        else:
            beta = pm.Normal("beta_z", mu=0.0, sigma=spec.priors.beta_sd, dims="term")
            resid, extra = y_model - pm.math.dot(design.values, beta), None
        xy = np.column_stack([ds["x"].values, ds["y"].values]).astype(float)
        aniso = None
        if spec.anisotropy:
            from bayesgeo.gp.anisotropy import prior_scale

            aniso = pm.Normal("anisotropy_z", mu=0.0, sigma=prior_scale(), dims="anisotropy_coord")
        loglik = engine(spec.approx).loglik(
            resid, xy=xy, dist=dist, covariance=cov, scale=prange / spec.range_factor, partial_sill=sd2, nugget=tau2,
            neighbours=spec.neighbours, metric=spec.metric, distance_scale=spec.distance_scale, extra=extra,
            anisotropy=aniso)
        pm.Potential("loglik", loglik)
    return model, spec, y, design, dist


def check_anisotropy(metric: str, approx: str, source: str) -> None:
    """Anisotropy needs planar coordinates (``approx`` is either likelihood)."""
    if metric == "greatcircle":
        raise InputError(f"{source}: anisotropy needs planar coordinates; project lon/lat data first (--to-crs utm)")


def censored_index(ds: xr.Dataset) -> np.ndarray:
    """Positions (along ``obs``) of the non-detects of ``ds`` (:mod:`bayesgeo.data.nondetects`); empty without."""
    if "censored" not in ds:
        return np.zeros(0, dtype=np.int64)
    return np.flatnonzero(np.asarray(ds["censored"].values, dtype=bool))


def censored_latent(limits: np.ndarray):
    """The latent values of the non-detects (dim ``censored``), each below its standardised limit (data augmentation).

    A non-detect's value is ``y_c = L_c - g_c`` with ``L_c`` its (standardised, transformed) reporting
    limit and ``g_c > 0`` sampled under a flat density (PyMC's log transform adds the Jacobian), so the
    joint posterior is p(theta) N(y | mu, K) 1{y_c < L_c}; integrating the ``y_c`` out leaves the
    left-censored likelihood exactly (Tanner and Wong 1987, JASA 82, data augmentation; the censored
    Gaussian-process likelihood as in De Oliveira 2005, J. Computational and Graphical Statistics 14,
    95-115, reference from memory). The values are recorded as the Deterministic ``censored_z``; the single-
    and the several-site model both take them from here.
    """
    import pymc as pm

    gap = pm.HalfFlat("censored_gap_z", dims="censored")
    return pm.Deterministic("censored_z", np.asarray(limits, dtype=float) - gap, dims="censored")


def _censored_values(y: np.ndarray, cens: np.ndarray):
    """The standardised values with the non-detects at their latent values (:func:`censored_latent`)."""
    import pytensor.tensor as pt

    return pt.set_subtensor(pt.as_tensor_variable(np.asarray(y, dtype=float))[cens], censored_latent(y[cens]))


def _trend_integrated(spec: FitSpec, trend: str = "auto") -> bool:
    """Whether :func:`build_model` integrates the trend coefficients out of the likelihood:
    ``"auto"`` does so for the dense likelihood (the nearest-neighbour one samples them)."""
    if trend == "integrated" and not engine(spec.approx).integrates_trend:
        raise ValueError("the trend coefficients can be integrated out of the dense likelihood only")
    return engine(spec.approx).integrates_trend and trend != "sampled"


def variance_split_logp(value, rates):
    """PyTensor log prior density of ``value = (log v, logit s)`` (last axis) when
    ``sigma ~ Exponential(lam_sd)`` and ``tau ~ Exponential(lam_nugget)`` independently,
    ``rates = (lam_sd, lam_nugget)``, ``v = sigma^2 + tau^2`` and ``s = sigma^2 / v``: the two PC
    priors at ``sigma = sqrt(v s)``, ``tau = sqrt(v (1 - s))`` plus the log-Jacobian
    ``log v + 0.5 log(s (1 - s)) - log 4`` of ``(log v, logit s) -> (sigma, tau)``."""
    import pytensor.tensor as pt

    a, b = value[..., 0], value[..., 1]
    lam_sd, lam_nugget = rates[..., 0], rates[..., 1]
    log_s, log_1ms = -pt.softplus(-b), -pt.softplus(b)  # log s, log(1 - s), stable for large |b|
    sigma, tau = pt.exp(0.5 * (a + log_s)), pt.exp(0.5 * (a + log_1ms))
    prior = pt.log(lam_sd) - lam_sd * sigma + pt.log(lam_nugget) - lam_nugget * tau
    return prior + a + 0.5 * (log_s + log_1ms) - _LOG4


def _variance_split_dist(rates, size):
    """Generative graph of ``(log v, logit s)``: sigma and tau drawn from their exponential PC priors."""
    import pymc as pm
    import pytensor.tensor as pt

    sigma = pm.Exponential.dist(lam=rates[..., 0], size=size)
    tau = pm.Exponential.dist(lam=rates[..., 1], size=size)
    return pt.stack([pt.log(sigma**2 + tau**2), 2.0 * (pt.log(sigma) - pt.log(tau))], axis=-1)


def _variance_split(lam_sd: float, lam_nugget: float):
    """Free variable ``variance_coords_z`` = (log total variance, logit spatial share) with the PC
    priors of sigma and tau carried over exactly (:func:`variance_split_logp`); Deterministics
    ``sd_z`` and ``nugget_sd_z``. Returns (sigma^2, tau^2) as tensors."""
    import pymc as pm
    import pytensor.tensor as pt

    u = pm.CustomDist(
        "variance_coords_z", np.array([lam_sd, lam_nugget], dtype=float), logp=variance_split_logp,
        dist=_variance_split_dist, support_point=lambda rv, size, rates: pt.zeros_like(rv),
        signature="(k)->(k)", dims="variance_coord",
    )
    log_v, b = u[0], u[1]
    log_sd2, log_tau2 = log_v - pt.softplus(-b), log_v - pt.softplus(b)
    pm.Deterministic("sd_z", pt.exp(0.5 * log_sd2))
    pm.Deterministic("nugget_sd_z", pt.exp(0.5 * log_tau2))
    return pt.exp(log_sd2), pt.exp(log_tau2)
