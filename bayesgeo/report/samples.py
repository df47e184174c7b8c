"""The report's data pieces: the map of the samples and the account of non-detects (counts and reporting
limits per site, the method, cautions)."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from bayesgeo.data.nondetects import MAX_SHARE
from bayesgeo.report.html import esc, fmt, html_table

__all__ = ["METHOD", "samples_figure", "nondetect_rows", "nondetect_block"]

#: How the model treats non-detects, in the report's words (docs/model.md, "Non-detects").
METHOD = ("Non-detects (results below a reporting limit, written &lt;X) are modelled as left-censored: each one is a "
          "latent value below its own limit, sampled together with the covariance parameters under the same "
          "Gaussian-process density (data augmentation), so the fit uses exactly the information that the value lies "
          "below the limit. No number is substituted for them (substituting half the limit or the limit biases means, "
          "variances and hence sills and ranges; Helsel 2012, <i>Statistics for Censored Environmental Data</i>). "
          "Maps condition on each draw's imputed values; leave-one-out scores a non-detect by the probability of a "
          "result below its limit. The exploratory semivariograms describe the detected values only.")


def nondetect_rows(ds) -> list[dict]:
    """One row per site (one row without sites): points, non-detects, their share and reporting limits."""
    cens = np.asarray(ds["censored"].values, bool) if "censored" in ds else np.zeros(ds.sizes["obs"], bool)
    site = ds["site"].values if "site" in ds.coords else np.full(cens.size, "")
    rows = []
    for label in dict.fromkeys(site.tolist()):
        pick = site == label
        k, n = int(cens[pick].sum()), int(pick.sum())
        lim = ds["value"].values[pick & cens]
        rows.append({"site": label or "all", "points": n, "non_detects": k, "share": f"{100 * k / n:.0f}%",
                     "limits": "" if not k else (fmt(lim.min(), 4) if lim.min() == lim.max()
                                                 else f"{fmt(lim.min(), 4)} to {fmt(lim.max(), 4)}")})
    return rows


def nondetect_block(ds) -> str:
    """HTML: the table of :func:`nondetect_rows`, the method and, when a share is high, a caution; '' without
    non-detects."""
    if "censored" not in ds or not np.asarray(ds["censored"].values, bool).any():
        return ""
    rows = nondetect_rows(ds)
    units = ds.attrs.get("value_units", "")
    out = [f"<h3>Non-detects (reporting limits in {esc(units or 'value units')})</h3>",
           html_table(rows, ["site", "points", "non_detects", "share", "limits"],
                      headers=["site", "points", "non-detects", "share", "reporting limits"], left=["site"]),
           f"<p>{METHOD}</p>"]
    high = [r["site"] for r in rows if r["non_detects"] > 0.5 * r["points"]]
    if high:
        out.append(f"<p class=\"caution\">More than half of the values are non-detects at {esc(', '.join(high))}: "
                   "estimates there rest on few detected values and on the model below the limits (bayesgeo refuses "
                   f"more than {100 * MAX_SHARE:.0f}%). Read them with extra care.</p>")
    return "\n".join(out)


def samples_figure(ds, thresholds: Sequence[float] = ()):
    """Map of the sample locations coloured by the measured value (log colour scale for positive data)."""
    import matplotlib.pyplot as plt
    from matplotlib.colors import LogNorm

    det = ~ds["censored"].values if "censored" in ds else np.ones(ds.sizes["obs"], bool)
    v = ds["value"].values
    fig, ax = plt.subplots(figsize=(6.4, 5.2), layout="constrained")
    norm = LogNorm() if np.all(v > 0) else None
    sc = ax.scatter(ds["x"].values[det], ds["y"].values[det], c=v[det], s=22, cmap="viridis", norm=norm,
                    edgecolors="k", linewidths=0.3)
    if not det.all():  # non-detects: only known to lie below their limit, so no colour
        ax.scatter(ds["x"].values[~det], ds["y"].values[~det], marker="^", s=30, facecolors="none",
                   edgecolors="k", linewidths=0.7, label="non-detect")
    for t in thresholds:
        hit = det & (v > t)
        if hit.any():
            ax.scatter(ds["x"].values[hit], ds["y"].values[hit], s=70, facecolors="none", edgecolors="red",
                       linewidths=0.9, label=f"above {t:g}")
    if len(thresholds) or not det.all():
        ax.legend(loc="best", fontsize=8)
    du = ds.attrs.get("distance_units", "")
    ax.set_xlabel(f"x [{du}]" if du else "x")
    ax.set_ylabel(f"y [{du}]" if du else "y")
    ax.set_aspect("equal", adjustable="datalim")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)
    fig.colorbar(sc, ax=ax, label=f"measured value [{ds.attrs.get('value_units', '')}]")
    ax.set_title("Sample locations and measured values")
    return fig
