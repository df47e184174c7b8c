"""Exploratory figures: empirical semivariogram with its envelope and fitted curves, correlogram,
directional semivariograms.

Each function takes the xarray outputs of :mod:`bayesgeo.explore.variogram` (and :mod:`bayesgeo.explore.quickfit`)
and returns a :class:`matplotlib.figure.Figure` built without pyplot, so nothing depends on a
display or on global figure state; save it with ``fig.savefig(path)``. Styling is deliberately
plain: grey permutation bands, dark markers, one line style per family.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from bayesgeo.gp.covariance import get_covariance

__all__ = ["semivariogram_figure", "correlogram_figure", "directional_figure", "non_detect_map", "save_figure"]

#: Line colours of fitted families and directions (muted, readable in grey-scale print too).
PALETTE = ("#1b3a5c", "#8c3b2e", "#3d6b35", "#6a4c7d", "#a07a1f", "#2f6f73", "#555555")
_STYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1)), (0, (3, 1, 1, 1, 1, 1)))
_BAND = "#d9d9d9"
_POINT = "#222222"


def _figure(figsize=(6.4, 4.4)):
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, layout="constrained")
    return fig, fig.subplots()


def _units(text: str, fallback: str) -> str:
    return f" ({text})" if text else f" ({fallback})"


def _lag_label(ds: xr.Dataset) -> str:
    return "lag distance" + _units(ds.attrs.get("distance_units", ""), "distance units")


def _squared(units: str) -> str:
    return f"({units})²" if units else "squared value units"


def _sizes(pairs: np.ndarray) -> np.ndarray:
    """Marker areas (pt^2) growing with the square root of the pair count, 12 to 120."""
    p = np.sqrt(np.maximum(np.nan_to_num(pairs, nan=0.0), 0.0))
    top = p.max() if p.size and p.max() > 0 else 1.0
    return 12.0 + 108.0 * p / top


def _envelope(ax, lag, ds: xr.Dataset, label: str) -> None:
    """Grey band between the permutation quantiles (the lag-0 bin of a correlogram left out)."""
    if "envelope_low" in ds and "envelope_high" in ds:
        lo, hi = ds["envelope_low"].values, ds["envelope_high"].values
        ok = np.isfinite(lo) & np.isfinite(hi) & np.isfinite(lag) & (lag > 0)
        if ok.any():
            n = ds.attrs.get("permutations", "")
            ax.fill_between(lag[ok], lo[ok], hi[ok], color=_BAND, linewidth=0, zorder=0,
                            label=f"{label} ({n} permutations)" if n else label)


def semivariogram_figure(vg: xr.Dataset, fits: xr.Dataset | None = None, *, method: str = "wls",
                         title: str | None = None):
    """Empirical semivariogram, permutation envelope and fitted model curves.

    Parameters
    ----------
    vg : xarray.Dataset
        Output of :func:`bayesgeo.explore.variogram.semivariogram` (``lag``, ``semivariance``, ``pairs``,
        optionally ``envelope_low``/``envelope_high``).
    fits : xarray.Dataset, optional
        Output of :func:`bayesgeo.explore.quickfit.quick_fits`; the curves of ``method`` are drawn.
    method : {"wls", "ml"}
        Which fitted curves to draw.
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
        Points have areas growing with the square root of their pair count; the grey band is
        the range of semivariances under random permutation of the values (no spatial
        dependence).
    """
    fig, ax = _figure()
    lag = np.asarray(vg["lag"].values, dtype=float)
    gam = np.asarray(vg["semivariance"].values, dtype=float)
    _envelope(ax, lag, vg, "envelope under no spatial dependence")
    ok = np.isfinite(lag) & np.isfinite(gam)
    ax.scatter(lag[ok], gam[ok], s=_sizes(np.asarray(vg["pairs"].values, dtype=float))[ok], color=_POINT,
               zorder=3, label="empirical (area ~ √pairs)")
    top = float(np.nanmax(lag)) if ok.any() else 1.0
    if fits is not None:
        h = np.linspace(top / 400.0, top * 1.02, 400)
        sel = fits.sel({"method": method})
        for k, fam in enumerate(sel["family"].values):
            row = sel.sel(family=fam)
            scale, psill, tau = (float(row[v]) for v in ("scale", "partial_sill", "nugget"))
            if not all(np.isfinite([scale, psill, tau])) or scale <= 0:
                continue
            cov = get_covariance(str(fam))
            ax.plot(h, cov.semivariance(h, scale, psill, tau), color=PALETTE[k % len(PALETTE)],
                    linestyle=_STYLES[k % len(_STYLES)], linewidth=1.4, zorder=2,
                    label=f"{cov.label} ({method.upper()})")
    ax.set_xlim(0.0, top * 1.05)
    ax.set_ylim(bottom=0.0)
    ax.set_xlabel(_lag_label(vg))
    ax.set_ylabel("semivariance " + f"[{_squared(vg.attrs.get('value_units', ''))}]")
    est = vg.attrs.get("estimator", "")
    ax.set_title(title or f"Semivariogram{f' ({est})' if est else ''}", fontsize=11)
    ax.grid(True, color="#eeeeee", linewidth=0.6)
    ax.legend(fontsize=8, frameon=False)
    return fig


def correlogram_figure(cg: xr.Dataset, *, title: str | None = None):
    """Empirical correlogram with its permutation envelope.

    Parameters
    ----------
    cg : xarray.Dataset
        Output of :func:`bayesgeo.explore.variogram.correlogram` (``lag``, ``correlation``, ``pairs``,
        optionally ``envelope_low``/``envelope_high``).
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, ax = _figure()
    lag = np.asarray(cg["lag"].values, dtype=float)
    r = np.asarray(cg["correlation"].values, dtype=float)
    _envelope(ax, lag, cg, "envelope under no spatial dependence")
    ax.axhline(0.0, color="#888888", linewidth=0.8)
    ok = np.isfinite(lag) & np.isfinite(r)
    pairs = np.asarray(cg["pairs"].values, dtype=float) if "pairs" in cg else np.ones_like(lag)
    ax.plot(lag[ok], r[ok], color=_POINT, linewidth=0.8, zorder=2)
    ax.scatter(lag[ok], r[ok], s=_sizes(pairs)[ok], color=_POINT, zorder=3, label="empirical (area ~ √pairs)")
    ax.set_ylim(-1.05, 1.05)
    ax.set_xlim(left=0.0)
    ax.set_xlabel(_lag_label(cg))
    ax.set_ylabel("correlation (dimensionless)")
    ax.set_title(title or "Correlogram", fontsize=11)
    ax.grid(True, color="#eeeeee", linewidth=0.6)
    ax.legend(fontsize=8, frameon=False)
    return fig


def directional_figure(dvg: xr.Dataset, *, title: str | None = None):
    """Semivariograms along several directions on one set of axes.

    Parameters
    ----------
    dvg : xarray.Dataset
        Output of :func:`bayesgeo.explore.variogram.directional_semivariograms` (dimension ``azimuth`` in
        degrees clockwise from north, plus ``bin``).
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
        Similar curves suggest isotropy; a curve rising more slowly marks the direction of
        longer correlation.
    """
    fig, ax = _figure()
    tol = dvg.attrs.get("tolerance", "")
    for k, az in enumerate(np.atleast_1d(dvg["azimuth"].values)):
        part = dvg.sel(azimuth=az)
        lag = np.asarray(part["lag"].values, dtype=float)
        gam = np.asarray(part["semivariance"].values, dtype=float)
        ok = np.isfinite(lag) & np.isfinite(gam)
        colour = PALETTE[k % len(PALETTE)]
        ax.plot(lag[ok], gam[ok], color=colour, linestyle=_STYLES[k % len(_STYLES)], linewidth=1.2,
                marker="o", markersize=4, label=f"{float(az):g}°" + (f" ± {float(tol):g}°" if tol != "" else ""))
    ax.set_xlim(left=0.0)
    ax.set_ylim(bottom=0.0)
    ax.set_xlabel(_lag_label(dvg))
    ax.set_ylabel("semivariance " + f"[{_squared(dvg.attrs.get('value_units', ''))}]")
    ax.set_title(title or "Directional semivariograms (azimuth clockwise from north)", fontsize=11)
    ax.grid(True, color="#eeeeee", linewidth=0.6)
    ax.legend(fontsize=8, frameon=False, title="azimuth", title_fontsize=8)
    return fig


def non_detect_map(ds: xr.Dataset, *, title: str | None = None):
    """Map of the sampled points: detected values as filled circles coloured by value, non-detects as open
    triangles (their value is only known to lie below the reporting limit, so no colour is given to it)."""
    fig, ax = _figure((6.0, 5.0))
    cens = np.asarray(ds["censored"].values, bool) if "censored" in ds else np.zeros(ds.sizes["obs"], bool)
    x, y, v = ds["x"].values, ds["y"].values, ds["value"].values
    sc = ax.scatter(x[~cens], y[~cens], c=v[~cens], cmap="viridis", s=28, edgecolors="k", linewidths=0.3,
                    label=f"detected ({int((~cens).sum())})")
    units = ds["value"].attrs.get("units") or ds.attrs.get("value_units", "")
    fig.colorbar(sc, ax=ax, label="detected value" + _units(units, "value units"))
    ax.scatter(x[cens], y[cens], marker="^", s=36, facecolors="none", edgecolors=PALETTE[1],
               label=f"non-detect ({int(cens.sum())}): below its reporting limit")
    ax.set_xlabel(ds.attrs.get("x_column", "x"))
    ax.set_ylabel(ds.attrs.get("y_column", "y"))
    ax.set_aspect("equal", adjustable="datalim")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.12), ncols=2, fontsize="small", frameon=False)
    ax.set_title(title or "Sampled points and non-detects")
    return fig


def save_figure(fig, path, *, dpi: int = 150) -> None:
    """Save ``fig`` as PNG at ``path`` (a temporary path inside an atomic output folder)."""
    fig.savefig(path, dpi=dpi, format="png")

