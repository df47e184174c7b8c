"""Trend surfaces: polynomial design matrices in the coordinates and least-squares detrending.

A trend of order ``k`` (0-3) is a full polynomial of total degree ``k`` in the two coordinates,
optionally plus covariate columns. The polynomial is built on centred and scaled coordinates

    u = (x - x0) / s,    v = (y - y0) / s,

with ``(x0, y0)`` the coordinate means and ``s`` the largest half-span of x and y (one scale for
both axes, so a rotation of the survey does not change the fitted surface). Projected coordinates
of about 1e6 m would otherwise make ``x^3`` terms of 1e18 and a singular normal matrix. Covariates
are centred on their mean and scaled by their half-span the same way. The centre and scales go in
the attributes of the design matrix, and :func:`design_at` rebuilds the same columns at new
locations for the model and prediction stages.

Terms are labelled ``"1"``, ``"x"``, ``"y"``, ``"x^2"``, ``"x*y"``, ``"y^2"``, ``"x^3"``,
``"x^2*y"``, ``"x*y^2"``, ``"y^3"`` (in that order), then the covariate names. Coefficients refer
to the scaled columns.

Reference: the trend-surface model z(x) = f(x)^T beta + e(x) and its least-squares fit, e.g.
Cressie (1993), *Statistics for Spatial Data*, sec. 3.4.3.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import xarray as xr

from bayesgeo.common.validate import InputError

__all__ = ["MAX_ORDER", "trend_terms", "design_matrix", "design_at", "fit_trend"]

#: Highest polynomial order offered for a trend surface.
MAX_ORDER = 3


def _check_order(order) -> int:
    if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or not 0 <= order <= MAX_ORDER:
        raise InputError(f"trend: order {order!r} is not one of 0, 1, 2, 3 (0 = constant mean, 1 = plane, ...)")
    return int(order)


def _powers(order: int) -> list[tuple[int, int]]:
    """(power of x, power of y) for each polynomial term, by total degree then descending x power."""
    return [(i, k - i) for k in range(order + 1) for i in range(k, -1, -1)]


def _label(px: int, py: int) -> str:
    parts = [f"{n}^{p}" if p > 1 else n for n, p in (("x", px), ("y", py)) if p > 0]
    return "*".join(parts) if parts else "1"


def trend_terms(order: int, covariates: Sequence[str] = ()) -> list[str]:
    """Labels of the design columns for a trend of ``order`` plus ``covariates``."""
    return [_label(px, py) for px, py in _powers(_check_order(order))] + list(covariates)


def _half_span(v: np.ndarray) -> float:
    h = 0.5 * float(np.ptp(v)) if v.size else 0.0
    return h if h > 0.0 else 1.0


def _columns(u: np.ndarray, v: np.ndarray, order: int, cov_scaled: np.ndarray) -> np.ndarray:
    cols = [u**px * v**py for px, py in _powers(order)]
    cols += [cov_scaled[:, j] for j in range(cov_scaled.shape[1])]
    return np.column_stack(cols) if cols else np.empty((u.size, 0))


def design_matrix(ds: xr.Dataset, order: int = 0, covariates: Sequence[str] = ()) -> xr.DataArray:
    """Trend-surface design matrix of the points in ``ds``.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data along ``obs`` with coordinates ``x``, ``y`` (see :func:`bayesgeo.read_points`).
    order : int
        Total polynomial degree in the coordinates, 0 (constant mean) to 3.
    covariates : sequence of str
        Data variables of ``ds`` added as linear terms.

    Returns
    -------
    xarray.DataArray
        Dims ``(obs, term)``. Attributes: ``order``, ``covariates``, ``terms``, ``centre_x``,
        ``centre_y``, ``scale`` (coordinate units), ``covariate_centre`` and ``covariate_scale``
        (one per covariate): everything :func:`design_at` needs.

    Raises
    ------
    InputError
        Order outside 0-3 (``--trend``) or a covariate that is not a variable of ``ds``.
    """
    order = _check_order(order)
    covariates = [str(c) for c in covariates]
    for c in covariates:
        if c not in ds.data_vars:
            have = [str(v) for v in ds.data_vars if v not in ("value", "residual", "trend")]
            raise InputError(f"covariates: {c!r} is not a column of the data (covariates read: {', '.join(have) or 'none'})")
    x = np.asarray(ds["x"].values, dtype=float)
    y = np.asarray(ds["y"].values, dtype=float)
    cov = np.column_stack([np.asarray(ds[c].values, dtype=float) for c in covariates]) if covariates else np.empty((x.size, 0))
    attrs = {
        "order": order,
        "covariates": covariates,
        "terms": trend_terms(order, covariates),
        "centre_x": float(np.mean(x)),
        "centre_y": float(np.mean(y)),
        "scale": max(_half_span(x), _half_span(y)) if (np.ptp(x) > 0 or np.ptp(y) > 0) else 1.0,
        "covariate_centre": [float(np.mean(cov[:, j])) for j in range(cov.shape[1])],
        "covariate_scale": [_half_span(cov[:, j]) for j in range(cov.shape[1])],
    }
    mat = design_at(np.column_stack([x, y]), attrs, cov)
    return xr.DataArray(
        mat, dims=("obs", "term"),
        coords={"term": attrs["terms"], **{k: ds.coords[k] for k in ("x", "y", "row", "site") if k in ds.coords}},
        name="design", attrs=attrs,
    )


def design_at(xy: np.ndarray, attrs: dict, covariates: np.ndarray | None = None) -> np.ndarray:
    """Rebuild the design columns of :func:`design_matrix` at locations ``xy``.

    Parameters
    ----------
    xy : ndarray, shape (m, 2)
        Locations in the coordinates of the data the design was made from.
    attrs : dict
        The attributes of a design matrix (or of ``coefficient`` from :func:`fit_trend`).
    covariates : ndarray, shape (m, n_covariates), optional
        Covariate values at ``xy``, in the order of ``attrs["covariates"]``; required when the
        trend has covariates.

    Returns
    -------
    ndarray, shape (m, n_terms)
    """
    xy = np.asarray(xy, dtype=float)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise ValueError(f"xy must have shape (m, 2), got {xy.shape}")
    names = list(attrs.get("covariates", []))
    if isinstance(attrs.get("covariates"), str):  # a one-element list read back from NetCDF
        names = [attrs["covariates"]]
    if names:
        if covariates is None:
            raise InputError(f"the trend uses covariates {', '.join(names)}: give their values at the new locations")
        cov = np.asarray(covariates, dtype=float).reshape(xy.shape[0], -1)
        if cov.shape[1] != len(names):
            raise InputError(f"the trend uses {len(names)} covariates ({', '.join(names)}), got {cov.shape[1]} columns")
        centre = np.atleast_1d(np.asarray(attrs["covariate_centre"], dtype=float))
        scale = np.atleast_1d(np.asarray(attrs["covariate_scale"], dtype=float))
        cov = (cov - centre) / scale
    else:
        cov = np.empty((xy.shape[0], 0))
    s = float(attrs["scale"])
    u = (xy[:, 0] - float(attrs["centre_x"])) / s
    v = (xy[:, 1] - float(attrs["centre_y"])) / s
    return _columns(u, v, int(attrs["order"]), cov)


def fit_trend(ds: xr.Dataset, order: int = 0, covariates: Sequence[str] = ()) -> xr.Dataset:
    """Ordinary least-squares trend surface of ``ds["value"]``.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data along ``obs`` (see :func:`bayesgeo.read_points`).
    order : int
        Polynomial order 0-3 in the coordinates (see the module docstring for the terms).
    covariates : sequence of str
        Data variables of ``ds`` added as linear terms.

    Returns
    -------
    xarray.Dataset
        A copy of ``ds`` with ``trend`` and ``residual`` (along ``obs``, value units) and
        ``coefficient`` (along ``term``, for the scaled columns). ``coefficient.attrs`` (and
        ``trend.attrs``) hold the design attributes plus ``r_squared``, so
        ``design_at(xy, out["coefficient"].attrs) @ out["coefficient"].values`` evaluates the
        trend at new locations. ``out.attrs`` gains ``trend_order``, ``trend_covariates`` and
        ``trend_r_squared``. R^2 = 1 - RSS / TSS (0 for order 0 without covariates).

    Raises
    ------
    InputError
        Order outside 0-3, fewer points than terms, or a design that the locations cannot pin
        down (for example a plane through points on one straight line), naming ``--trend``.
    """
    design = design_matrix(ds, order, covariates)
    mat = design.values
    n, p = mat.shape
    if n < p:
        raise InputError(
            f"trend: order {design.attrs['order']} with {len(design.attrs['covariates'])} covariates has {p} terms "
            f"but there are only {n} points; use a lower order or more points"
        )
    z = np.asarray(ds["value"].values, dtype=float)
    coef, _, rank, _ = np.linalg.lstsq(mat, z, rcond=None)
    if rank < p:
        raise InputError(
            f"trend: the {p} trend terms ({', '.join(design.attrs['terms'])}) are not all identifiable from these "
            f"locations and covariates (rank {rank}); use a lower order or drop a covariate"
        )
    fitted = mat @ coef
    resid = z - fitted
    tss = float(np.sum((z - z.mean()) ** 2))
    r2 = 1.0 - float(np.sum(resid**2)) / tss if tss > 0 else 0.0
    if design.attrs["order"] == 0 and not design.attrs["covariates"]:
        r2 = 0.0
    attrs = {**design.attrs, "r_squared": r2, "method": "ordinary least squares"}
    units = ds["value"].attrs.get("units", ds.attrs.get("value_units", ""))
    out = ds.copy()
    out["trend"] = ("obs", fitted, {**attrs, "units": units, "long_name": "fitted trend surface"})
    out["residual"] = ("obs", resid, {"units": units, "long_name": "value minus fitted trend"})
    out["coefficient"] = xr.DataArray(coef, dims=("term",), coords={"term": design.attrs["terms"]}, attrs=attrs)
    out.attrs["trend_order"] = design.attrs["order"]
    out.attrs["trend_covariates"] = list(design.attrs["covariates"])
    out.attrs["trend_r_squared"] = r2
    return out
