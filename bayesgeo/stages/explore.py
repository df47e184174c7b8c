"""The explore stage: semivariogram, correlogram, directional semivariograms and quick fits of point data.

Output folder (written atomically; an existing one is refused unless ``overwrite``): for one site the
figures (``semivariogram.png``, ``correlogram.png``, ``directional.png``), the tables
(``semivariogram.csv``, ``correlogram.csv``, ``directional.csv``, ``fits.csv``) and ``explore.json``;
for several sites the same per site in one sub-folder each (:func:`bayesgeo.common.sitenames.site_file_name`),
with ``explore.json`` and a ``fits.csv`` of every site at the top.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from bayesgeo.common.layout import EXPLORE_FILE, site_part
from bayesgeo.data.nondetects import count_line

__all__ = ["CAUTIONS", "AZIMUTHS", "TOLERANCE", "explore_folder"]

CAUTIONS = (
    "The quick fits (weighted least squares on the semivariogram, maximum likelihood) are screening "
    "estimates with no uncertainty attached; use the Bayesian model for range, sill and nugget with "
    "credible intervals.",
    "Semivariograms, correlograms and fits assume a stationary, isotropic field after the trend; check "
    "the directional semivariograms and the trend order before relying on them.",
    "Lag bins with fewer than 30 pairs are unreliable (common practice).",
    "Decisions on contamination or human and ecological exposure must follow local regulation and the "
    "judgement of a licensed professional; these summaries support and do not replace them.",
)

AZIMUTHS = (0.0, 45.0, 90.0, 135.0)
TOLERANCE = 22.5

#: Directions (degrees clockwise from north) and half-width of the directional semivariograms.
AZIMUTHS = (0.0, 45.0, 90.0, 135.0)
TOLERANCE = 22.5


def _vals(da) -> list:
    return [float(v) for v in da.values.ravel()] if da.ndim <= 1 else [[float(v) for v in r] for r in da.values]


def _stat_json(ds, name: str) -> dict:
    out = {"lag": _vals(ds["lag"]), name: _vals(ds[name]), "pairs": ds["pairs"].values.tolist()}
    for var in ("envelope_low", "envelope_high", "p_value"):
        out[var] = _vals(ds[var]) if var in ds else [float("nan")] * ds.sizes["bin"]
    return out


def _anisotropy_json(dvg, vg) -> dict | None:
    """A first guess at the direction and ratio of ranges from the directional semivariograms
    (:func:`bayesgeo.explore.anisotropy.suggest_anisotropy`), rounded; None when it cannot be made."""
    from bayesgeo.explore.anisotropy import suggest_anisotropy

    s = suggest_anisotropy(dvg, vg)
    if s is None:
        return None
    return {"angle": round(s["angle"], 1), "ratio": round(s["ratio"], 2) if np.isfinite(s["ratio"]) else None,
            "azimuths": s["azimuths"], "ranges": s["ranges"], "method": s["method"]}


def _fits_json(fits) -> dict:
    out = {}
    for method in fits["method"].values:
        part = {}
        for fam in fits["family"].values:
            row = fits.sel({"method": method, "family": fam})
            entry = {v: float(row[v]) for v in ("nugget", "partial_sill", "practical_range", "scale", "objective")}
            if method == "ml":
                entry["loglik"] = float(row["loglik"])
            entry["converged"] = bool(row["converged"])
            entry["at_bound"] = [s for s in str(row["at_bound"].values).split(", ") if s]
            part[str(fam)] = entry
        out[str(method)] = part
    return out


def _analyse_site(part, *, trend: int, covariates: list, bins: int, lag_limit, permutations: int, estimator: str,
                  seed: int, families: list, bar, log=None) -> tuple[dict, dict]:
    """Statistics and fits of one site: (JSON object, xarray results for files); ``log(text)`` announces
    each long step (large inputs)."""
    log = log or (lambda text: None)
    from bayesgeo.explore import variogram as explore
    from bayesgeo.explore.quickfit import quick_fits
    from bayesgeo.explore.trend import design_categories, fit_trend

    notes: list[str] = []
    full = part
    cens = np.asarray(part["censored"].values, bool) if "censored" in part else np.zeros(part.sizes["obs"], bool)
    if cens.any():  # never substituted: the empirical statistics describe the detected values
        notes.append(f"{count_line(part)}: left out of the semivariograms, the correlogram and the quick fits, "
                     "which describe the detected values only; no value was substituted for them, and the Bayesian "
                     "fit models them as left-censored")
        part = part.isel(obs=np.flatnonzero(~cens)).drop_vars("censored")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", explore.FewPairsWarning)
        trend_info = {"order": trend, "covariates": list(covariates)}
        if trend > 0 or covariates:
            part = fit_trend(part, trend, covariates)
            if design_categories(part["coefficient"].attrs):  # levels and baseline of each category
                trend_info["categories"] = design_categories(part["coefficient"].attrs)
            trend_info["r_squared"] = float(part.attrs["trend_r_squared"])
        common = {"bins": bins, "lag_limit": lag_limit}
        log(f"semivariogram ({permutations} permutations)")
        vg = explore.semivariogram(part, estimator=estimator, permutations=permutations,
                                   seed=seed, **common)
        if bar is not None:
            bar.update(1)
        log(f"correlogram ({permutations} permutations)")
        cg = explore.correlogram(part, permutations=permutations, seed=seed, **common)
        if bar is not None:
            bar.update(1)
        log("directional semivariograms")
        dvg = explore.directional_semivariograms(part, azimuths=AZIMUTHS, tolerance=TOLERANCE,
                                                 estimator=estimator, **common)
        if bar is not None:
            bar.update(1)
    notes += sorted({str(w.message) for w in caught if issubclass(w.category, explore.FewPairsWarning)})
    log("quick covariance fits")
    fits = quick_fits(part, vg, families, trend=trend, covariates=covariates)
    if bar is not None:
        bar.update(len(families))
    if "ml_skipped" in fits.attrs:
        notes.append(fits.attrs["ml_skipped"] + "; the ML columns are null")
    lags = vg["lag"].values[(vg["pairs"].values > 0) & np.isfinite(vg["semivariance"].values)]
    first_lag = float(lags.min()) if lags.size else float("nan")
    for method in fits["method"].values:
        for fam in fits["family"].values:
            row = fits.sel({"method": method, "family": fam})
            if float(row["practical_range"]) < first_lag:  # False for NaN
                notes.append(f"{method.upper()} fit of {fam}: practical range {float(row['practical_range']):.3g} is "
                             f"below the first lag ({first_lag:.3g}); the data look like pure nugget at these lags")
            if not bool(row["converged"]) and not (method == "ml" and "ml_skipped" in fits.attrs):
                notes.append(f"{method.upper()} fit of {fam} did not report convergence; treat it with care")
            elif str(row["at_bound"].values):
                notes.append(f"{method.upper()} fit of {fam} stopped at a search bound: {row['at_bound'].values}")
    obj = {
        "n": int(full.sizes["obs"]),
        "non_detects": int(cens.sum()),
        "variable": vg.attrs.get("variable", "value"),
        "trend": trend_info,
        "distance_units": vg.attrs.get("distance_units", ""),
        "value_units": vg.attrs.get("value_units", ""),
        "semivariogram": {**_stat_json(vg, "semivariance"), "estimator": estimator,
                          "few_pairs_bins": list(vg.attrs.get("few_pairs_bins", []))},
        "correlogram": _stat_json(cg, "correlation"),
        "directional": {"azimuth": [float(a) for a in dvg["azimuth"].values], "tolerance": TOLERANCE,
                        "lag": _vals(dvg["lag"]), "semivariance": _vals(dvg["semivariance"]),
                        "pairs": dvg["pairs"].values.tolist()},
        "fits": _fits_json(fits),
        "fit_methods": {"wls": str(fits.attrs.get("wls", "")), "ml": str(fits.attrs.get("ml", ""))},
        "anisotropy": _anisotropy_json(dvg, vg),
        "notes": notes,
    }
    return obj, {"semivariogram": vg, "correlogram": cg, "directional": dvg, "fits": fits,
                 "points": full if cens.any() else None}


def _write_site(folder, res: dict, label: str) -> list[str]:
    from bayesgeo.explore import figures
    folder.mkdir(parents=True, exist_ok=True)
    suffix = f" - site {label}" if label else ""
    figs = {
        "semivariogram.png": figures.semivariogram_figure(
            res["semivariogram"], res["fits"],
            title=f"Semivariogram ({res['semivariogram'].attrs.get('estimator', '')}) with WLS fits{suffix}"),
        "correlogram.png": figures.correlogram_figure(res["correlogram"], title=f"Correlogram{suffix}"),
        "directional.png": figures.directional_figure(res["directional"],
                                                      title=f"Directional semivariograms{suffix}"),
    }
    if res.get("points") is not None:
        figs["non_detects.png"] = figures.non_detect_map(res["points"], title=f"Sampled points and non-detects{suffix}")
    for name, fig in figs.items():
        figures.save_figure(fig, folder / name)
    for name in ("semivariogram", "correlogram", "directional", "fits"):
        frame = res[name].to_dataframe()
        if label:
            frame.insert(0, "site", label)  # the label, which the folder name may abbreviate
        frame.to_csv(folder / f"{name}.csv", float_format="%.10g")
    return [*figs, *(f"{n}.csv" for n in ("semivariogram", "correlogram", "directional", "fits"))]


def _site_log(log: Callable[[str], None], where: str) -> Callable[[str], None]:
    return lambda text: log(f"{where}{text} ...")


def explore_folder(data, *, out=None, trend: int = 0, transform: str = "none", bins: int = 15, lag_limit=None,
                   permutations: int = 99, estimator: str = "classical", covariance: Sequence[str] | None = None,
                   seed: int = 1, overwrite: bool = False, progress: Callable | None = None,
                   log: Callable[[str], None] | None = None, **data_settings) -> tuple[int, dict]:
    """Explore the points in ``data`` and write the figures, tables and ``explore.json`` into ``out``.

    Parameters
    ----------
    data : path
        CSV of point measurements (or a bayesgeo point file); ``data_settings`` are those of
        :func:`bayesgeo.data.points.read_points`.
    out : path, optional
        Output folder (default ``<data stem>-explore`` beside the data).
    trend, transform :
        Polynomial trend order removed first (0-3, with the covariates of ``data_settings``), and
        "none" or "log".
    bins, lag_limit, permutations, estimator, seed :
        Lag bins, largest lag (distance units), permutations for envelopes and p-values, semivariogram
        estimator ("classical" or "cressie-hawkins") and the permutations' seed.
    covariance : sequence of str, optional
        Families of the quick fits (default all of :data:`bayesgeo.explore.quickfit.QUICK_FAMILIES`).
    progress : callable, optional
        Bar factory ``progress(total=, desc=)``; None for none.
    log : callable, optional
        Receives the workload note and one line per long step of an announced large input.

    Returns
    -------
    (0, result)
        The statistics of the only (or first) site, ``sites`` (several sites), the settings, the
        workload plan, the files written and the cautions: the object written to ``explore.json``.
    """
    from bayesgeo.data.points import apply_transform, read_points, sites_of, trend_covariates
    from bayesgeo.common.io import to_jsonable, write_json
    from bayesgeo.common.outputs import claim, new_folder
    from bayesgeo.explore.quickfit import QUICK_FAMILIES
    from bayesgeo.explore.trend import MAX_ORDER
    from bayesgeo.common.validate import InputError
    from bayesgeo.fitting.workload import explore_plan

    if not 0 <= trend <= MAX_ORDER:
        raise InputError(f"trend: order {trend} is not one of 0, 1, 2, 3")
    out = Path(out) if out else Path(data).with_name(Path(data).stem + "-explore")
    ds = apply_transform(read_points(data, **data_settings), transform)
    claim(out, overwrite=overwrite, inputs=[data])
    covariates = list(trend_covariates(data_settings))
    families = list(dict.fromkeys(covariance or QUICK_FAMILIES))
    labels = sites_of(ds)
    multi = labels != [""]
    plan = explore_plan(ds, permutations=permutations, lag_limit=lag_limit, families=len(families))
    if plan["message"] and log is not None:
        log(f"note: {plan['message']}")
    bar = progress(total=len(labels) * (3 + len(families)), desc="explore") if progress else None
    results, objects = {}, {}
    for label in labels:
        part = ds if not multi else ds.isel(obs=(ds["site"].values == label).nonzero()[0])
        step = _site_log(log, f"site {label}: " if multi else "") if plan["message"] and log is not None else None
        objects[label], results[label] = _analyse_site(
            part, trend=trend, covariates=covariates, bins=bins, lag_limit=lag_limit, permutations=permutations,
            estimator=estimator, seed=seed, families=families, bar=bar, log=step)
    if bar is not None:
        bar.close()

    first = labels[0]
    settings = {"transform": transform, "trend": trend, "covariates": covariates, "bins": bins,
                "lag_limit": lag_limit, "permutations": permutations, "estimator": estimator,
                "covariance": families, "seed": seed, "azimuths": list(AZIMUTHS), "tolerance": TOLERANCE}
    obj = {"data": str(data), "out": str(out), "site": first if multi else None,
           "n_total": int(ds.sizes["obs"]), **objects[first], "settings": settings, "workload": plan}
    if multi:
        obj["sites"] = objects
    files: list[str] = []
    with new_folder(out, overwrite=overwrite) as tmp:
        for label in labels:
            sub = site_part(label) if multi else ""
            files += [f"{sub}/{f}" if sub else f for f in _write_site(tmp / sub if sub else tmp, results[label], label)]
        if multi:
            import pandas as pd

            frames = [results[lb]["fits"].to_dataframe().assign(site=lb).set_index("site", append=True)
                      for lb in labels]
            pd.concat(frames).to_csv(tmp / "fits.csv", float_format="%.10g")
            files.append("fits.csv")
        files.append(EXPLORE_FILE)
        obj["files"] = files
        obj["cautions"] = list(CAUTIONS)
        write_json(tmp / EXPLORE_FILE, to_jsonable(obj))
    return 0, obj
