"""Exact Gaussian-process leave-one-out predictive densities, per posterior draw.

For one draw of the parameters, the marginal model of the standardised values is
``y ~ N(mu, C)`` with ``mu = F beta`` and ``C = sigma^2 R + (tau^2 + jitter) I``
(:func:`bayesgeo.gp.dense.covariance_matrix`). Leaving point ``i`` out and conditioning the
Gaussian on the other ``n - 1`` points gives a normal predictive whose mean and variance follow
from the inverse of ``C`` alone, with no refit (Sundararajan and Keerthi 2001, Neural
Computation 13, 1103-1118; Rasmussen and Williams 2006, *Gaussian Processes for Machine
Learning*, sec. 5.4.2, eq. 5.12)::

    g = C^-1 (y - mu),   c_i = [C^-1]_ii,
    mu_-i  = y_i - g_i / c_i,      var_-i = 1 / c_i,
    log p(y_i | y_-i) = -0.5 log(2 pi) + 0.5 log c_i - 0.5 g_i^2 / c_i.

Each draw costs one Cholesky factorisation ``C = L L^T`` and the inverse of the triangular
factor (LAPACK ``dpotrf`` and ``dtrtri``), about 2 n^3 / 3 flops: ``[C^-1]_ii`` is the sum of
squares of column ``i`` of ``L^-1``.

Units. The densities are reported for the *data* as measured, so that fits of the same data
with different transforms and standardisations are comparable: with ``z = m + s y`` the modelled
values and ``v`` the measured ones (``z = log v`` under ``transform="log"``),

    log p(z_i | z_-i) = log p(y_i | y_-i) - log s,
    log p(v_i | v_-i) = log p(z_i | z_-i) - log v_i        (transform = "log").

These conditional densities, one per draw and point, are what PSIS-LOO needs for a Gaussian
model whose likelihood does not factorise over points (Bürkner, Gabry and Vehtari 2021,
Computational Statistics 36, 1243-1261): importance weights ``1 / p(y_i | y_-i, theta_s)``
turn draws from the full posterior into draws from the leave-one-out posterior.
:func:`add_log_likelihood` stores them as the ``log_likelihood`` group so that ``arviz.loo``
runs on the fit.

Several sites (:mod:`bayesgeo.fitting.hierarchical`). Given the parameters, sites are independent: the
covariance matrix of all points is block diagonal with one block per site, so ``C^-1`` is block
diagonal too and the formula above, applied to the whole vector, gives for point ``i`` of site
``s`` exactly the leave-one-out predictive of that site's block: only the site's own points
inform it. Each site is therefore computed as a single-site fit with that site's draws
(:func:`bayesgeo.fitting.hierarchical.site_fit`) and the results are put back in data order.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from bayesgeo.fitting.arrays import FitArrays, SiteFitArrays, any_fit_arrays
from bayesgeo.fitting.arrays import predictive_dataset as _predictive_dataset
from bayesgeo.gp.engines import engine

__all__ = ["loo_predictive", "pointwise_loo_loglik", "add_log_likelihood"]


# --- public functions on fits -------------------------------------------------------------------


def loo_predictive(tree: xr.DataTree | None, *, arrays: FitArrays | SiteFitArrays | None = None,
                   neighbours: int | None = None, progress=None) -> xr.Dataset:
    """Exact leave-one-out predictive of every point for every posterior draw.

    Computed by the fit's likelihood engine (:mod:`bayesgeo.gp.engines`): exact for a dense fit; for a
    nearest-neighbour fit (for a several-site fit, each site block with ``site_approx`` "nn") each
    point conditioned on its nearest other points (:mod:`bayesgeo.gp.nn_loo`): no n x n matrix,
    O(S n m^3).

    Parameters
    ----------
    tree : xarray.DataTree
        A single-site fit (see :func:`fit_arrays`) or a several-site fit (each point's
        predictive then uses its own site's points only; module docstring).
    arrays : FitArrays or SiteFitArrays, optional
        ``any_fit_arrays(tree)`` when already at hand (``tree`` is then not read).
    neighbours : int, optional
        Conditioning points of the nearest-neighbour leave-one-out (default
        :func:`bayesgeo.gp.nn_loo.loo_neighbour_count`); ignored by the exact one.
    progress : callable, optional
        ``progress(total=..., desc=...)`` returning a bar with ``update(int)`` used as a context
        manager (such as :func:`bayesgeo.cli._common.progress` with ``enabled`` bound); used for
        the nearest-neighbour leave-one-out, counting points.

    Returns
    -------
    xarray.Dataset
        Dims ``(chain, draw, obs)``: ``loo_mean`` and ``loo_sd`` of the normal predictive of the
        modelled value ``z_i`` given the others (model units: log units under
        ``transform="log"``), and ``log_lik``, ``log p(v_i | v_-i)`` in data units (module
        docstring). Coordinates ``x``, ``y``, ``row`` (and ``site`` for a several-site fit) along
        ``obs``.
    """
    fa = any_fit_arrays(tree) if arrays is None else arrays
    if isinstance(fa, SiteFitArrays):
        return _site_loo_predictive(fa, neighbours=neighbours, progress=progress)
    res = engine(fa.spec.approx).loo(fa, neighbours=neighbours, progress=progress)
    out = _predictive_dataset(fa, res.mean, res.var, res.logp, method=res.method)
    out.attrs.update(res.attrs)
    return out


def pointwise_loo_loglik(tree: xr.DataTree, *, predictive: xr.Dataset | None = None) -> xr.DataArray:
    """``log p(v_i | v_-i, theta_s)`` for every draw ``s`` and point ``i``, in data units.

    Parameters
    ----------
    tree : xarray.DataTree
        A single-site or several-site fit.
    predictive : xarray.Dataset, optional
        :func:`loo_predictive` of ``tree`` when already computed (its ``log_lik`` is used).

    Returns
    -------
    xarray.DataArray
        Dims ``(chain, draw, obs)``, named after the observed-value variable of the fit. The
        log-Jacobian of the standardisation (and of the log transform) is included, so values of
        fits of the same data are comparable whatever their transform.
    """
    fa = any_fit_arrays(tree)
    pred = loo_predictive(tree, arrays=fa) if predictive is None else predictive
    da = pred["log_lik"].drop_vars([c for c in ("x", "y", "row", "site") if c in pred.coords])
    da.name = fa.obs_name
    da.attrs["units"] = "log density of the measured value (data units)"
    return da


def add_log_likelihood(tree: xr.DataTree, *, predictive: xr.Dataset | None = None) -> xr.DataTree:
    """A copy of ``tree`` with a ``log_likelihood`` group of exact leave-one-out densities.

    Parameters
    ----------
    tree : xarray.DataTree
        A single-site or several-site fit; it is not modified.
    predictive : xarray.Dataset, optional
        :func:`loo_predictive` of ``tree`` when already computed.

    Returns
    -------
    xarray.DataTree
        The same fit plus ``log_likelihood`` holding :func:`pointwise_loo_loglik` (one variable,
        named after the observed value), so ``arviz.loo(out)`` gives PSIS-LOO in data units.
        An existing ``log_likelihood`` group is replaced.
    """
    pred = loo_predictive(tree) if predictive is None else predictive
    ll = pointwise_loo_loglik(tree, predictive=pred)
    ds = ll.to_dataset()
    ds.attrs.update({
        "method": f"leave-one-out conditional per draw (Buerkner, Gabry and Vehtari 2021): {pred.attrs['method']}",
        "scale": "data units (log-Jacobian of standardisation and transform included)",
    })
    out = tree.copy()
    out["log_likelihood"] = xr.DataTree(ds)
    return out


def _site_loo_predictive(sfa: SiteFitArrays, *, neighbours=None, progress=None) -> xr.Dataset:
    """:func:`loo_predictive` of every site block, put back along ``obs`` in data order."""
    parts = {label: loo_predictive(None, arrays=fa, neighbours=neighbours, progress=progress)
             for label, fa in sfa.blocks.items()}
    methods = list(dict.fromkeys(p.attrs["method"].split(":")[0] for p in parts.values()))
    nn_sites = [s for s in sfa.sites if "caution" in parts[s].attrs]  # nearest-neighbour blocks
    extra = {"caution": f"sites {', '.join(nn_sites)}: {parts[nn_sites[0]].attrs['caution']}"} if nn_sites else {}
    first = next(iter(parts.values()))
    shape = (first.sizes["chain"], first.sizes["draw"], sfa.n)
    data = {k: np.full(shape, np.nan) for k in ("loo_mean", "loo_sd", "log_lik")}
    for label, part in parts.items():
        for k in data:
            data[k][..., sfa.index[label]] = part[k].transpose("chain", "draw", "obs").values
    dims = ("chain", "draw", "obs")
    out = xr.Dataset(
        {k: (dims, v, dict(first[k].attrs)) for k, v in data.items()},
        coords={"chain": first["chain"].values, "draw": first["draw"].values, "obs": sfa.obs_index,
                "x": ("obs", sfa.xy[:, 0]), "y": ("obs", sfa.xy[:, 1]), "row": ("obs", sfa.rows),
                "site": ("obs", sfa.site)},
        attrs={**{k: v for k, v in first.attrs.items() if k not in ("loo_neighbours", "caution")}, **extra,
               "method": "; ".join(methods) + "; one block per site (sites independent given "
               "the parameters), each point conditioned on its own site's points only",
               "site_method": [parts[s].attrs["method"] for s in sfa.sites],
               "pooling": sfa.spec.pooling},
    )
    return out
