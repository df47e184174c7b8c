"""Diagnostic figures of a posterior sample: autocorrelation, trace, rank and pair plots.

* ``acf.png`` (``acf_2.png``, ... beyond 12 parameters): our own matplotlib; one panel per scalar
  parameter, one line per chain, lags up to :func:`bayesgeo.convergence.autocorr.default_lag_limit` (three
  times the largest per-chain IAT, so the decay is visible), with the per-parameter IAT in the
  title and the approximate 95% band +-1.96/sqrt(n) of white noise (Box, Jenkins and Reinsel
  2008, sec. 2.1.6).
* ``trace.png``: draws against iteration per chain, divergent draws marked (``arviz_plots``).
* ``rank.png``: rank ECDF-difference plot per chain (Vehtari et al. 2021 rank plots, as drawn by
  ``arviz_plots``); chains that mix well stay inside the band.
* ``pair.png``: pair plot of the covariance parameters with divergent draws marked
  (``arviz_plots``); where divergences cluster shows which parameter the geometry troubles.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.convergence.autocorr import autocorrelation, integrated_autocorrelation_time, stack_parameters
from bayesgeo.common.io import atomic_file

__all__ = ["PAIR_DEFAULT", "write_diagnostic_figures"]

#: Variables shown in the pair plot when present (the covariance parameters), at most 5 scalars.
PAIR_DEFAULT = ("practical_range", "partial_sill", "nugget", "microergodic", "nugget_ratio", "scale", "total_sill")
_PANELS_PER_PAGE = 12
_MAX_PAIR = 5
_MAX_ELEMENTS = 10
_MAX_PANELS = 30


def _save(fig, path: Path, *, overwrite: bool, dpi: int) -> Path:
    with atomic_file(path, overwrite=overwrite) as tmp:
        fig.savefig(tmp, dpi=dpi, format="png")
    return path


def _acf_pages(draws: xr.DataArray, outdir: Path, *, lag_limit, overwrite: bool, dpi: int) -> list[Path]:
    import matplotlib.pyplot as plt

    acf = autocorrelation(draws, lag_limit=lag_limit)
    iat = integrated_autocorrelation_time(draws)
    n = draws.sizes["draw"]
    band = 1.96 / math.sqrt(n)
    labels = [str(p) for p in draws["parameter"].values]
    paths = []
    for page, start in enumerate(range(0, len(labels), _PANELS_PER_PAGE)):
        chunk = labels[start : start + _PANELS_PER_PAGE]
        ncol = min(3, len(chunk))
        nrow = math.ceil(len(chunk) / ncol)
        fig, axes = plt.subplots(nrow, ncol, figsize=(4.2 * ncol, 2.8 * nrow), squeeze=False, sharey=True)
        try:
            for ax, label in zip(axes.flat, chunk):
                a = acf.sel(parameter=label)
                lags = a["lag"].values
                for c in range(a.sizes["chain"]):
                    ax.plot(lags, a.isel(chain=c).values, lw=1.0, label=f"chain {a['chain'].values[c]}")
                ax.axhline(0.0, color="0.3", lw=0.6)
                ax.axhspan(-band, band, color="0.85", zorder=0)
                tau = float(iat.sel(parameter=label))
                ax.set_title(f"{label}  (IAT {tau:.3g} draws)" if math.isfinite(tau) else f"{label}  (IAT n/a)",
                             fontsize=9)
                ax.set_xlim(0, lags[-1])
                ax.set_ylim(-0.25, 1.02)
            for ax in axes.flat[len(chunk):]:
                ax.set_visible(False)
            for ax in axes[-1]:
                ax.set_xlabel("lag (draws)")
            for ax in axes[:, 0]:
                ax.set_ylabel("autocorrelation")
            axes.flat[0].legend(fontsize=7, loc="upper right")
            fig.suptitle("Trace autocorrelation per chain; grey band: +-1.96/sqrt(n) (white noise)", fontsize=10)
            fig.tight_layout()
            name = "acf.png" if page == 0 else f"acf_{page + 1}.png"
            paths.append(_save(fig, outdir / name, overwrite=overwrite, dpi=dpi))
        finally:
            plt.close(fig)
    return paths


def _arviz_figure(kind: str, tree, var_names, path: Path, *, overwrite: bool, dpi: int, **kwargs) -> Path:
    import arviz as az
    import matplotlib.pyplot as plt

    before = set(plt.get_fignums())
    try:
        func = {"trace": az.plot_trace, "rank": az.plot_rank, "pair": az.plot_pair}[kind]
        pc = func(tree, var_names=list(var_names), backend="matplotlib", **kwargs)
        fig = pc.get_viz("figure")
        if not hasattr(fig, "savefig"):  # a 0-d DataArray holding the figure
            fig = fig.item()
        return _save(fig, path, overwrite=overwrite, dpi=dpi)
    finally:
        for num in set(plt.get_fignums()) - before:
            plt.close(num)


def _has_divergences(tree) -> bool:
    return (isinstance(tree, xr.DataTree) and "sample_stats" in tree.children
            and "diverging" in tree["sample_stats"].data_vars)


def write_diagnostic_figures(
    tree,
    outdir: str | Path,
    *,
    var_names: Sequence[str] | None = None,
    lag_limit: int | None = None,
    overwrite: bool = False,
    dpi: int = 110,
) -> list[Path]:
    """Write ACF, trace, rank and pair plots of a posterior sample as PNG files.

    Parameters
    ----------
    tree : xarray.DataTree
        Posterior sample with a ``posterior`` group (and ``sample_stats`` to mark divergences).
    outdir : str or Path
        Folder for the figures (created if needed).
    var_names : sequence of str, optional
        Posterior variables to draw; default the numeric ones with at most 10 elements, up to
        30 scalar panels in all (so a latent field does not bury the covariance parameters;
        name it here to draw it anyway). The pair plot uses the
        covariance parameters in :data:`PAIR_DEFAULT` that are among them (at most 5 scalars).
    lag_limit : int, optional
        Largest lag of the ACF panels; default covers the decay (see
        :func:`bayesgeo.convergence.autocorr.default_lag_limit`).
    overwrite : bool
        Replace existing files of the same names (refused otherwise).
    dpi : int
        Resolution of the PNG files.

    Returns
    -------
    list of Path
        The files written, ACF pages first, then ``trace.png``, ``rank.png`` (with at least two
        chains) and ``pair.png`` (with at least two scalar parameters).
    """
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    draws = stack_parameters(tree, var_names=var_names)
    if var_names is None:
        draws = draws.isel(parameter=np.isin(draws["variable"].values, _default_figure_vars(draws)))
    names = list(dict.fromkeys(str(v) for v in draws["variable"].values))
    paths = _acf_pages(draws, outdir, lag_limit=lag_limit, overwrite=overwrite, dpi=dpi)
    div = _has_divergences(tree)
    trace_kw = {"visuals": {"divergence": True}} if div else {"visuals": {"divergence": False}}
    paths.append(_arviz_figure("trace", tree, names, outdir / "trace.png", overwrite=overwrite, dpi=dpi, **trace_kw))
    if draws.sizes["chain"] >= 2:  # rank plots compare chains
        paths.append(_arviz_figure("rank", tree, names, outdir / "rank.png", overwrite=overwrite, dpi=dpi))
    pair = _pair_vars(draws)
    if len(pair) >= 2 or (len(pair) == 1 and _n_scalars(draws, pair) >= 2):
        pair_kw = {"visuals": {"divergence": True}} if div else {}
        paths.append(_arviz_figure("pair", tree, pair, outdir / "pair.png", overwrite=overwrite, dpi=dpi, **pair_kw))
    return paths


def _default_figure_vars(draws: xr.DataArray) -> list[str]:
    """Variables drawn by default: those with at most 10 elements, until 30 panels (a latent field
    with one value per sample point would bury the covariance parameters)."""
    counts: dict[str, int] = {}
    for v in draws["variable"].values:
        counts[str(v)] = counts.get(str(v), 0) + 1
    chosen, total = [], 0
    for v, n in counts.items():
        if n <= _MAX_ELEMENTS and total + n <= _MAX_PANELS:
            chosen.append(v)
            total += n
    return chosen or [next(iter(counts))]


def _n_scalars(draws: xr.DataArray, names: Sequence[str]) -> int:
    return int(np.isin(draws["variable"].values, list(names)).sum())


def _pair_vars(draws: xr.DataArray) -> list[str]:
    """Covariance parameters present (else the first variables), at most 5 scalars in all."""
    counts = {}
    for v in draws["variable"].values:
        counts[str(v)] = counts.get(str(v), 0) + 1
    preferred = [v for v in PAIR_DEFAULT if v in counts]
    chosen, total = [], 0
    for v in preferred or list(counts):
        if total + counts[v] > _MAX_PAIR:
            continue
        chosen.append(v)
        total += counts[v]
    return chosen
