"""Shrinkage of a several-site fit: each site's estimates under pooling set against its independent fit (table and figure)."""

from __future__ import annotations

import numpy as np
import xarray as xr

__all__ = ["shrinkage_table", "plot_shrinkage"]


def shrinkage_table(pooled: xr.DataTree, independent: xr.DataTree, *, prob: float = 0.9,
                    parameters=("practical_range", "partial_sill")) -> xr.Dataset:
    """Per site, the independent-fit and pooled medians and ``prob`` intervals side by side.

    Parameters
    ----------
    pooled : xarray.DataTree
        A hierarchical (or complete-pooling) fit from :func:`bayesgeo.fitting.hierarchical.fit_sites`.
    independent : xarray.DataTree
        The ``pooling="independent"`` fit of the same data.
    prob : float
        Probability of the equal-tailed intervals.

    Returns
    -------
    xarray.Dataset
        Dims ``(site, parameter)``: ``independent_median``, ``independent_low``,
        ``independent_high``, ``pooled_median``, ``pooled_low``, ``pooled_high`` and
        ``width_ratio`` (pooled over independent width of the interval on the log scale, i.e. of
        high / low: these are scale parameters, so widths are compared as ratios; below 1 where
        pooling narrowed the interval); coordinate ``n`` (points per site). ``attrs["pooling"]`` names the pooled model.
    """
    a = pooled["posterior"].to_dataset()
    b = independent["posterior"].to_dataset()
    sites = [str(s) for s in a["site"].values]
    if sites != [str(s) for s in b["site"].values]:
        raise ValueError("the two fits have different sites")
    lo = (1.0 - prob) / 2.0
    qs = [lo, 0.5, 1.0 - lo]
    shape = (len(sites), len(parameters))
    res = {k: np.empty(shape) for k in ("independent", "pooled")}
    vals = {f"{m}_{s}": np.empty(shape) for m in ("independent", "pooled") for s in ("low", "median", "high")}
    for j, p in enumerate(parameters):
        for tag, post in (("independent", b), ("pooled", a)):
            q = post[p].quantile(qs, dim=("chain", "draw")).transpose("site", "quantile").values
            vals[f"{tag}_low"][:, j], vals[f"{tag}_median"][:, j], vals[f"{tag}_high"][:, j] = q.T
            res[tag][:, j] = np.log(q[:, 2]) - np.log(q[:, 0])
    from bayesgeo.fitting.site_inputs import site_spec

    n = site_spec(pooled).n
    units = {p: a[p].attrs.get("units", "") for p in parameters}
    ds = xr.Dataset({k: (("site", "parameter"), v) for k, v in vals.items()},
                    coords={"site": sites, "parameter": list(parameters), "n": ("site", np.asarray(n, dtype=int)),
                            "units": ("parameter", [units[p] for p in parameters])})
    ds["width_ratio"] = (("site", "parameter"), res["pooled"] / res["independent"],
                         {"long_name": "log(high / low) pooled over log(high / low) independent"})
    ds.attrs = {"prob": prob, "pooling": str(pooled.attrs.get("pooling", "")),
                "what": "independent-fit versus pooled medians and equal-tailed intervals per site"}
    return ds


def plot_shrinkage(table: xr.Dataset, *, population: xr.Dataset | None = None, title: str | None = None):
    """Figure of :func:`shrinkage_table`: per site and parameter, the independent interval (grey)
    above the pooled one (blue); ``population`` (a new-site predictive ``Dataset``) adds its median
    and interval as a band. Log axes. Returns the matplotlib Figure."""
    import matplotlib.pyplot as plt

    params = [str(p) for p in table["parameter"].values]
    sites = [str(s) for s in table["site"].values]
    fig, axes = plt.subplots(1, len(params), figsize=(4.6 * len(params), 0.55 * len(sites) + 1.8), squeeze=False)
    prob = float(table.attrs.get("prob", 0.9))
    ypos = np.arange(len(sites))[::-1]
    for ax, p in zip(axes[0], params):
        t = table.sel(parameter=p)
        ax.hlines(ypos + 0.15, t["independent_low"], t["independent_high"], color="#8c8c8c", lw=2.2,
                  label="independent")
        ax.plot(t["independent_median"], ypos + 0.15, "o", color="#525252", ms=4)
        ax.hlines(ypos - 0.15, t["pooled_low"], t["pooled_high"], color="#2b6ca3", lw=2.2,
                  label=table.attrs.get("pooling") or "pooled")
        ax.plot(t["pooled_median"], ypos - 0.15, "o", color="#123f66", ms=4)
        if population is not None and p in population:
            lo, med, hi = np.quantile(population[p].values, [(1 - prob) / 2, 0.5, 1 - (1 - prob) / 2])
            ax.axvspan(lo, hi, color="#f2c14e", alpha=0.18, label="new site")
            ax.axvline(med, color="#c98b00", lw=1)
        ax.set_xscale("log")
        ax.set_yticks(ypos, [f"{s} (n={int(n)})" for s, n in zip(sites, table["n"].values)])
        units = str(t["units"].item())
        ax.set_xlabel(f"{p.replace('_', ' ')} ({units})" if units else p.replace("_", " "))
        ax.grid(axis="x", alpha=0.3)
    axes[0][0].legend(frameon=False, fontsize=8, loc="best")
    fig.suptitle(title or f"Shrinkage: medians and {100 * prob:g}% intervals per site")
    fig.text(0.01, 0.005, "Illustrative model output; decisions rest on local regulation and professional review.",
             fontsize=7, color="#555555")
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    return fig
