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

A covariate of text labels (a category, :mod:`bayesgeo.data.categories`) is treatment coded instead:
one 0/1 column ``"<name>=<level>"`` per level other than its baseline, not centred or scaled, so its
coefficient is the difference of that level's mean from the baseline's in value units. Its levels and
baseline travel in ``attrs["categories"]`` (a JSON string ``{name: {"levels": [...], "baseline": ...}}``),
and :func:`design_matrix` refuses a level with too few points and a category collinear with the rest
of the design (one line naming the file and column).

Reference: the trend-surface model z(x) = f(x)^T beta + e(x) and its least-squares fit, e.g.
Cressie (1993), *Statistics for Spatial Data*, sec. 3.4.3.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence

import numpy as np
import xarray as xr

from bayesgeo.common.validate import InputError
from bayesgeo.data.categories import (check_levels, is_category, level_terms, levels_of, refuse_unknown,
                                      treatment_columns)

__all__ = ["MAX_ORDER", "trend_terms", "design_matrix", "design_at", "design_categories", "fit_trend"]

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


def trend_terms(order: int, covariates: Sequence[str] = (), categories: Mapping | None = None) -> list[str]:
    """Labels of the design columns for a trend of ``order`` plus ``covariates``; a covariate named in
    ``categories`` (name -> ``{"levels": [...], "baseline": ...}``) gives one label per level but the baseline."""
    cats = categories or {}
    terms = [_label(px, py) for px, py in _powers(_check_order(order))]
    for c in covariates:
        terms += level_terms(c, cats[c]["levels"], cats[c]["baseline"]) if c in cats else [c]
    return terms


def design_categories(attrs: Mapping) -> dict[str, dict]:
    """The categories of design attributes: name -> ``{"levels": [...], "baseline": ...}`` ({} for none)."""
    cats = attrs.get("categories") or {}
    return json.loads(cats) if isinstance(cats, str) else {str(k): dict(v) for k, v in cats.items()}


def _names(attrs: Mapping) -> list[str]:
    names = attrs.get("covariates") or []
    return [names] if isinstance(names, str) else [str(c) for c in names]  # a one-element list read back as str


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
        Data variables of ``ds`` added as linear terms; a category variable (text labels,
        :mod:`bayesgeo.data.categories`) as its treatment-coded indicator columns.

    Returns
    -------
    xarray.DataArray
        Dims ``(obs, term)``. Attributes: ``order``, ``covariates``, ``terms``, ``centre_x``,
        ``centre_y``, ``scale`` (coordinate units), ``covariate_centre`` and ``covariate_scale``
        (one per covariate; 0 and 1 for a category), and with categories ``categories`` (JSON:
        levels and baseline of each): everything :func:`design_at` needs.

    Raises
    ------
    InputError
        Order outside 0-3 (``--trend``), a covariate that is not a variable of ``ds``, a category with
        one level or a level with fewer than :data:`bayesgeo.data.categories.MIN_LEVEL_POINTS` points,
        or a category collinear with the rest of the design (naming the file and column).
    """
    order = _check_order(order)
    covariates = [str(c) for c in covariates]
    for c in covariates:
        if c not in ds.data_vars:
            have = [str(v) for v in ds.data_vars if v not in ("value", "residual", "trend")]
            raise InputError(f"covariates: {c!r} is not a column of the data (covariates read: {', '.join(have) or 'none'})")
    x = np.asarray(ds["x"].values, dtype=float)
    y = np.asarray(ds["y"].values, dtype=float)
    src, where = _where(ds)
    rows = ds["row"].values if "row" in ds.coords else None
    cats = {}
    for c in covariates:
        if is_category(ds[c]):
            levels, baseline = levels_of(ds[c])
            check_levels(ds[c].values, levels, c, src, rows=rows, where=where)
            cats[c] = {"levels": levels, "baseline": baseline}
    values = {c: ds[c].values if c in cats else np.asarray(ds[c].values, dtype=float) for c in covariates}
    attrs = {
        "order": order,
        "covariates": covariates,
        "terms": trend_terms(order, covariates, cats),
        "centre_x": float(np.mean(x)),
        "centre_y": float(np.mean(y)),
        "scale": max(_half_span(x), _half_span(y)) if (np.ptp(x) > 0 or np.ptp(y) > 0) else 1.0,
        "covariate_centre": [0.0 if c in cats else float(np.mean(values[c])) for c in covariates],
        "covariate_scale": [1.0 if c in cats else _half_span(values[c]) for c in covariates],
    }
    if cats:
        attrs["categories"] = json.dumps(cats)
    mat = design_at(np.column_stack([x, y]), attrs, values)
    if cats:
        _refuse_collinear(mat, attrs, cats, src, where)
    return xr.DataArray(
        mat, dims=("obs", "term"),
        coords={"term": attrs["terms"], **{k: ds.coords[k] for k in ("x", "y", "row", "site") if k in ds.coords}},
        name="design", attrs=attrs,
    )


def _where(ds: xr.Dataset) -> tuple[str, str]:
    """The data's file and, for one site of several, `` at site '<label>'`` (for messages)."""
    sites = np.unique(ds["site"].values) if "site" in ds.coords else []
    return str(ds.attrs.get("source") or "data"), (f" at site {str(sites[0])!r}" if len(sites) == 1 else "")


def _refuse_collinear(mat: np.ndarray, attrs: dict, cats: dict, src: str, where: str) -> None:
    """Name the first category whose indicator columns make the design rank-deficient (one line)."""
    terms = attrs["terms"]
    own = {c: [j for j, t in enumerate(terms) if t.startswith(f"{c}=") and t[len(c) + 1:] in cats[c]["levels"]]
           for c in cats}
    keep = [j for j in range(len(terms)) if not any(j in cols for cols in own.values())]
    if np.linalg.matrix_rank(mat[:, keep]) < len(keep):
        return  # the polynomial or a numeric covariate is at fault: the fitting stages say so
    for c, cols in own.items():
        keep += cols
        rank = int(np.linalg.matrix_rank(mat[:, keep]))
        if rank < len(keep):
            cols = ", ".join(terms[j] for j in keep)
            raise InputError(
                f"{src}: category column {c!r}{where} is collinear with the intercept, the polynomial trend terms "
                f"or another covariate (design rank {rank} of {len(keep)} columns: {cols}); the trend cannot tell "
                "their effects apart: drop the category or the covariate it repeats")


def design_at(xy: np.ndarray, attrs: Mapping, covariates: np.ndarray | Mapping | None = None) -> np.ndarray:
    """Rebuild the design columns of :func:`design_matrix` at locations ``xy``.

    Parameters
    ----------
    xy : ndarray, shape (m, 2)
        Locations in the coordinates of the data the design was made from.
    attrs : dict
        The attributes of a design matrix (or of ``coefficient`` from :func:`fit_trend`).
    covariates : ndarray, shape (m, n_covariates), or mapping, optional
        Covariate values at ``xy``, in the order of ``attrs["covariates"]`` (or name -> values);
        required when the trend has covariates. A category's values are its labels.

    Returns
    -------
    ndarray, shape (m, n_terms)
    """
    xy = np.asarray(xy, dtype=float)
    if xy.ndim != 2 or xy.shape[1] != 2:
        raise ValueError(f"xy must have shape (m, 2), got {xy.shape}")
    names = _names(attrs)
    cats = design_categories(attrs)
    cols = []
    if names:
        if covariates is None:
            raise InputError(f"the trend uses covariates {', '.join(names)}: give their values at the new locations")
        if isinstance(covariates, Mapping):
            missing = [c for c in names if c not in covariates]
            if missing:
                raise InputError(f"the trend uses covariates {', '.join(names)}: no values of {', '.join(missing)}")
            given = [np.asarray(covariates[c]).ravel() for c in names]
        else:
            arr = np.asarray(covariates).reshape(xy.shape[0], -1)
            if arr.shape[1] != len(names):
                raise InputError(f"the trend uses {len(names)} covariates ({', '.join(names)}), "
                                 f"got {arr.shape[1]} columns")
            given = [arr[:, j] for j in range(arr.shape[1])]
        centre = np.atleast_1d(np.asarray(attrs["covariate_centre"], dtype=float))
        scale = np.atleast_1d(np.asarray(attrs["covariate_scale"], dtype=float))
        for j, (c, v) in enumerate(zip(names, given)):
            if c in cats:
                refuse_unknown(v, cats[c]["levels"], c, "new locations")
                cols.append(treatment_columns(v, cats[c]["levels"], cats[c]["baseline"]))
            else:
                cols.append(((np.asarray(v, dtype=float) - centre[j]) / scale[j])[:, None])
    cov = np.column_stack(cols) if cols else np.empty((xy.shape[0], 0))
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
