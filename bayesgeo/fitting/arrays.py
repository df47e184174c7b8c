"""What the leave-one-out stage reads from a fit: its data, design and draws as arrays
(:class:`FitArrays`, one block per site for a several-site fit), and the xarray layout of a
leave-one-out predictive. Shared by the exact (:mod:`bayesgeo.checks.loo`) and the nearest-neighbour
(:mod:`bayesgeo.gp.nn_loo`) leave-one-out, so that neither imports the other's module."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import xarray as xr

from bayesgeo.common.geometry import distance_matrix
from bayesgeo.fitting.model import FitSpec
from bayesgeo.fitting.posterior import fit_spec
from bayesgeo.explore.trend import design_at
from bayesgeo.common.validate import InputError

__all__ = ["FitArrays", "SiteFitArrays", "fit_arrays", "site_fit_arrays", "any_fit_arrays", "is_site_fit",
           "predictive_dataset"]

_PARAMS = ("practical_range_z", "sd_z", "beta_z")


@dataclass(frozen=True)
class FitArrays:
    """Everything the checks need from one fit, as plain arrays.

    Attributes
    ----------
    spec : FitSpec
        Settings and standardisation constants of the fit.
    xy : ndarray (n, 2)
        Data locations.
    value : ndarray (n,)
        Measured values (data units).
    z : ndarray (n,)
        Modelled values: ``value`` or ``log(value)``.
    y : ndarray (n,)
        Standardised values ``(z - spec.value_mean) / spec.value_sd``.
    design : ndarray (n, p)
        Trend design matrix.
    dist : ndarray (n, n)
        Distances divided by ``spec.distance_scale``; a property computed on first use, so
        nearest-neighbour fits of many points never build it.
    draws : dict of str to ndarray
        ``practical_range_z``, ``sd_z``, ``nugget_sd_z`` (zeros without nugget), each
        (chain, draw), and ``beta_z`` (chain, draw, term), on the standardised scale.
    chain, draw : ndarray
        Coordinates of the posterior draws.
    obs_name : str
        Name of the observed-value variable (the ``log_likelihood`` variable takes this name).
    obs_index : ndarray (n,)
        Coordinate of the ``obs`` dimension of the observed data (0..n-1 when it has none).
    rows : ndarray (n,)
        Row of each point in the input file (header = row 1), as recorded by the fit.
    source_sha256 : str
        Checksum of the data file the fit was made from ("" when unknown).
    censored : ndarray of bool (n,)
        Non-detects (their ``value`` is the reporting limit); their imputed values are
        ``draws["censored_z"]`` (chain, draw, k) on the standardised scale.
    """

    spec: FitSpec
    xy: np.ndarray
    value: np.ndarray
    z: np.ndarray
    y: np.ndarray
    design: np.ndarray
    draws: dict
    chain: np.ndarray
    draw: np.ndarray
    obs_name: str
    obs_index: np.ndarray
    rows: np.ndarray
    source_sha256: str
    censored: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))

    @property
    def n(self) -> int:
        """Number of observations."""
        return int(self.value.size)

    @cached_property
    def dist(self) -> np.ndarray:
        """(n, n) distances divided by ``spec.distance_scale`` (O(n^2) memory: dense fits only)."""
        return distance_matrix(self.xy, self.spec.metric) / self.spec.distance_scale


def _observed(tree: xr.DataTree) -> tuple[xr.Dataset, str]:
    """The group holding the observations and the name of their value variable."""
    for group in ("observed_data", "constant_data"):
        if group not in tree.children:
            continue
        ds = tree[group].to_dataset()
        for name in ("value", "y", "z"):
            if name in ds.data_vars and ds[name].ndim == 1:
                return ds, name
        if len(ds.data_vars) == 1:
            return ds, str(next(iter(ds.data_vars)))
    raise InputError("not a bayesgeo fit: no observed_data group with the measured values")


def _find(tree: xr.DataTree, name: str) -> np.ndarray | None:
    for group in ("observed_data", "constant_data"):
        if group in tree.children and name in tree[group].variables:
            return np.asarray(tree[group][name].values)
    return None


def _locations(tree: xr.DataTree, obs: xr.Dataset, name: str) -> np.ndarray:
    """(n, 2) locations: coordinates ``x``/``y`` of the values, else variables of that name."""
    coords = obs[name].coords
    pair = []
    for key in ("x", "y"):
        if key in coords and key != name:
            pair.append(np.asarray(coords[key].values))
        elif key != name:
            pair.append(_find(tree, key))
    if len(pair) != 2 or any(p is None for p in pair):
        raise InputError("not a bayesgeo fit: the observed data lack the x and y coordinates")
    return np.column_stack(pair).astype(float)


def is_site_fit(tree: xr.DataTree) -> bool:
    """True when ``tree`` is a several-site fit (settings format of :mod:`bayesgeo.fitting.hierarchical`)."""
    from bayesgeo.fitting.fitted import Fit

    try:
        return Fit(tree).several
    except InputError:  # no bayesgeo settings: a bare posterior
        return False


@dataclass(frozen=True)
class SiteFitArrays:
    """The data of a several-site fit and one :class:`FitArrays` per site.

    Attributes
    ----------
    spec : SiteSpec
        Settings of the several-site fit (:class:`bayesgeo.fitting.site_inputs.SiteSpec`).
    xy, value, z, obs_name, obs_index, rows, source_sha256 :
        As in :class:`FitArrays`, for all points in data order.
    site : ndarray (n,) of str
        Site label of each point.
    blocks : dict of str to FitArrays
        Each site's points and draws in the single-site layout (common standardisation).
    index : dict of str to ndarray
        Positions (along ``obs``) of each site's points.
    """

    spec: object
    xy: np.ndarray
    value: np.ndarray
    z: np.ndarray
    site: np.ndarray
    obs_name: str
    obs_index: np.ndarray
    rows: np.ndarray
    source_sha256: str
    blocks: dict
    index: dict

    @property
    def n(self) -> int:
        """Number of observations (all sites)."""
        return int(self.value.size)

    @property
    def sites(self) -> tuple[str, ...]:
        """Site labels in the order of the fit."""
        return tuple(self.blocks)

    @property
    def censored(self) -> np.ndarray:
        """Non-detects along ``obs`` (all sites, data order)."""
        out = np.zeros(self.n, dtype=bool)
        for label, fa in self.blocks.items():
            if fa.censored.size:
                out[self.index[label]] = fa.censored
        return out


def _source_sha256(tree) -> str:
    """SHA-256 of the fitted data file recorded in the fit's settings ('' when not recorded)."""
    from bayesgeo.fitting.fitted import Fit

    try:
        return str(Fit(tree).settings.get("data", {}).get("source_sha256", "") or "")
    except InputError:
        return ""


def site_fit_arrays(tree: xr.DataTree) -> SiteFitArrays:
    """Collect the data of a several-site fit and each site's :class:`FitArrays`.

    Raises
    ------
    InputError
        When ``tree`` is not a readable several-site fit.
    """
    from bayesgeo.fitting.hierarchical import site_fit
    from bayesgeo.fitting.site_inputs import site_spec

    spec = site_spec(tree)
    obs, name = _observed(tree)
    if "site" not in obs.coords and "site" not in obs.variables:
        raise InputError("not a bayesgeo several-site fit: the observed data carry no site labels")
    site = np.asarray(obs["site"].values).astype(str)
    value = np.asarray(obs[name].values, dtype=float)
    blocks, index = {}, {}
    for label in spec.sites:
        index[label] = np.flatnonzero(site == label)
        blocks[label] = fit_arrays(site_fit(tree, label))
        if blocks[label].n != index[label].size:
            raise InputError(f"site {label!r}: the fit holds {blocks[label].n} values but the data {index[label].size}")
    sha = _source_sha256(tree)
    rows = obs["row"].values if "row" in obs.coords else _find(tree, "row")
    return SiteFitArrays(
        spec=spec, xy=_locations(tree, obs, name), value=value,
        z=np.log(value) if spec.transform == "log" else value, site=site, obs_name=name,
        obs_index=np.asarray(obs["obs"].values) if "obs" in obs.coords else np.arange(value.size),
        rows=np.arange(2, value.size + 2) if rows is None else np.asarray(rows, dtype=np.int64),
        source_sha256=sha, blocks=blocks, index=index,
    )


def any_fit_arrays(tree: xr.DataTree) -> FitArrays | SiteFitArrays:
    """:func:`site_fit_arrays` for a several-site fit, :func:`fit_arrays` otherwise."""
    return site_fit_arrays(tree) if is_site_fit(tree) else fit_arrays(tree)


def fit_arrays(tree: xr.DataTree) -> FitArrays:
    """Collect the settings, data and draws of a fit (see :class:`FitArrays`).

    Parameters
    ----------
    tree : xarray.DataTree
        A fit of :func:`bayesgeo.fitting.posterior.fit`: ``posterior`` with ``practical_range_z``,
        ``sd_z``, ``beta_z`` (and ``nugget_sd_z`` with a nugget), ``observed_data`` with
        ``value``, ``constant_data`` with ``x``, ``y`` (and ``design``), and the ``settings``
        JSON in the root attributes.

    Raises
    ------
    InputError
        When something a fit must hold is missing.
    """
    spec = fit_spec(tree)
    obs, name = _observed(tree)
    value = np.asarray(obs[name].values, dtype=float)
    xy = _locations(tree, obs, name)
    if "posterior" not in tree.children:
        raise InputError("not a bayesgeo fit: no posterior group")
    post = tree["posterior"].to_dataset()
    missing = [p for p in _PARAMS if p not in post]
    if spec.nugget and "nugget_sd_z" not in post:
        missing.append("nugget_sd_z")
    if missing:
        raise InputError(f"posterior lacks {', '.join(missing)}: not a bayesgeo single-site fit")
    if value.size != spec.n:
        raise InputError(f"the fit records {spec.n} observations but holds {value.size} values")
    z = np.log(value) if spec.transform == "log" else value
    design = _find(tree, "design")
    if design is None or np.asarray(design).shape != (spec.n, len(spec.terms)):
        covs = [np.asarray(_find(tree, c), dtype=float) for c in spec.covariates]
        if any(c is None for c in covs):
            raise InputError(f"the fit's trend uses covariates {', '.join(spec.covariates)} not stored with it")
        design = design_at(xy, spec.design_attrs, np.column_stack(covs) if covs else None)
    pr = post["practical_range_z"].transpose("chain", "draw")
    draws = {
        "practical_range_z": np.asarray(pr.values, dtype=float),
        "sd_z": np.asarray(post["sd_z"].transpose("chain", "draw").values, dtype=float),
        "nugget_sd_z": (np.asarray(post["nugget_sd_z"].transpose("chain", "draw").values, dtype=float)
                        if spec.nugget else np.zeros(pr.shape)),
        "beta_z": np.asarray(post["beta_z"].transpose("chain", "draw", ...).values, dtype=float),
    }
    censored = np.asarray(obs["censored"].values, dtype=bool) if "censored" in obs else np.zeros(value.size, bool)
    if censored.any():
        draws["censored_z"] = np.asarray(post["censored_z"].transpose("chain", "draw", ...).values, dtype=float)
    if "anisotropy_z" in post:
        draws["anisotropy_z"] = np.asarray(post["anisotropy_z"].transpose("chain", "draw", ...).values, dtype=float)
    sha = _source_sha256(tree)
    rows = obs["row"].values if "row" in obs.coords else _find(tree, "row")
    return FitArrays(
        spec=spec, xy=xy, value=value, z=z, y=(z - spec.value_mean) / spec.value_sd,
        design=np.asarray(design, dtype=float), draws=draws,
        chain=np.asarray(pr["chain"].values), draw=np.asarray(pr["draw"].values), obs_name=name,
        obs_index=np.asarray(obs["obs"].values) if "obs" in obs.coords else np.arange(value.size),
        rows=np.arange(2, value.size + 2) if rows is None else np.asarray(rows, dtype=np.int64),
        source_sha256=sha, censored=censored,
    )


def predictive_dataset(fa: FitArrays, mean: np.ndarray, var: np.ndarray, logp: np.ndarray, *,
                        method: str) -> xr.Dataset:
    """The :func:`loo_predictive` Dataset from (draws, n) moments and log densities on the standardised scale.

    The three arrays are converted in place (no copies: at large n they are the bulk of the memory).
    """
    nc, nd = fa.draws["sd_z"].shape
    s, m0 = fa.spec.value_sd, fa.spec.value_mean
    jac = -math.log(s) - (fa.z if fa.spec.transform == "log" else 0.0)
    mean *= s
    mean += m0
    np.sqrt(var, out=var)
    var *= s
    if fa.censored.any():  # a non-detect's term is a probability P(v_i < limit_i | rest): no Jacobian
        det = ~fa.censored
        logp[:, det] += jac if np.ndim(jac) == 0 else jac[det]
    else:
        logp += jac
    units = fa.spec.model_units
    dims = ("chain", "draw", "obs")
    shape = (nc, nd, fa.n)
    out = xr.Dataset(
        {
            "loo_mean": (dims, mean.reshape(shape), {"units": units, "long_name": "leave-one-out predictive mean"}),
            "loo_sd": (dims, var.reshape(shape), {"units": units, "long_name": "leave-one-out predictive sd"}),
            "log_lik": (dims, logp.reshape(shape),
                        {"long_name": "log p(v_i | v_-i) per draw, data units (Jacobian included)"}),
        },
        coords={"chain": fa.chain, "draw": fa.draw, "obs": fa.obs_index,
                "x": ("obs", fa.xy[:, 0]), "y": ("obs", fa.xy[:, 1]), "row": ("obs", fa.rows)},
        attrs={"method": method, "transform": fa.spec.transform or "none", "model_units": units},
    )
    return out
