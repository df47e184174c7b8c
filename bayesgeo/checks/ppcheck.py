"""Posterior predictive semivariogram check of a fit (:func:`variogram_check`).

For a set of posterior draws, replicate data at the observed locations, ``y_rep ~ N(F beta, K)``
on the standardised scale (the nugget included: a replicate is a new set of measurements), back
to model units
``z_rep = m + s y_rep`` (log units under ``transform="log"``). The observed modelled values and
every replicate get the same treatment: the trend of the fit (same design: polynomial order and
covariates) is removed by ordinary least squares, as :func:`bayesgeo.explore.trend.fit_trend` does for
the exploratory semivariogram, and Matheron's classical estimator is computed with the same lag
bins (:func:`bayesgeo.explore.variogram.lag_bins`). The replicate band is therefore the like-for-like
reference for the observed points (OLS residuals understate the semivariance of the process a
little, for observed and replicated data alike). The model band is the semivariogram of the
process, ``gamma(h) = sigma^2 (1 - rho(h)) + tau^2`` per draw, in model units; its median and
equal-tailed interval are drawn too. The share of replicates whose semivariance is at or above
the observed one in a bin is a posterior predictive p-value (Gelman, Meng and Stern 1996,
Statistica Sinica 6); values near 0 or 1 mark bins the model does not reproduce.

For a geometrically anisotropic fit (:mod:`bayesgeo.gp.anisotropy`) the same is done along its two axes
(:func:`_axis_check`): pairs within 22.5 degrees of the posterior's circular-mean direction of the major axis,
and of the minor axis at right angles to it, give observed and replicated directional semivariograms with
their own bands and p-values (variables ``axis_*``, dimension ``axis``); the model band along each axis uses
each draw's range along that axis (the geometric-mean range times or divided by sqrt(ratio)). The replicate
bands compare like with like (the same sectors); the model band is the exact axis, a guide.

This check judges a statistical model. Results that bear on contamination or exposure support,
and never replace, licensed professional judgement and the requirements of the local regulator.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import xarray as xr

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.data.points import points_dataset
from bayesgeo.explore.variogram import MIN_PAIRS, lag_bins
from bayesgeo.common.pairs import WANT_SQ, column_semivariances, pair_sums
from bayesgeo.fitting.arrays import FitArrays, fit_arrays
from bayesgeo.gp.engines import engine
from bayesgeo.checks.modelcheck import CAUTION, _family_label
from bayesgeo.common.validate import InputError, check_int, check_positive_int

__all__ = ["variogram_check"]

#: Replicates simulated per step of a nearest-neighbour fit's check (one progress update each).
REPLICATE_CHUNK = 25


class _NoBar:
    """Stand-in for a progress bar when none is wanted."""

    def __init__(self, **_):
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def update(self, k: int) -> None:
        pass


# --- the posterior predictive semivariogram -----------------------------------------------------


def _censor_like_data(fa: FitArrays, reps: np.ndarray) -> np.ndarray:
    """Replicates (n, R, model units) recorded as the data were: below a point's reporting limit a value is
    reported at the limit (a non-detect, stored at its limit like those of the data). A non-detect's limit is
    its own; a detected point's is the lowest limit of the data, or its value if lower (it was detected)."""
    if not fa.censored.any():
        return reps
    lowest = float(np.min(fa.z[fa.censored]))
    floor = np.where(fa.censored, fa.z, np.minimum(fa.z, lowest))
    return np.maximum(reps, floor[:, None])


def _ols_residuals(design: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Residuals of ``values`` (n, m) after least squares on the columns of ``design``."""
    q, _ = np.linalg.qr(design)
    return values - q @ (q.T @ values)


def _pick_draws(total: int, replicates: int) -> np.ndarray:
    """Flat draw indices evenly spread over the chains (repeating draws when replicates > total)."""
    if replicates <= total:
        return np.unique(np.round(np.linspace(0, total - 1, replicates)).astype(np.int64))
    return np.arange(replicates) % total


def variogram_check(tree: xr.DataTree, *, replicates: int = 200, bins: int = 15, lag_limit: float | None = None,
                    seed: int | None = None, prob: float = 0.9, curve_points: int = 120, progress=None) -> xr.Dataset:
    """Posterior predictive check of a fit against the empirical semivariogram.

    Parameters
    ----------
    tree : xarray.DataTree
        A single-site fit, or one site of a several-site fit
        (:func:`bayesgeo.fitting.hierarchical.site_fit`: that site's draws and points; its label is kept in
        the ``site`` attribute of the result).
    replicates : int
        Number of replicate data sets (one posterior draw each, evenly spread over the chains;
        draws are reused with new noise when there are fewer draws than replicates).
    bins : int
        Number of lag bins (:func:`bayesgeo.explore.variogram.lag_bins`).
    lag_limit : float, optional
        Largest lag in distance units (default half the largest inter-point distance).
    seed : int, optional
        Seed of the replicate noise; a fresh one is drawn and recorded when omitted. The same
        fit, settings and seed give identical results.
    prob : float
        Probability of the equal-tailed bands (default 0.9: the 5% and 95% quantiles).
    curve_points : int
        Distances at which the model band is evaluated for the figure.
    progress : callable, optional
        ``progress(total=..., desc=...)`` returning a bar with ``update(int)`` used as a context
        manager (such as :func:`bayesgeo.cli._common.progress` with ``enabled`` bound): advanced
        once per replicate and once for the semivariances. The results do not depend on it.

    Returns
    -------
    xarray.Dataset
        Dimension ``bin`` with coordinates ``lag`` (mean pair distance), ``bin_lower``,
        ``bin_upper``; variables ``pairs``, ``observed``, ``replicate_q05``, ``replicate_q50``,
        ``replicate_q95``, ``model_q05``, ``model_q50``, ``model_q95`` (semivariances in squared
        model units at ``lag``), ``p_value`` (share of replicates at or above the observed),
        ``outside`` (observed outside the replicate band), ``few_pairs``; ``replicate_semivariance``
        (replicate, bin) holds every replicate semivariogram; ``curve_q05/q50/q95`` along
        ``distance`` the model band for figures. Attributes record the method, seed, counts,
        units and cautions; ``outside_band`` counts bins outside the replicate band; ``site`` names
        the site ("" for a single-site fit).

    Raises
    ------
    InputError
        Bad ``replicates``, ``bins``, ``lag_limit``, ``seed`` or ``prob``.
    """
    replicates = check_positive_int(replicates, "replicates")
    curve_points = check_positive_int(curve_points, "curve_points", minimum=2)
    if seed is None:
        from bayesgeo.fitting.sampling import new_seed

        seed = new_seed()
    seed = check_int(seed, "--seed", limit="seed")
    if not (0.0 < float(prob) < 1.0):
        raise InputError(f"prob: expected a probability strictly between 0 and 1, got {prob!r}")
    fa = fit_arrays(tree)
    spec = fa.spec
    ds = points_dataset(fa.xy[:, 0], fa.xy[:, 1], fa.z,
                        attrs={"coords": "lonlat" if spec.metric == "greatcircle" else "xy"})
    edges = lag_bins(ds, bins=bins, lag_limit=lag_limit)
    nb = edges.size - 1
    total = fa.draws["sd_z"].size
    picks = _pick_draws(total, replicates)
    rng = np.random.default_rng(seed)
    eng = engine(spec.approx)
    with (progress or _NoBar)(total=picks.size + 1, desc="semivariogram check") as bar:
        parts = []  # chunks draw consecutive noise rows: the same numbers as one call
        for c0 in range(0, picks.size, REPLICATE_CHUNK):
            parts.append(eng.replicates(fa, picks[c0:c0 + REPLICATE_CHUNK], rng))
            bar.update(parts[-1].shape[1])
        # observed and replicated values alike: recorded as the data were (non-detects at their limits), trend
        # removed by OLS, every pair within the largest lag
        values = _ols_residuals(fa.design, np.column_stack([fa.z, _censor_like_data(fa, np.column_stack(parts))]))
        count, dsum, semi = column_semivariances(fa.xy, spec.metric, edges, values)
        observed, rep = semi[0], semi[1:]
        bar.update(1)
    if not np.any(count > 0):
        raise InputError(f"lag_limit: no pair of points lies within {edges[-1]:.4g} {spec.distance_units or 'distance units'}, "
                         "so no lag bin can be checked; use a larger --lag-limit (default: half the largest distance)")
    with np.errstate(invalid="ignore", divide="ignore"):
        lag = np.where(count > 0, dsum / np.maximum(count, 1), 0.5 * (edges[:-1] + edges[1:]))

    lo_q, hi_q = (1.0 - prob) / 2.0, 1.0 - (1.0 - prob) / 2.0
    rq = np.quantile(rep, [lo_q, 0.5, hi_q], axis=0)
    mq = _model_band(fa, lag, [lo_q, 0.5, hi_q])
    dist = np.linspace(0.0, float(edges[-1]), curve_points)
    cq = _model_band(fa, dist, [lo_q, 0.5, hi_q])
    with np.errstate(invalid="ignore"):
        pval = np.where(count > 0, np.mean(rep >= observed[None, :], axis=0), np.nan)
        outside = (count > 0) & ((observed < rq[0]) | (observed > rq[2]))

    sq = f"({spec.model_units})^2"
    dunits = spec.distance_units
    q = _qname
    data = {
        "pairs": ("bin", count.astype(np.int64)),
        "few_pairs": ("bin", count < MIN_PAIRS),
        "observed": ("bin", observed, {"units": sq, "long_name": "empirical semivariance of the detrended modelled values"}),
        "replicate_semivariance": (("replicate", "bin"), rep, {"units": sq}),
        f"replicate_{q(lo_q)}": ("bin", rq[0], {"units": sq, "quantile": lo_q}),
        "replicate_q50": ("bin", rq[1], {"units": sq, "quantile": 0.5}),
        f"replicate_{q(hi_q)}": ("bin", rq[2], {"units": sq, "quantile": hi_q}),
        f"model_{q(lo_q)}": ("bin", mq[0], {"units": sq, "quantile": lo_q}),
        "model_q50": ("bin", mq[1], {"units": sq, "quantile": 0.5}),
        f"model_{q(hi_q)}": ("bin", mq[2], {"units": sq, "quantile": hi_q}),
        "p_value": ("bin", pval, {"definition": "share of replicates with semivariance >= observed"}),
        "outside": ("bin", outside),
        f"curve_{q(lo_q)}": ("distance", cq[0], {"units": sq}),
        "curve_q50": ("distance", cq[1], {"units": sq}),
        f"curve_{q(hi_q)}": ("distance", cq[2], {"units": sq}),
    }
    coords = {
        "bin": np.arange(nb),
        "lag": ("bin", lag, {"units": dunits, "long_name": "mean distance of the pairs in the bin"}),
        "bin_lower": ("bin", edges[:-1], {"units": dunits}),
        "bin_upper": ("bin", edges[1:], {"units": dunits}),
        "distance": ("distance", dist, {"units": dunits}),
        "replicate": np.arange(picks.size),
        "draw_index": ("replicate", picks, {"long_name": "flat (chain-major) index of the posterior draw"}),
    }
    few = [int(b) for b in np.flatnonzero((count > 0) & (count < MIN_PAIRS))]
    cautions = []
    if int(outside.sum()):
        cautions.append(f"{int(outside.sum())} of {int((count > 0).sum())} lag bins lie outside the {prob:.0%} "
                        "replicate band: the model may not reproduce the spatial structure there")
    if few:
        cautions.append(f"lag bins {', '.join(map(str, few))} hold fewer than {MIN_PAIRS} pairs; their semivariances "
                        "scatter widely")
    cautions.append("the band is pointwise: with many bins, one or two bins outside it are expected by chance")
    if fa.censored.any():
        cautions.append(f"{int(fa.censored.sum())} non-detects: observed and replicated values are both recorded with "
                        "values below a reporting limit at that limit, so compare the observed curve with the replicate "
                        "band; the model band is of the uncensored field and lies below them at short lags")
    axes = _axis_check(fa, edges, values, (lo_q, 0.5, hi_q)) if "anisotropy_z" in fa.draws else None
    if axes is not None and int(axes["axis_outside"].sum()):
        cautions.insert(0, f"{int(axes['axis_outside'].sum())} lag bins along the anisotropy axes lie outside the "
                        f"{prob:.0%} replicate band: the fitted direction or ratio may not reproduce the data there")
    cautions.append(CAUTION)
    attrs = {
        "method": "posterior predictive replicates at the data locations; trend removed by OLS from observed and "
                  "replicated values alike; classical (Matheron) estimator on shared lag bins",
        "model_band": "sigma^2 (1 - rho(h)) + tau^2 per posterior draw (all draws)",
        "simulation": eng.simulation(spec.neighbours),
        "non_detects": int(fa.censored.sum()),
        "replicates": int(picks.size),
        "draws_total": int(total),
        "seed": int(seed),
        "prob": float(prob),
        "bins": int(nb),
        "lag_limit": float(edges[-1]),
        "covariance": _family_label(fa),
        "site": str(tree.attrs.get("site", "")),
        "transform": spec.transform or "none",
        "trend_terms": list(spec.terms),
        "model_units": spec.model_units,
        "distance_units": dunits,
        "outside_band": int(outside.sum()),
        "few_pairs_bins": few,
        "cautions": cautions,
    }
    out = xr.Dataset(data, coords=coords, attrs=attrs)
    if axes is not None:
        out = out.merge(axes)
        out.attrs["outside_band_axes"] = int(axes["axis_outside"].sum())
        out.attrs["model_band"] += ("; the omnidirectional model band is that of the geometric-mean range (an "
                                    "anisotropic fit: see the axis_* bands)")
    return out


def _axis_check(fa: FitArrays, edges: np.ndarray, values: np.ndarray, quantiles, tolerance: float = 22.5):
    """Observed and replicated semivariograms along the major and minor axis of an anisotropic fit (module
    docstring): ``values`` (n, 1 + replicates) detrended, observed first."""
    from bayesgeo.gp.anisotropy import angle_ratio, circular_mean

    spec = fa.spec
    angle, ratio = angle_ratio(fa.draws["anisotropy_z"].reshape(-1, 2))
    centre = float(circular_mean(angle))
    azimuths = [centre, (centre + 90.0) % 180.0]
    sums = pair_sums(fa.xy[:, 0], fa.xy[:, 1], values, group=np.zeros(len(fa.xy), np.int64), edges=edges,
                     greatcircle=False, directions=azimuths, tolerance=tolerance, want=WANT_SQ)
    count, dsum = sums["count"], sums["dsum"]
    with np.errstate(invalid="ignore", divide="ignore"):
        semi = sums["sq"] / (2.0 * count[:, :, None])  # (axis, bin, column)
        lag = np.where(count > 0, dsum / np.maximum(count, 1), 0.5 * (edges[:-1] + edges[1:])[None, :])
    observed, rep = semi[:, :, 0], np.moveaxis(semi[:, :, 1:], 2, 1)  # (axis, bin), (axis, replicate, bin)
    rq = np.quantile(rep, list(quantiles), axis=1)  # (q, axis, bin)
    cov = get_covariance(spec.covariance, spec.nu if spec.covariance == "matern" else None)
    scale = spec.scale_of(fa.draws["practical_range_z"].reshape(-1))
    s2 = spec.variance_of(fa.draws["sd_z"].reshape(-1))
    t2 = spec.variance_of(fa.draws["nugget_sd_z"].reshape(-1))
    model = []
    for j, factor in enumerate((np.sqrt(ratio), 1.0 / np.sqrt(ratio))):  # major, minor
        rho = cov.correlation(lag[j][None, :], (scale * factor)[:, None])
        gam = s2[:, None] * (1.0 - rho) + np.where(lag[j][None, :] > 0, t2[:, None], 0.0)
        model.append(np.quantile(gam, list(quantiles), axis=0))
    model = np.stack(model, axis=1)  # (q, axis, bin)
    with np.errstate(invalid="ignore"):
        pval = np.where(count > 0, np.mean(rep >= observed[:, None, :], axis=1), np.nan)
        outside = (count > 0) & ((observed < rq[0]) | (observed > rq[-1]))
    sq = f"({spec.model_units})^2"
    dims = ("axis", "bin")
    data = {"axis_pairs": (dims, count.astype(np.int64)), "axis_lag": (dims, lag, {"units": spec.distance_units}),
            "axis_observed": (dims, observed, {"units": sq}), "axis_p_value": (dims, pval),
            "axis_outside": (dims, outside)}
    for i, q in enumerate(quantiles):
        data[f"axis_replicate_{_qname(q)}"] = (dims, rq[i], {"units": sq, "quantile": q})
        data[f"axis_model_{_qname(q)}"] = (dims, model[i], {"units": sq, "quantile": q})
    return xr.Dataset(data, coords={"axis": ["major", "minor"], "axis_azimuth": ("axis", azimuths, {
        "units": "degrees", "long_name": f"direction of the sector (+-{tolerance:g} degrees), clockwise from north"})})


def _qname(p: float) -> str:
    return f"q{int(round(p * 100)):02d}"


def _model_band(fa: FitArrays, h: np.ndarray, quantiles: Sequence[float]) -> np.ndarray:
    """Quantiles over draws of gamma(h) = sigma^2 (1 - rho(h)) + tau^2 in squared model units."""
    spec = fa.spec
    cov = get_covariance(spec.covariance, spec.nu if spec.covariance == "matern" else None)
    scale = spec.scale_of(fa.draws["practical_range_z"].reshape(-1))
    s2 = spec.variance_of(fa.draws["sd_z"].reshape(-1))
    t2 = spec.variance_of(fa.draws["nugget_sd_z"].reshape(-1))
    h = np.asarray(h, dtype=float)
    rho = cov.correlation(h[None, :], scale[:, None])
    gam = s2[:, None] * (1.0 - rho) + np.where(h[None, :] > 0, t2[:, None], 0.0)
    return np.quantile(gam, list(quantiles), axis=0)

