"""Figures of the model checks: the posterior predictive semivariogram and LOO-PIT calibration.

Each function takes the xarray outputs of :mod:`bayesgeo.checks.modelcheck` and returns a
:class:`matplotlib.figure.Figure` built without pyplot (no display, no global state); save it
with :func:`bayesgeo.explore.figures.save_figure`. Every figure carries a one-line caution in its footer.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np
import xarray as xr

__all__ = ["variogram_check_figure", "loo_pit_figure", "dkw_halfwidth"]

_FOOTER = "Statistical model check; supports, never replaces, licensed professional judgement and local regulation."
_REPLICATE = "#c9c9c9"
_MODEL = "#2f5d80"
_POINT = "#1f1f1f"
_FLAG = "#a3341f"
_LINES = ("#2f5d80", "#a3341f", "#4a7a3a", "#6a4c7d", "#a07a1f", "#2f6f73")


def _figure(figsize=(6.6, 4.8)):
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, layout="constrained")
    return fig, fig.subplots()


def _footer(fig, extra: str = "") -> None:
    fig.get_layout_engine().set(rect=(0.0, 0.07, 1.0, 0.93))
    text = _FOOTER if not extra else f"{extra}\n{_FOOTER}"
    fig.text(0.01, 0.005, text, fontsize=6.5, color="#555555", ha="left", va="bottom")


def _sizes(pairs: np.ndarray) -> np.ndarray:
    """Marker areas growing with the square root of the pair count, 10 to 110 pt^2."""
    p = np.sqrt(np.maximum(np.nan_to_num(pairs.astype(float)), 0.0))
    return 10.0 + 100.0 * p / (p.max() if p.size and p.max() > 0 else 1.0)


def variogram_check_figure(vc: xr.Dataset, *, title: str | None = None):
    """Observed semivariogram over the replicate band and the model's posterior band.

    Parameters
    ----------
    vc : xarray.Dataset
        Output of :func:`bayesgeo.checks.ppcheck.variogram_check`.
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
        Grey band: where the semivariograms of replicate data fall (pointwise quantiles over
        replicates, like-for-like with the observed points); blue band and line: the model
        semivariogram's posterior interval and median; dark points: observed semivariances,
        area growing with the pair count; red rings: bins outside the replicate band. For an anisotropic
        fit two more panels show the same along the major and the minor axis (``axis_*`` variables).
    """
    axes = "axis_observed" in vc
    if axes:
        from matplotlib.figure import Figure

        fig = Figure(figsize=(12.0, 4.6), layout="constrained")
        ax, *side = fig.subplots(1, 3, gridspec_kw={"width_ratios": [1.4, 1.0, 1.0]})
    else:
        fig, ax = _figure()
    prob = float(vc.attrs.get("prob", 0.9))
    lo_name, hi_name = _band_names(vc, "replicate")
    lag = vc["lag"].values
    has = vc["pairs"].values > 0
    ax.fill_between(lag[has], vc[lo_name].values[has], vc[hi_name].values[has], color=_REPLICATE, linewidth=0,
                    zorder=0, label=f"replicate data, {prob:.0%} band ({vc.attrs.get('replicates', '')} replicates)")
    clo, chi = _band_names(vc, "curve")
    dist = vc["distance"].values
    pos = dist > 0
    ax.fill_between(dist[pos], vc[clo].values[pos], vc[chi].values[pos], color=_MODEL, alpha=0.18, linewidth=0,
                    zorder=1, label=f"model semivariogram, {prob:.0%} posterior band")
    ax.plot(dist[pos], vc["curve_q50"].values[pos], color=_MODEL, linewidth=1.5, zorder=2,
            label="model semivariogram, posterior median")
    _observed(ax, lag, vc["observed"].values, vc["pairs"].values, vc["outside"].values, "observed (area ~ √pairs)",
              "outside the replicate band")
    ax.set_xlim(0.0, float(vc.attrs.get("lag_limit", np.nanmax(dist))) * 1.03)
    ax.set_ylim(bottom=0.0)
    du = vc.attrs.get("distance_units", "") or "distance units"
    mu = vc.attrs.get("model_units", "") or "value units"
    ax.set_xlabel(f"lag distance ({du})")
    ax.set_ylabel(f"semivariance [({mu})²]")
    trend = vc.attrs.get("trend_terms", [])
    detr = "mean removed" if list(trend) in (["1"], []) else "trend removed (OLS)"
    ax.set_title(title or f"Posterior predictive semivariogram check: {vc.attrs.get('covariance', '')}", fontsize=10.5)
    ax.grid(True, color="#eeeeee", linewidth=0.6)
    ax.legend(fontsize=7.5, loc="upper left", frameon=True, framealpha=0.85, edgecolor="none")
    extra = ""
    if axes:
        _axis_panels(vc, side, prob, du, mu)
        extra = f"; along the axes: {vc.attrs.get('outside_band_axes', 0)}"
    _footer(fig, f"Classical estimator, {detr}; {vc.attrs.get('outside_band', 0)} bin(s) outside the replicate "
                 f"band{extra}.")
    return fig


def _axis_panels(vc: xr.Dataset, side, prob: float, du: str, mu: str) -> None:
    """The directional check of an anisotropic fit: one panel per axis (major, minor)."""
    lo, hi = _band_names(vc, "axis_replicate")
    mlo, mhi = _band_names(vc, "axis_model")
    top = float(np.nanmax([np.nanmax(vc[hi].values), np.nanmax(vc["axis_observed"].values),
                           np.nanmax(vc[mhi].values)])) * 1.05
    for j, ax in enumerate(side):
        sel = vc.isel(axis=j)
        has = sel["axis_pairs"].values > 0
        lag = sel["axis_lag"].values
        ax.fill_between(lag[has], sel[lo].values[has], sel[hi].values[has], color=_REPLICATE, linewidth=0, zorder=0,
                        label=f"replicate data, {prob:.0%} band")
        ax.fill_between(lag[has], sel[mlo].values[has], sel[mhi].values[has], color=_MODEL, alpha=0.18,
                        linewidth=0, zorder=1, label="model along the axis")
        _observed(ax, lag, sel["axis_observed"].values, sel["axis_pairs"].values, sel["axis_outside"].values,
                  "observed", None)
        name = str(sel["axis"].values)
        ax.set_title(f"{name} axis, {float(sel['axis_azimuth']):.0f}° from north", fontsize=9.5)
        ax.set_xlabel(f"lag distance ({du})")
        ax.set_ylim(0.0, top if np.isfinite(top) and top > 0 else None)
        ax.grid(True, color="#eeeeee", linewidth=0.6)
        if j == 0:
            ax.set_ylabel(f"semivariance [({mu})²]")
            ax.legend(fontsize=7, loc="lower right", frameon=True, framealpha=0.85, edgecolor="none")


def _observed(ax, lag, obs, pairs, outside, label: str, ring_label: str | None) -> None:
    """Observed semivariances of the bins holding pairs (area growing with the pair count) and red rings
    around those outside the replicate band."""
    has = pairs > 0
    sizes = _sizes(pairs)
    ax.scatter(lag[has], obs[has], s=sizes[has], color=_POINT, zorder=3, label=label)
    out = has & outside
    if out.any():
        ax.scatter(lag[out], obs[out], s=sizes[out] * 3.0, facecolors="none", edgecolors=_FLAG, linewidths=1.2,
                   zorder=4, label=ring_label)


def _band_names(vc: xr.Dataset, prefix: str) -> tuple[str, str]:
    names = sorted(n for n in vc.data_vars if n.startswith(f"{prefix}_q") and n != f"{prefix}_q50")
    return names[0], names[-1]


def dkw_halfwidth(n: int, alpha: float = 0.05) -> float:
    """Half-width of the simultaneous (1 - alpha) band of an ECDF of n uniform values.

    Dvoretzky-Kiefer-Wolfowitz inequality with Massart's (1990, Annals of Probability 18) tight
    constant: P(sup |F_n - F| > eps) <= 2 exp(-2 n eps^2), so eps = sqrt(log(2 / alpha) / (2 n)).
    """
    return math.sqrt(math.log(2.0 / alpha) / (2.0 * n))


def loo_pit_figure(pits: Mapping[str, xr.DataArray], *, alpha: float = 0.05, title: str | None = None):
    """ECDF of the LOO-PIT values of one or more fits against the uniform distribution.

    Parameters
    ----------
    pits : mapping of str to xarray.DataArray
        :func:`bayesgeo.checks.modelcheck.loo_pit` of each fit, by name.
    alpha : float
        1 - level of the simultaneous band for a uniform ECDF (:func:`dkw_halfwidth`).
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
        The ECDF minus the uniform CDF: a calibrated model stays inside the grey band; an
        S-shaped curve (above then below 0) means predictive intervals that are too wide,
        the mirror shape too narrow; a curve above 0 throughout means over-prediction.
    """
    fig, ax = _figure()
    n = None
    for k, (name, pit) in enumerate(pits.items()):
        v = np.sort(np.asarray(pit.values, dtype=float))
        n = v.size
        u = np.unique(np.concatenate([np.linspace(0.0, 1.0, 201), v]))  # every jump of the ECDF
        ecdf = np.searchsorted(v, u, side="right") / n
        ax.step(u, ecdf - u, where="post", color=_LINES[k % len(_LINES)], linewidth=1.4, label=str(name))
    if n:
        eps = dkw_halfwidth(n, alpha)
        ax.fill_between([0.0, 1.0], -eps, eps, color=_REPLICATE, alpha=0.6, linewidth=0, zorder=0,
                        label=f"{1 - alpha:.0%} band for a calibrated model (DKW, n = {n})")
    ax.axhline(0.0, color="#888888", linewidth=0.8)
    ax.set_xlim(0.0, 1.0)
    ax.set_xlabel("LOO-PIT value")
    ax.set_ylabel("ECDF − uniform CDF")
    ax.set_title(title or "Leave-one-out PIT calibration", fontsize=10.5)
    ax.grid(True, color="#eeeeee", linewidth=0.6)
    ax.legend(fontsize=7.5, frameon=False)
    _footer(fig, "PIT from the exact leave-one-out normal predictive of each draw, mixed with PSIS weights.")
    return fig
