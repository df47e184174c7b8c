"""Figures of prediction maps: predictive mean, sd and exceedance probability per threshold.

Each figure shows the sample locations and carries the prediction caution in its footer. Colour
maps are matplotlib's perceptually uniform ``viridis`` (mean, sd) and ``cividis`` (probabilities,
fixed to 0-1). Grids are drawn cell by cell; point targets as coloured dots. Maps carry the CRS's name,
a north arrow (rows are north-up: y is northing or latitude), a scale bar for planar coordinates in a
known unit, and exceedance maps the decision contours P = 0.5 and P = 0.9.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.common.io import atomic_file

__all__ = ["NOT_CONVERGED", "DECISION_LEVELS", "map_figure", "threshold_label", "write_map_figures"]

#: Marker put in titles and file attributes when an unconverged posterior is shown on request.
NOT_CONVERGED = "NOT CONVERGED"
#: Default decision levels: the probabilities of exceedance drawn as contours on exceedance maps and made
#: into the polygons of map.gpkg (bayesgeo.predict.gis_export); ``map --decision-level`` sets others.
DECISION_LEVELS = (0.5, 0.9)
_NAMES = {"mean": "predictive mean", "sd": "predictive sd", "q05": "5% predictive quantile",
          "q50": "predictive median", "q95": "95% predictive quantile"}


def _edges(c: np.ndarray) -> np.ndarray:
    if c.size == 1:
        return np.array([c[0] - 0.5, c[0] + 0.5])
    mid = 0.5 * (c[1:] + c[:-1])
    return np.concatenate([[2 * c[0] - mid[0]], mid, [2 * c[-1] - mid[-1]]])


def map_figure(pred: xr.Dataset, variable: str, *, threshold: int | None = None, samples_xy=None,
               title: str = "", caution: str = "", not_converged: bool = False, levels=DECISION_LEVELS):
    """One map of ``pred[variable]`` (``p_exceed`` needs the ``threshold`` index).

    Parameters
    ----------
    pred : xarray.Dataset
        Output of :func:`bayesgeo.predict.prediction.predict_targets`.
    variable : str
        ``mean``, ``sd``, ``q05``, ``q50``, ``q95`` or ``p_exceed``.
    threshold : int, optional
        Index along ``threshold`` for ``p_exceed``.
    samples_xy : array (n, 2), optional
        Sample locations drawn on the map.
    title : str
    caution : str
        Footer text (wrapped).
    not_converged : bool
        Prefix the title with ``NOT CONVERGED``.
    levels : sequence of float
        Decision levels drawn as contours on an exceedance map (default :data:`DECISION_LEVELS`).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure

    da = pred[variable]
    if variable == "p_exceed":
        da = da.isel(threshold=int(threshold))
        cmap, vmin, vmax = "cividis", 0.0, 1.0
    else:
        cmap, vmin, vmax = "viridis", None, None
    fig = Figure(figsize=(7.0, 6.6), layout="constrained")
    ax = fig.add_subplot()
    if pred.attrs.get("target_kind") == "grid":
        x, y = pred["x"].values, pred["y"].values
        im = ax.pcolormesh(_edges(x), _edges(y), np.ma.masked_invalid(da.values), cmap=cmap, vmin=vmin, vmax=vmax,
                           shading="flat")
    else:
        im = ax.scatter(pred["x"].values, pred["y"].values, c=da.values, cmap=cmap, vmin=vmin, vmax=vmax, s=36,
                        marker="s", linewidths=0)
    label = da.attrs.get("long_name", variable)
    units = da.attrs.get("units", "")
    cb = fig.colorbar(im, ax=ax, shrink=0.85)
    if variable == "p_exceed":
        t = float(pred["threshold"].values[int(threshold)])
        tunits = pred["threshold"].attrs.get("units") or pred["mean"].attrs.get("units", "")
        cb.set_label(f"probability of exceeding {t:g} {tunits}".rstrip())
        if pred.attrs.get("target_kind") == "grid" and min(da.shape) > 1:
            lv = sorted(float(v) for v in levels)
            top = [i == len(lv) - 1 for i in range(len(lv))]  # the highest level solid black, the others dashed
            cs = ax.contour(x, y, np.ma.masked_invalid(da.values), levels=lv, linewidths=1.2,
                            colors=["black" if t else "white" for t in top],
                            linestyles=["solid" if t else "dashed" for t in top])
            ax.clabel(cs, fmt={v: f"P = {v:g}" for v in lv}, fontsize=7)
    else:
        name = _NAMES.get(variable, variable)
        cb.set_label(f"{name} [{units}]" if units and units != "1" else name)
    if samples_xy is not None:
        s = np.asarray(samples_xy, dtype=float)
        ax.scatter(s[:, 0], s[:, 1], s=7, c="white", edgecolors="black", linewidths=0.4, label="samples")
        ax.legend(loc="upper right", fontsize=7, framealpha=0.8)
    ax.set_aspect("equal", adjustable="datalim")
    ax.ticklabel_format(useOffset=False, style="plain")
    from matplotlib.ticker import MaxNLocator

    ax.xaxis.set_major_locator(MaxNLocator(nbins=4))  # long eastings: few labels, none overlapping
    dunits = pred.attrs.get("distance_units", "")
    lonlat = pred.attrs.get("coords") == "lonlat" or pred["x"].attrs.get("units") == "degrees_east"
    ax.set_xlabel("longitude [degrees]" if lonlat else (f"easting [{dunits}]" if dunits else "x"))
    ax.set_ylabel("latitude [degrees]" if lonlat else (f"northing [{dunits}]" if dunits else "y"))
    _furniture(ax, pred, dunits, lonlat)
    head = f"{NOT_CONVERGED}: " if not_converged else ""
    ax.set_title(head + (title or label), fontsize=10, color="darkred" if not_converged else "black")
    if caution:
        fig.get_layout_engine().set(rect=(0, 0.1, 1, 0.9))
        fig.text(0.01, 0.01, textwrap.fill(caution, 130), fontsize=6.2, va="bottom", ha="left", color="0.25")
    return fig


def _furniture(ax, pred: xr.Dataset, dunits: str, lonlat: bool) -> None:
    """CRS label, north arrow and (planar coordinates in a known unit) a scale bar."""
    crs = pred.attrs.get("crs_name") or "CRS not stated"
    ax.text(0.01, 0.01, crs, transform=ax.transAxes, fontsize=6.5, va="bottom", ha="left",
            bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": "none", "alpha": 0.75})
    ax.annotate("N", xy=(0.05, 0.97), xytext=(0.05, 0.86), xycoords="axes fraction", ha="center", va="center",
                fontsize=9, fontweight="bold", arrowprops={"arrowstyle": "-|>", "color": "black", "lw": 1.2})
    if lonlat or dunits in ("", "coordinate units"):
        return
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    span = float(np.ptp(pred["x"].values)) or 1.0
    raw = span / 5.0
    base = 10.0 ** np.floor(np.log10(raw))
    length = max((m * base for m in (1.0, 2.0, 5.0) if m * base <= raw), default=base)
    bar = AnchoredSizeBar(ax.transData, length, f"{length:g} {dunits}", "lower right", pad=0.4, sep=3,
                          frameon=True, size_vertical=0, fontproperties={"size": 7})
    bar.patch.set_alpha(0.75)
    ax.add_artist(bar)


def threshold_label(t: float) -> str:
    return f"{t:g}".replace("-", "m").replace(".", "p")


def write_map_figures(pred: xr.Dataset, folder: str | Path, *, samples_xy=None, caution: str = "",
                      not_converged: bool = False, overwrite: bool = False, levels=DECISION_LEVELS) -> list[Path]:
    """Write ``mean.png``, ``sd.png`` and ``p_exceed_<T>.png`` (one per threshold) into ``folder``.

    Files are written atomically; an existing file is refused unless ``overwrite``.
    """
    folder = Path(folder)
    units = pred["mean"].attrs.get("units", "")
    what = "new measurement" if pred.attrs.get("nugget_in_prediction", 1) else "field"
    jobs = [("mean", None, f"Predictive mean of the {what} [{units}]", "mean.png"),
            ("sd", None, f"Predictive sd of the {what} [{units}]", "sd.png")]
    for j, t in enumerate(np.atleast_1d(pred["threshold"].values)):
        jobs.append(("p_exceed", j, f"P({what} > {t:g} {units})", f"p_exceed_{threshold_label(float(t))}.png"))
    written = []
    site = f" - site {pred.attrs['site']}" if pred.attrs.get("site") else ""  # the label the folder name may abbreviate
    for var, j, title, name in jobs:
        fig = map_figure(pred, var, threshold=j, samples_xy=samples_xy, title=title + site, caution=caution,
                         levels=levels, not_converged=not_converged)
        with atomic_file(folder / name, overwrite=overwrite) as tmp:
            fig.savefig(tmp, format="png", dpi=110)
        written.append(folder / name)
    return written
