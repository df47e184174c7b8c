"""The variogram-check stage: posterior predictive check of a saved fit against the empirical semivariogram.

Writes ``variogram_check.png`` and ``variogram_check.csv`` into the fit folder (for one site of a
several-site fit ``variogram_check_<site>.*``), each refused if present unless ``overwrite``; the
computation is :func:`bayesgeo.checks.ppcheck.variogram_check`.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np

from bayesgeo.common.layout import vgcheck_names
from bayesgeo.common.validate import InputError

__all__ = ["TABLE_COLUMNS", "check_variogram"]

TABLE_COLUMNS = ("bin", "lag", "bin_lower", "bin_upper", "pairs", "observed", "replicate_q05", "replicate_q50",
                 "replicate_q95", "model_q05", "model_q50", "model_q95", "p_value", "outside")


def _list(da) -> list:
    return [float(v) for v in da.values]


def _refuse_non_finite(vc, folder) -> None:
    """NaN or infinite replicate or model semivariances in a bin with pairs stop the check."""
    has_pairs = vc["pairs"].values > 0
    for name in ("replicate_q05", "replicate_q50", "replicate_q95", "model_q05", "model_q50", "model_q95"):
        bad = int(np.count_nonzero(~np.isfinite(vc[name].values) & has_pairs))
        if bad:
            raise InputError(f"{folder}: {name} is NaN or infinite in {bad} lag bin(s) with pairs although the "
                             "posterior draws are finite; no check written: check the fit ('bayesgeo check')")


def check_variogram(folder, *, site: str | None = None, replicates: int = 200, bins: int = 15,
                    lag_limit: float | None = None, seed: int = 1, overwrite: bool = False,
                    progress: Callable | None = None) -> tuple[int, dict]:
    """Run the posterior predictive semivariogram check of the fit in ``folder`` and write its figure and table.

    Parameters
    ----------
    folder : path
        Fit folder holding ``posterior.nc``.
    site : str, optional
        The site of a several-site fit to check (required for one, refused for a single-site fit).
    replicates, bins, lag_limit, seed :
        As in :func:`bayesgeo.checks.ppcheck.variogram_check` (``lag_limit`` in distance units).
    overwrite : bool
        Replace an earlier figure and table.
    progress : callable, optional
        Bar factory ``progress(total=, desc=)``; None for none.

    Returns
    -------
    (0, result)
        Per bin: lag, pairs, observed semivariance, replicate and model bands, p-value and whether the
        observation is outside the replicate band; the settings, units, files written and cautions.
    """
    from bayesgeo.checks.figures import variogram_check_figure
    from bayesgeo.explore.figures import save_figure
    from bayesgeo.fitting.fitted import read_site
    from bayesgeo.common.outputs import add_to_folder, check_addable
    from bayesgeo.checks.ppcheck import variogram_check

    folder = Path(folder)
    bar = progress(total=3, desc="variogram-check") if progress else None
    fit = read_site(folder, site)
    fig_name, csv_name = vgcheck_names(site)
    fig_path, csv_path = folder / fig_name, folder / csv_name
    check_addable(folder, fig_name, overwrite=overwrite)
    check_addable(folder, csv_name, overwrite=overwrite)
    if bar is not None:
        bar.update(1)
    vc = variogram_check(fit.tree, replicates=replicates, bins=bins, lag_limit=lag_limit, seed=seed,
                         progress=progress)
    if bar is not None:
        bar.update(1)
    _refuse_non_finite(vc, folder)
    cautions = list(vc.attrs["cautions"])
    where = f", site {site}" if site is not None else ""
    title = f"Posterior predictive semivariogram check: {vc.attrs['covariance']}{where}" if site is not None else None
    if fit.stored_verdict == "fail":
        cautions.insert(0, "NOT CONVERGED: the fit failed its convergence check; this check inherits its problems")
        title = f"NOT CONVERGED - posterior predictive semivariogram check: {vc.attrs['covariance']}{where}"
    import pandas as pd

    frame = pd.DataFrame({c: vc[c].values for c in TABLE_COLUMNS})
    if site is not None:
        frame.insert(0, "site", site)  # the label, which the file name may abbreviate
    with add_to_folder(folder, csv_name, overwrite=overwrite) as tmp:
        frame.to_csv(tmp, index=False, float_format="%.10g")
    with add_to_folder(folder, fig_name, overwrite=overwrite) as tmp:
        save_figure(variogram_check_figure(vc, title=title), tmp)
    if bar is not None:
        bar.update(1)
        bar.close()
    axes = {}
    if "axis_observed" in vc:  # an anisotropic fit: the check along its two axes
        for j, name in enumerate(vc["axis"].values):
            sel = vc.isel(axis=j)
            axes[str(name)] = {"azimuth": float(sel["axis_azimuth"]), "lag": _list(sel["axis_lag"]),
                               "observed": _list(sel["axis_observed"]),
                               **{k: _list(sel[f"axis_{k}"]) for k in ("replicate_q05", "replicate_q95", "model_q50",
                                                                      "p_value")},
                               "outside_band": int(sel["axis_outside"].sum())}
    return 0, {
        **({"axes": axes} if axes else {}),
        "lag": _list(vc["lag"]),
        "observed": _list(vc["observed"]),
        "pairs": [int(v) for v in vc["pairs"].values],
        "replicate_q05": _list(vc["replicate_q05"]),
        "replicate_q50": _list(vc["replicate_q50"]),
        "replicate_q95": _list(vc["replicate_q95"]),
        "model_q05": _list(vc["model_q05"]),
        "model_q50": _list(vc["model_q50"]),
        "model_q95": _list(vc["model_q95"]),
        "p_value": _list(vc["p_value"]),
        "outside": [bool(v) for v in vc["outside"].values],
        "outside_band": int(vc.attrs["outside_band"]),
        "replicates": int(vc.attrs["replicates"]),
        "bins": int(vc.attrs["bins"]),
        "lag_limit": float(vc.attrs["lag_limit"]),
        "seed": int(vc.attrs["seed"]),
        "covariance": vc.attrs["covariance"],
        "site": site,
        "transform": vc.attrs["transform"],
        "units": {"lag": vc.attrs["distance_units"], "semivariance": f"({vc.attrs['model_units']})^2"},
        "files": [str(fig_path), str(csv_path)],
        "cautions": cautions,
    }
