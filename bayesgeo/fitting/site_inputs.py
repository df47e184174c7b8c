"""Inputs of the several-site model: settings, checks and the common standardisation.

:func:`site_inputs` checks point data with a ``site`` coordinate and the model settings, splits the
data by site and computes the common standardisation (values ``y = (z - m) / s`` with ``m`` the mean
of all values and ``s`` the pooled within-site residual sd; distances divided by ``D``, the median
over sites of the largest within-site distance) and, per site, the likelihood (dense, or the
nearest-neighbour approximation of :mod:`bayesgeo.gp.nn` for large sites) and the
parametrisation of the site effects (centred or non-centred). :class:`SiteSpec` records all of it;
:mod:`bayesgeo.fitting.hierarchical` builds and fits the model. The statement of the model and the reasons
are in ``docs/hierarchical.md``.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields

import numpy as np
import xarray as xr

from bayesgeo.data.points import MIN_POINTS, SMALL_SITES, sites_of
from bayesgeo.common.geometry import metric_of
from bayesgeo.gp.engines import choose, engine
from bayesgeo.common.io import to_jsonable
from bayesgeo.fitting.model import FitSpec, _source, check_model_inputs, transform_values
from bayesgeo.fitting.priors import Priors, resolve_priors
from bayesgeo.fitting.spec import SpecBase
from bayesgeo.explore.trend import design_matrix
from bayesgeo.common.validate import InputError, check_choice, format_rows

__all__ = [
    "POOLINGS",
    "SMALL_SITE_POLICIES",
    "PARAMETRISATIONS",
    "CENTRED_MIN_POINTS",
    "HYPERPRIORS",
    "SiteSpec",
    "SiteData",
    "site_inputs",
    "site_spec",
]

#: Pooling of the covariance parameters across sites.
POOLINGS = ("hierarchical", "independent", "complete")
#: What to do with a site of fewer than :data:`bayesgeo.data.points.MIN_POINTS` points.
SMALL_SITE_POLICIES = SMALL_SITES  # one vocabulary with read_points(small_sites=)
#: Fewest points a site may have even when pooled.
ABSOLUTE_MIN_POINTS = 3
#: Parametrisation of the site effects of the hierarchical model (docs/hierarchical.md, "Sampling efficiency").
PARAMETRISATIONS = ("noncentred", "centred", "auto")
#: Under ``parametrisation="auto"``, sites with at least this many points are centred, smaller ones
#: non-centred. Not a measured optimum: centring all sites of 60 points sampled markedly worse than
#: non-centring (docs/hierarchical.md, "Sampling efficiency"), because a site's range and sill are
#: weakly identified by its own data (Zhang 2004) long after its mean is; centring is expected to
#: pay only for sites far larger than that.
CENTRED_MIN_POINTS = 1000

#: Hyperprior constants (standardised scale); see docs/hierarchical.md for the reasons.
HYPERPRIORS: dict[str, float] = {
    "range_site_sd_scale": 0.5,      # HalfNormal scale of the between-site sd of log practical range
    "sill_site_sd_scale": 0.5,       # ... of log partial sill
    "nugget_logit_loc": math.log(0.25 / 0.75),  # Normal location of the population logit nugget fraction
    "nugget_logit_sd": 1.5,          # Normal sd of it
    "nugget_site_sd_scale": 0.5,     # HalfNormal scale of the between-site sd of logit nugget fraction
    "beta_site_sd_scale": 1.0,       # HalfNormal scale of the between-site sd of each trend coefficient
}


@dataclass(frozen=True, kw_only=True)
class SiteSpec(SpecBase):
    """Every setting of a several-site fit and the constants of its common standardisation: those of
    :class:`bayesgeo.fitting.spec.SpecBase` (shared by all sites; ``design_attrs`` maps each site label
    to its own design's attributes, each site's coordinates being centred and scaled on their own) and

    Attributes
    ----------
    pooling : str
        One of :data:`POOLINGS`.
    sites : tuple of str
        Site labels, in order of first appearance in the data (the ``site`` dimension).
    n : tuple of int
        Points per site.
    small_sites : tuple of str
        Sites with fewer than :data:`bayesgeo.data.points.MIN_POINTS` points kept under ``small_sites="keep"``.
    site_extents : tuple of float
        Largest within-site distance per site.
    hyperpriors : dict
        :data:`HYPERPRIORS` as used.
    warnings : tuple of str
        Warnings issued while building the model (small sites).
    parametrisation : str
        The requested parametrisation of the site effects (:data:`PARAMETRISATIONS`).
    site_centred : tuple of bool
        Per site: its effects are centred (True) or non-centred (False); empty in fits made before
        the choice existed (all non-centred).
    site_approx : tuple of str
        Per site: ``dense`` or ``nn`` (empty: all dense).
    site_neighbours : tuple of int
        Per site: neighbours m of the nearest-neighbour likelihood (0 for dense sites).
    site_censored : tuple of int
        Per site: non-detects, modelled as left-censored (empty: none anywhere).
    """

    pooling: str
    sites: tuple[str, ...]
    n: tuple[int, ...]
    small_sites: tuple[str, ...]
    site_extents: tuple[float, ...] = ()
    hyperpriors: dict = field(default_factory=lambda: dict(HYPERPRIORS), hash=False)
    warnings: tuple[str, ...] = ()
    parametrisation: str = "noncentred"
    site_centred: tuple[bool, ...] = ()
    site_approx: tuple[str, ...] = ()
    site_neighbours: tuple[int, ...] = ()
    site_censored: tuple[int, ...] = ()

    @property
    def rates(self) -> dict[str, float]:
        """PC-prior rates on the standardised scale (population location, or per site when independent)."""
        return self._pc_rates()

    def fit_spec(self, site: str) -> FitSpec:
        """The single-site :class:`bayesgeo.fitting.model.FitSpec` of one site (common standardisation)."""
        i = self.site_index(site)
        common = {f.name: getattr(self, f.name) for f in fields(SpecBase)}
        return FitSpec(**{**common, "design_attrs": self.design_attrs[site], "n": self.n[i],
                          "approx": self.site_approx[i] if self.site_approx else "dense",
                          "neighbours": self.site_neighbours[i] if self.site_neighbours else 0,
                          "censored": self.site_censored[i] if self.site_censored else 0})

    def centred(self) -> np.ndarray:
        """Per site: 1.0 where the site effects are centred, 0.0 where non-centred."""
        if not self.site_centred:
            return np.zeros(len(self.sites))
        return np.asarray(self.site_centred, dtype=float)

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
    dist: np.ndarray | None  # None for a site fitted with the nearest-neighbour likelihood
    rows: np.ndarray
    xy: np.ndarray
    censored: np.ndarray | None = None  # non-detects among the site's points (their y is the limit)


def _split_sites(ds: xr.Dataset) -> list[tuple[str, xr.Dataset]]:
    labels = sites_of(ds)
    if labels == [""]:
        return [("all", ds)]
    site = ds["site"].values
    return [(lab, ds.isel(obs=np.flatnonzero(site == lab))) for lab in labels]


def site_inputs(ds: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None, nugget: bool = True,
                trend: int = 0, covariates: Sequence[str] = (), transform: str | None = None,
                pooling: str = "hierarchical", priors: Priors | Mapping | None = None,
                small_sites: str = "error", parametrisation: str = "noncentred", approx: str = "auto",
                neighbours: int | None = None, anisotropy: bool = False) -> tuple[SiteSpec, list[SiteData]]:
    """Check the data and settings and compute the common standardisation and per-site inputs.

    Parameters
    ----------
    ds, covariance, nu, nugget, trend, covariates, transform, pooling, priors, small_sites :
        As in :func:`bayesgeo.fitting.hierarchical.build_site_model`.
    parametrisation : {"noncentred", "centred", "auto"}
        Site effects of the hierarchical model: non-centred for every site (default), centred for
        every site, or (``auto``) centred for sites of at least :data:`CENTRED_MIN_POINTS` points.
        Recorded but without effect under the other poolings.
    approx : {"auto", "dense", "nn"}
        Likelihood per site, as in :func:`bayesgeo.fitting.model.build_model`: ``auto`` is dense for a
        site of up to :data:`bayesgeo.gp.engines.DENSE_LIMIT` points, nearest-neighbour beyond.
    neighbours : int, optional
        m of the nearest-neighbour likelihood (default :data:`bayesgeo.gp.nn.DEFAULT_NEIGHBOURS`),
        capped per site at n_s - 1.
    anisotropy : bool
        Geometric anisotropy, each site its own direction and ratio (planar coordinates only).

    Returns
    -------
    spec : SiteSpec
    sites : list of SiteData
        One per site, in the order of ``spec.sites``.

    Raises
    ------
    InputError
        Unknown pooling or policy, a site with fewer than ``MIN_POINTS`` points (unless
        ``small_sites="keep"``), unknown covariance, bad trend, non-positive values under log.
    """
    check_choice(pooling, POOLINGS, "pooling")
    check_choice(small_sites, SMALL_SITE_POLICIES, "small_sites")
    check_choice(parametrisation, PARAMETRISATIONS, "parametrisation")
    cov = check_model_inputs(ds, covariance, nugget=nugget, nu=nu)
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
            if small_sites == "error" or n < ABSOLUTE_MIN_POINTS:
                hint = ("; pass --small-sites keep (small_sites='keep') to keep it in the hierarchical model"
                        if small_sites == "error" and n >= ABSOLUTE_MIN_POINTS else "")
                need = MIN_POINTS if small_sites == "error" else ABSOLUTE_MIN_POINTS
                raise InputError(f"{_source(ds)}: site {label!r} has only {n} points (rows {format_rows(rows)}); "
                                 f"a site needs at least {need}{hint}")
            small.append(label)
            borrow = ("it borrows strength from the other sites through the population distribution"
                      if pooling != "independent" else "under independent pooling its parameters rest mostly on the prior")
            notes.append(f"site {label!r} has only {n} points (fewer than {MIN_POINTS}), kept with "
                         f"--small-sites keep: {borrow}; treat its estimates with extra caution")
        design = design_matrix(part, trend, tuple(covariates))
        p = design.shape[1]
        if n < p + 1 or np.linalg.matrix_rank(design.values) < p:
            raise InputError(f"trend: site {label!r} ({n} points, rows {format_rows(rows)}) cannot pin down the "
                             f"{p} trend terms ({', '.join(design.attrs['terms'])}); use a lower order")
        xy = np.column_stack([part["x"].values, part["y"].values]).astype(float)
        how, m = choose(approx, neighbours, n, cov.name)  # the single-site rule, per site
        extent, d = engine(how).distances(xy, metric)  # d: None for nn, never an n x n matrix for a large site
        if not extent > 0:
            raise InputError(f"{_source(ds)}: all points of site {label!r} share one location (rows {format_rows(rows)})")
        z = np.asarray(part["_z"].values, dtype=float)
        coef, *_ = np.linalg.lstsq(design.values, z, rcond=None)
        rss = float(np.sum((z - design.values @ coef) ** 2))
        cens = np.asarray(part["censored"].values, bool) if "censored" in part else np.zeros(n, dtype=bool)
        raw.append((label, part, design, d, extent, z, rss, rows, xy, how, m, cens))
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
    if anisotropy:
        from bayesgeo.fitting.model import check_anisotropy

        check_anisotropy(metric, approx, _source(ds))
    spec = SiteSpec(
        pooling=pooling, sites=tuple(r[0] for r in raw), n=tuple(len(r[5]) for r in raw), small_sites=tuple(small),
        covariance=cov.name, nu=cov.nu, nugget=bool(nugget), trend=int(design0.attrs["order"]),
        covariates=tuple(design0.attrs["covariates"]), transform=transform, terms=tuple(design0.attrs["terms"]),
        design_attrs={r[0]: to_jsonable(dict(r[2].attrs)) for r in raw}, value_mean=vmean, value_sd=vsd,
        distance_scale=dscale, site_extents=tuple(extents), range_factor=float(cov.range_factor), metric=metric,
        distance_units=str(ds.attrs.get("distance_units", "")),
        value_units=str(ds.attrs.get("value_units", "") or ds["value"].attrs.get("units", "")),
        value_column=str(ds.attrs.get("value_column", "value")), priors=resolved,
        hyperpriors=dict(HYPERPRIORS), warnings=tuple(notes), parametrisation=parametrisation,
        site_centred=tuple(_centred(parametrisation, len(r[5])) for r in raw), approx=approx,
        site_approx=tuple(r[9] for r in raw), site_neighbours=tuple(int(r[10]) for r in raw),
        site_censored=tuple(int(r[11].sum()) for r in raw) if any(r[11].any() for r in raw) else (),
        anisotropy=bool(anisotropy),
    )
    data = [SiteData(label=r[0], y=(r[5] - vmean) / vsd, design=np.asarray(r[2].values, dtype=float),
                     dist=None if r[3] is None else r[3] / dscale, rows=r[7], xy=r[8], censored=r[11]) for r in raw]
    return spec, data


def _centred(parametrisation: str, n: int) -> bool:
    """Whether a site of ``n`` points gets centred effects under ``parametrisation``."""
    if parametrisation == "auto":
        return n >= CENTRED_MIN_POINTS
    return parametrisation == "centred"


def site_spec(tree: xr.DataTree, source: str | None = None) -> SiteSpec:
    """The :class:`SiteSpec` recorded in a several-site fit's ``settings`` attribute
    (decoded by :func:`bayesgeo.fitting.posterior.fit_settings`; ``source`` names the file in messages)."""
    from bayesgeo.fitting.posterior import SEVERAL_SITE_FORMAT, decode_spec, fit_settings

    settings = fit_settings(tree, source)
    if settings.get("format") != SEVERAL_SITE_FORMAT:
        where = f"{source}: " if source else ""
        raise InputError(f"{where}not a bayesgeo several-site fit (settings format {settings.get('format')!r})")
    return decode_spec(settings, SiteSpec, "several-site", source)
