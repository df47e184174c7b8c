"""Sampling design aid: predictive standard deviation at the centre of a square sampling grid.

For a square grid of spacing ``h`` the point farthest from the samples is the centre of a grid
cell. Prediction there uses the ``k x k`` grid nodes nearest to it (``k = 6`` by default: nodes
at offsets ``(i - (k - 1) / 2) h``, ``i = 0..k-1``, in x and y). For covariance parameters
``(phi, sigma2, tau2)`` with the nugget as measurement error (independent noise on each sample),
data covariance ``C = sigma2 R + tau2 I`` and cross-covariance ``c0 = sigma2 rho(d0 / phi)``:

    simple kriging variance     v_SK = c00 - c0^T C^-1 c0
    ordinary kriging variance   v_OK = v_SK + (1 - 1^T C^-1 c0)^2 / (1^T C^-1 1)

with ``c00 = sigma2`` for the underlying field (the value a map shows) and
``c00 = sigma2 + tau2`` for a new measurement at that point (the field plus a fresh nugget).
Ordinary kriging (constant but unknown local mean) is the default: a new site's mean is unknown.

Averaged over draws of the new-site predictive distribution of a several-site fit
(:func:`bayesgeo.fitting.hierarchical.fit_sites`, group ``new_site``), the sd as a function of ``h`` lets
a planner choose a spacing before any sample is taken at the new site. Limits used by the tests
(normal theory, common practice): without nugget the variance at a data node is 0; as ``h`` grows
``v_SK`` tends to the total sill and ``v_OK`` to the total sill times ``1 + 1/k^2``; as ``h``
shrinks a new measurement's ``v_OK`` tends to ``tau2 (1 + 1/k^2)``.

References
----------
Cressie (1993), *Statistics for Spatial Data*, sec. 3.2 (ordinary kriging) and 3.4.5 (simple
kriging); Webster and Oliver (2007), *Geostatistics for Environmental Scientists*, 2nd ed.,
ch. 8 (using the kriging variance to plan sampling on a grid).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.common.validate import InputError, check_choice

__all__ = ["KINDS", "grid_nodes", "kriging_variance", "design_table", "plot_design"]

#: Kriging variants offered.
KINDS = ("ordinary", "simple")

_CAUTION = ("Planning aid only: the predicted sd assumes the new site is like the fitted ones and a stationary "
            "field; local regulation and professional judgement decide the sampling design.")


def grid_nodes(spacing: float, k: int = 6) -> np.ndarray:
    """The ``k x k`` nodes of a square grid of ``spacing`` nearest to the centre of its central cell,
    with that centre at the origin (``k`` even). Returns an array of shape (k*k, 2)."""
    if k < 2 or k % 2:
        raise InputError(f"neighbours: expected an even number >= 2 of grid nodes per side, got {k!r}")
    o = (np.arange(k) - (k - 1) / 2.0) * float(spacing)
    gx, gy = np.meshgrid(o, o)
    return np.column_stack([gx.ravel(), gy.ravel()])


def kriging_variance(nodes, target, *, covariance: str = "matern32", nu: float | None = None, scale,
                     partial_sill, nugget, kind: str = "ordinary", measurement: bool = False) -> np.ndarray:
    """Kriging variance at ``target`` from data at ``nodes``, for one or many parameter sets.

    Parameters
    ----------
    nodes : array_like, shape (k, 2)
        Data locations (distance units).
    target : array_like, shape (2,)
        Prediction location.
    covariance, nu : str, float
        Covariance family (:func:`bayesgeo.gp.covariance.get_covariance`).
    scale, partial_sill, nugget : float or array_like (m,)
        phi (distance units), sigma2 and tau2 (squared value units), broadcast together.
    kind : {"ordinary", "simple"}
        Unknown constant mean (ordinary) or known mean (simple).
    measurement : bool
        Variance of a new measurement (field plus nugget) instead of the field itself.

    Returns
    -------
    ndarray (m,)
        Kriging variances (squared value units), clipped at 0 against round-off.
    """
    check_choice(kind, KINDS, "kind")
    cov = get_covariance(covariance, nu)
    nodes = np.asarray(nodes, dtype=float)
    target = np.asarray(target, dtype=float).reshape(1, 2)
    phi, s2, t2 = np.broadcast_arrays(*(np.atleast_1d(np.asarray(v, dtype=float)) for v in (scale, partial_sill, nugget)))
    dd = np.hypot(nodes[:, None, 0] - nodes[None, :, 0], nodes[:, None, 1] - nodes[None, :, 1])
    d0 = np.hypot(nodes[:, 0] - target[0, 0], nodes[:, 1] - target[0, 1])
    k = nodes.shape[0]
    u = phi[:, None, None]
    big = s2[:, None, None] * cov._rho(dd[None] / u)
    big[:, np.arange(k), np.arange(k)] += (t2 + 1e-10 * s2)[:, None]
    c0 = s2[:, None] * cov._rho(d0[None] / phi[:, None])
    rhs = np.concatenate([c0[..., None], np.ones((len(phi), k, 1))], axis=2)
    sol = np.linalg.solve(big, rhs)
    c00 = s2 + (t2 if measurement else 0.0)
    var = c00 - np.einsum("mk,mk->m", c0, sol[..., 0])
    if kind == "ordinary":
        one_c = sol[..., 0].sum(axis=1)
        one_one = sol[..., 1].sum(axis=1)
        var = var + (1.0 - one_c) ** 2 / one_one
    return np.maximum(var, 0.0)


def design_table(new_site: xr.Dataset, *, covariance: str = "matern32", nu: float | None = None,
                 spacings=None, neighbours: int = 6, kind: str = "ordinary", max_draws: int = 400,
                 distance_units: str = "", value_units: str = "") -> xr.Dataset:
    """Predictive sd at the centre of a grid cell against grid spacing, over new-site draws.

    Parameters
    ----------
    new_site : xarray.Dataset
        Draws (dims ``chain``, ``draw``) of ``scale``, ``partial_sill`` and ``nugget`` (data
        units): the ``new_site`` group of a several-site fit.
    covariance, nu :
        The covariance family of that fit.
    spacings : array_like, optional
        Grid spacings (distance units). Default: 16 spacings from 0.05 to 2 times the median
        new-site practical range, evenly on a log scale.
    neighbours : int
        Grid nodes per side used for the prediction (``k``; ``k^2`` nodes).
    kind : {"ordinary", "simple"}
        Kriging variant.
    max_draws : int
        Draws used (evenly thinned) to average over.

    Returns
    -------
    xarray.Dataset
        Along ``spacing``: ``sd_mean`` (mean over draws of the field's kriging sd), ``sd_q05``,
        ``sd_q50``, ``sd_q95``, ``measurement_sd_mean`` (a new measurement: field plus nugget),
        ``relative_sd`` (``sd_mean`` over the square root of the mean total sill) and
        ``density`` (grid points per unit area, ``1 / h^2``). Attributes record the settings and
        a caution.
    """
    check_choice(kind, KINDS, "kind")
    for v in ("scale", "partial_sill", "nugget"):
        if v not in new_site:
            raise InputError(f"design: the new-site draws lack {v!r} (need scale, partial_sill, nugget)")
    flat = {v: np.asarray(new_site[v].values, dtype=float).ravel() for v in ("scale", "partial_sill", "nugget")}
    m = flat["scale"].size
    take = np.unique(np.linspace(0, m - 1, min(int(max_draws), m)).round().astype(int))
    phi, s2, t2 = (flat[v][take] for v in ("scale", "partial_sill", "nugget"))
    cov = get_covariance(covariance, nu)
    if spacings is None:
        med_range = float(np.median(cov.practical_range(phi)))
        spacings = med_range * np.geomspace(0.05, 2.0, 16)
    spacings = np.asarray(spacings, dtype=float)
    if spacings.ndim != 1 or spacings.size == 0 or np.any(~(spacings > 0)):
        raise InputError("design: spacings must be a non-empty list of positive distances")
    rows = {k: [] for k in ("sd_mean", "sd_q05", "sd_q50", "sd_q95", "measurement_sd_mean", "measurement_sd_q50")}
    for h in spacings:
        nodes = grid_nodes(h, neighbours)
        common = dict(covariance=cov.name, nu=cov.nu if cov.name == "matern" else None, scale=phi,
                      partial_sill=s2, nugget=t2, kind=kind)
        sd = np.sqrt(kriging_variance(nodes, (0.0, 0.0), **common))
        msd = np.sqrt(kriging_variance(nodes, (0.0, 0.0), measurement=True, **common))
        q = np.quantile(sd, [0.05, 0.5, 0.95])
        for key, val in zip(rows, (sd.mean(), q[0], q[1], q[2], msd.mean(), np.median(msd))):
            rows[key].append(float(val))
    total_sd = float(np.sqrt(np.mean(s2 + t2)))
    sq = f"({distance_units})^2" if distance_units else "distance units^2"
    out = xr.Dataset({k: ("spacing", np.asarray(v), {"units": value_units}) for k, v in rows.items()},
                     coords={"spacing": ("spacing", spacings, {"units": distance_units})})
    out["relative_sd"] = ("spacing", out["sd_mean"].values / total_sd, {"units": "1"})
    out["density"] = ("spacing", 1.0 / spacings**2, {"units": f"points per {sq}"})
    out.attrs = {"kind": kind, "neighbours": int(neighbours), "draws": int(take.size), "covariance": cov.name,
                 "total_sill_mean": float(np.mean(s2 + t2)), "nugget_mean": float(np.mean(t2)),
                 "what": "kriging sd at the centre of a square grid cell, averaged over new-site predictive draws",
                 "caution": _CAUTION}
    return out


def plot_design(table: xr.Dataset, *, title: str | None = None):
    """Curve of :func:`design_table`: sd against spacing (field: mean and 5-95% band; new
    measurement: dashed), with the square root of the mean total sill and nugget as reference lines.
    Returns the matplotlib Figure."""
    import matplotlib.pyplot as plt

    h = table["spacing"].values
    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    ax.fill_between(h, table["sd_q05"], table["sd_q95"], color="#9fc5e8", alpha=0.5, label="field sd, 5-95% of draws")
    ax.plot(h, table["sd_mean"], color="#1f4e79", lw=2, label="field sd, mean")
    ax.plot(h, table["measurement_sd_mean"], color="#7f6000", lw=1.5, ls="--", label="new measurement sd, mean")
    ax.axhline(np.sqrt(table.attrs["total_sill_mean"]), color="#555555", lw=0.8, ls=":",
               label="sqrt(total sill)")
    if table.attrs.get("nugget_mean", 0) > 0:
        ax.axhline(np.sqrt(table.attrs["nugget_mean"]), color="#999999", lw=0.8, ls="-.", label="sqrt(nugget)")
    units = table["spacing"].attrs.get("units", "")
    ax.set_xlabel(f"grid spacing ({units})" if units else "grid spacing")
    vu = table["sd_mean"].attrs.get("units", "")
    ax.set_ylabel(f"predictive sd at cell centre ({vu})" if vu else "predictive sd at cell centre")
    ax.set_xscale("log")
    ax.set_ylim(bottom=0)
    ax.grid(alpha=0.3)
    ax.legend(frameon=False, fontsize=8)
    ax.set_title(title or f"Sampling design: {table.attrs['kind']} kriging, {table.attrs['neighbours']}x"
                          f"{table.attrs['neighbours']} nearest grid nodes")
    fig.text(0.01, 0.005, _CAUTION, fontsize=6, color="#555555", wrap=True)
    fig.tight_layout(rect=(0, 0.04, 1, 1))
    return fig
