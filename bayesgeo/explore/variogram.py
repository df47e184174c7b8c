"""Exploratory pair statistics: empirical semivariogram, correlogram, permutation envelopes, directions.

Every function takes the intake ``Dataset`` (see :func:`bayesgeo.read_points`) and uses
``ds["residual"]`` when present (after :func:`bayesgeo.explore.trend.fit_trend`), else ``ds["value"]``, or
the variable named by ``variable=``. Pairs are formed only between points of the same site when
``ds`` has a ``site`` coordinate (a pooled within-site statistic); permutations then shuffle the
values within each site.

Lag bins are uniform from 0 to ``lag_limit`` (default: half the largest inter-point distance, a rule
of thumb usually credited to Journel and Huijbregts 1978, *Mining Geostatistics*). A pair at
distance d falls in bin floor(d / width); pairs beyond ``lag_limit`` are left out. Distances are
Euclidean in coordinate units, or great-circle (haversine) km for lon/lat data.

Directions are azimuths in degrees clockwise from north (+y), folded to [0, 180) since a pair has
no head or tail; a pair belongs to a direction when its azimuth is within ``tolerance`` of it. For
lon/lat data the azimuth of a pair is taken on a local plane (east = longitude difference times
the cosine of the mean latitude), which suits surveys of a few hundred km or less.

Estimators, for the N(h) pairs in a bin:

* classical (Matheron 1962): gamma(h) = sum (z_i - z_j)^2 / (2 N(h));
* cressie-hawkins (Cressie and Hawkins 1980, Math. Geol. 12):
  2 gamma(h) = [mean |z_i - z_j|^(1/2)]^4 / (0.457 + 0.494 / N(h));
* correlogram: the Pearson correlation of the pair values with each pair counted in both orders
  (head and tail lists symmetric), plus a first bin at lag 0 holding each point with itself
  (correlation exactly 1).

Permutation envelopes: the values are shuffled over the fixed locations ``permutations`` times
and the statistic recomputed. Permutation k (k = 1..N) is, for each site in sorted order of the
labels, ``z_site[rng.permutation(n_site)]`` with ``rng = numpy.random.default_rng(seed)``, so the
same seed gives the same envelope. The values are centred on their mean first (neither statistic
changes with a shift). ``envelope_low``
and ``envelope_high`` are the pointwise 2.5% and 97.5% quantiles (linear interpolation, numpy
default) of the permutation statistics; ``p_value`` is the two-sided Monte Carlo p-value

    p = (1 + #{k : |T_k - m| >= |T_obs - m|}) / (1 + N),

with T_k the N permutation statistics of the bin and m their mean; differences equal up to
rounding (1e-12 relative) count as ties, hence as extreme. Counting the observed value keeps p >=
1 / (1 + N) (Davison and Hinkley 1997, *Bootstrap Methods and their Application*, ch. 4).

Bins with fewer than 30 pairs (common practice, same source) are listed in
``attrs["few_pairs_bins"]`` and flagged by a :class:`FewPairsWarning`.

Sums are accumulated in row blocks shared among ``numba.get_num_threads()`` threads and added in a
fixed order: the same data, settings, seed and thread count give identical numbers (another thread
count changes them only in the last bits).

These are exploratory summaries under an assumption of stationarity. Results that bear on
contamination or exposure support, and never replace, the judgement of a licensed professional and
the rules of the local regulator.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import numpy as np
import xarray as xr

from bayesgeo.common.geometry import metric_of
from bayesgeo.common.validate import InputError, check_choice, check_int, check_positive, check_positive_int

__all__ = [
    "ESTIMATORS",
    "MIN_PAIRS",
    "FewPairsWarning",
    "lag_bins",
    "semivariogram",
    "correlogram",
    "directional_semivariograms",
]

#: Semivariogram estimators.
ESTIMATORS = ("classical", "cressie-hawkins")
#: Fewest pairs per lag bin for a trustworthy estimate (common practice).
MIN_PAIRS = 30
#: Constants of the Cressie-Hawkins estimator: 0.457 = (E|Z|^(1/2))^4 for Z ~ N(0, 1).
_CH_A, _CH_B = 0.457, 0.494
# sums the pair kernel accumulates (bit flags of bayesgeo.common.pairs)
_WANT_SQ, _WANT_ROOT, _WANT_CORR = 1, 2, 4

CAUTION = (
    "Exploratory summary assuming stationarity; it supports, and does not replace, licensed professional "
    "judgement and local regulatory requirements."
)


class FewPairsWarning(UserWarning):
    """Some lag bins hold fewer than :data:`MIN_PAIRS` pairs."""


# --- inputs -----------------------------------------------------------------------------------


def _values(ds: xr.Dataset, variable: str | None) -> tuple[str, np.ndarray]:
    name = variable or ("residual" if "residual" in ds.data_vars else "value")
    if name not in ds.variables:
        raise InputError(f"variable: {name!r} is not a variable of the data (have: {', '.join(map(str, ds.data_vars))})")
    z = np.asarray(ds[name].values, dtype=float)
    if z.ndim != 1 or z.size != ds.sizes.get("obs", -1):
        raise InputError(f"variable: {name!r} is not a variable along 'obs'")
    bad = ~np.isfinite(z)
    if bad.any():
        rows = ds["row"].values[bad] if "row" in ds.coords else np.flatnonzero(bad)
        raise InputError(f"{name}: NaN or infinite values at rows {', '.join(map(str, rows[:10]))}")
    return name, z


def _groups(ds: xr.Dataset) -> np.ndarray:
    if "site" not in ds.coords:
        return np.zeros(ds.sizes["obs"], dtype=np.int64)
    _, codes = np.unique(ds["site"].values, return_inverse=True)
    return codes.astype(np.int64)


def _check_common(bins, lag_limit, permutations, seed):
    bins = check_positive_int(bins, "bins")
    if lag_limit is not None:
        lag_limit = check_positive(lag_limit, "lag_limit")
    permutations = check_positive_int(permutations, "permutations", minimum=0)
    if seed is not None:
        seed = check_int(seed, "--seed", limit="seed")
    return bins, lag_limit, permutations, seed


def _check_tolerance(tolerance) -> float:
    tol = check_positive(tolerance, "tolerance")
    if tol > 90.0:
        raise InputError(f"tolerance: {tolerance!r} degrees is over 90 (90 already takes every direction)")
    return tol


def lag_bins(ds: xr.Dataset, *, bins: int = 15, lag_limit: float | None = None) -> np.ndarray:
    """Uniform lag-bin edges from 0 to ``lag_limit``.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data along ``obs``.
    bins : int
        Number of bins.
    lag_limit : float, optional
        Largest lag (distance units of the data: coordinate units, or km for lon/lat). Default:
        half the largest distance between two points (of the same site when ``ds`` has a
        ``site`` coordinate), common practice.

    Returns
    -------
    ndarray, shape (bins + 1,)
    """
    from bayesgeo.common import pairs as _pairs
    bins = check_positive_int(bins, "bins")
    if lag_limit is None:
        greatcircle = metric_of(ds) == "greatcircle"
        far = _pairs.max_pair_distance(ds["x"].values, ds["y"].values, group=_groups(ds), greatcircle=greatcircle)
        if not far > 0.0:
            raise InputError("no two points (of one site) at distinct locations: no lag to bin")
        lag_limit = 0.5 * far
    else:
        lag_limit = check_positive(lag_limit, "lag_limit")
    return np.linspace(0.0, float(lag_limit), bins + 1)


# --- shared computation -------------------------------------------------------------------------


def _compute(ds, *, bins, lag_limit, permutations, seed, directions, tolerance, variable, want):
    from bayesgeo.common import pairs as _pairs  # numba loads on first use, not on `import bayesgeo`

    bins, lag_limit, permutations, seed = _check_common(bins, lag_limit, permutations, seed)
    name, z = _values(ds, variable)
    edges = lag_bins(ds, bins=bins, lag_limit=lag_limit)
    group = _groups(ds)
    rng = np.random.default_rng(seed) if permutations else None
    # Correlation and semivariance do not change with a shift of the values: centring keeps the
    # pair sums free of cancellation.
    zc = z - z.mean()
    cols = _pairs.permuted_columns(zc, permutations, rng, group)
    sums = _pairs.pair_sums(
        ds["x"].values, ds["y"].values, cols, group=group, edges=edges,
        greatcircle=metric_of(ds) == "greatcircle", directions=directions, tolerance=tolerance, want=want,
    )
    return name, z, edges, sums, permutations, seed


def _lags(count, dsum, edges):
    centre = 0.5 * (edges[:-1] + edges[1:])
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(count > 0, dsum / np.maximum(count, 1), centre)


def _envelope(stat: np.ndarray, permutations: int):
    """Observed column 0, permutation columns 1..: envelope and two-sided p-value (last axis)."""
    obs = stat[..., 0]
    if not permutations:
        return obs, None
    perm = stat[..., 1:]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        low = np.quantile(perm, 0.025, axis=-1)
        high = np.quantile(perm, 0.975, axis=-1)
        centre = perm.mean(axis=-1)
        extreme = np.abs(perm - centre[..., None]) >= np.abs(obs - centre)[..., None] - 1e-12 * np.abs(centre[..., None])
        p = (1.0 + extreme.sum(axis=-1)) / (1.0 + permutations)
    p = np.where(np.isfinite(obs), p, np.nan)
    return obs, (low, high, p)


def _few_pairs(count: np.ndarray, kind: str, first_bin: int = 0) -> list[int]:
    few = np.flatnonzero((count < MIN_PAIRS).any(axis=0)) + first_bin
    if few.size:
        warnings.warn(
            f"{kind}: lag bins {', '.join(map(str, few))} have fewer than {MIN_PAIRS} pairs; "
            "estimates there are unreliable (widen the bins or lower --lag-limit)",
            FewPairsWarning, stacklevel=3,
        )
    return [int(b) for b in few]


def _attrs(ds, name, edges, permutations, seed, azimuth, tolerance, extra) -> dict:
    vunits = ds[name].attrs.get("units", "") or ds.attrs.get("value_units", "")
    return {
        "variable": name,
        "n_points": int(ds.sizes["obs"]),
        "bins": int(edges.size - 1),
        "lag_limit": float(edges[-1]),
        "permutations": int(permutations),
        "seed": "none" if seed is None else int(seed),
        "distance_units": ds.attrs.get("distance_units", ""),
        "value_units": vunits,
        "metric": metric_of(ds),
        "pairs_within": "site" if "site" in ds.coords else "all points",
        "azimuth": "omnidirectional" if azimuth is None else azimuth,
        "tolerance": 90.0 if azimuth is None else float(tolerance),
        "min_pairs": MIN_PAIRS,
        "envelope": "pointwise 2.5% and 97.5% quantiles of the permutation statistics",
        "p_value": "(1 + #{|T_perm - mean(T_perm)| >= |T_obs - mean(T_perm)|}) / (1 + permutations)",
        "caution": CAUTION,
        **extra,
    }


def _build(stat_name, stat, count, lags, edges, env, attrs, *, azimuths=None, units=""):
    """Assemble the output Dataset; arrays carry a leading direction axis of length 1 or more."""
    dims = ("azimuth", "bin") if azimuths is not None else ("bin",)
    squeeze = (lambda a: a) if azimuths is not None else (lambda a: a[0])
    nb = edges.size - 1
    coords = {
        "bin": np.arange(nb),
        "lag": (dims, squeeze(lags), {"units": attrs["distance_units"], "long_name": "mean distance of the pairs in the bin"}),
        "bin_lower": ("bin", edges[:-1], {"units": attrs["distance_units"]}),
        "bin_upper": ("bin", edges[1:], {"units": attrs["distance_units"]}),
    }
    if azimuths is not None:
        coords["azimuth"] = ("azimuth", np.asarray(azimuths, dtype=float),
                             {"units": "degrees clockwise from north", "tolerance": attrs["tolerance"]})
    data = {
        stat_name: (dims, squeeze(stat), {"units": units}),
        "pairs": (dims, squeeze(count).astype(np.int64)),
        "few_pairs": (dims, squeeze(count < MIN_PAIRS)),
    }
    if env is not None:
        low, high, p = env
        data["envelope_low"] = (dims, squeeze(low), {"units": units, "quantile": 0.025})
        data["envelope_high"] = (dims, squeeze(high), {"units": units, "quantile": 0.975})
        data["p_value"] = (dims, squeeze(p), {"definition": attrs["p_value"]})
    return xr.Dataset(data, coords=coords, attrs=attrs)


# --- public statistics --------------------------------------------------------------------------


def _semivariances(sums, estimator):
    count = sums["count"][..., None].astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        if estimator == "classical":
            return sums["sq"] / (2.0 * count)
        mean_root = sums["root"] / count
        return 0.5 * mean_root**4 / (_CH_A + _CH_B / count)


def _semivariogram(ds, *, bins, lag_limit, estimator, permutations, seed, directions, tolerance, variable):
    check_choice(estimator, ESTIMATORS, "estimator")
    want = _WANT_SQ if estimator == "classical" else _WANT_ROOT
    name, _, edges, sums, permutations, seed = _compute(
        ds, bins=bins, lag_limit=lag_limit, permutations=permutations, seed=seed, directions=directions,
        tolerance=tolerance, variable=variable, want=want,
    )
    gamma = _semivariances(sums, estimator)
    obs, env = _envelope(gamma, permutations)
    lags = _lags(sums["count"], sums["dsum"], edges)
    ref = ("Matheron (1962), Traite de geostatistique appliquee" if estimator == "classical"
           else "Cressie and Hawkins (1980), Mathematical Geology 12, 115-125")
    return name, edges, sums["count"], lags, obs, env, permutations, seed, {"estimator": estimator, "reference": ref}


def semivariogram(
    ds: xr.Dataset,
    *,
    bins: int = 15,
    lag_limit: float | None = None,
    estimator: str = "classical",
    permutations: int = 0,
    seed: int | None = None,
    azimuth: float | None = None,
    tolerance: float = 22.5,
    variable: str | None = None,
) -> xr.Dataset:
    """Empirical semivariogram with optional permutation envelope.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data along ``obs``.
    bins : int
        Number of uniform lag bins from 0 to ``lag_limit``.
    lag_limit : float, optional
        Largest lag in distance units (default half the largest inter-point distance).
    estimator : {"classical", "cressie-hawkins"}
        Matheron's method-of-moments estimator or the robust Cressie-Hawkins one (module docstring).
    permutations : int
        Number of random permutations of the values for the envelope and p-values (0: none).
    seed : int, optional
        Seed of the permutations; the same seed gives the same envelope.
    azimuth : float, optional
        Direction in degrees clockwise from north (+y); pairs whose direction lies within
        ``tolerance`` of it (either way, directions folded to [0, 180)) are used. None: all pairs.
    tolerance : float
        Half-width of the direction sector in degrees (0-90].
    variable : str, optional
        Variable to analyse (default ``residual`` if present, else ``value``).

    Returns
    -------
    xarray.Dataset
        Dimension ``bin``; coordinates ``lag`` (mean pair distance, bin centre when empty),
        ``bin_lower``, ``bin_upper``; variables ``semivariance`` (value units squared, NaN in
        empty bins), ``pairs``, ``few_pairs`` and, with permutations, ``envelope_low``,
        ``envelope_high``, ``p_value``. Attributes record how it was made (estimator, bins,
        lag_limit, permutations, seed, units, azimuth, tolerance, few_pairs_bins, ...).

    Warns
    -----
    FewPairsWarning
        When some bins hold fewer than 30 pairs.
    """
    directions = None
    if azimuth is not None:
        tolerance = _check_tolerance(tolerance)
        directions = [float(azimuth)]
    name, edges, count, lags, obs, env, permutations, seed, extra = _semivariogram(
        ds, bins=bins, lag_limit=lag_limit, estimator=estimator, permutations=permutations, seed=seed,
        directions=directions, tolerance=tolerance, variable=variable,
    )
    attrs = _attrs(ds, name, edges, permutations, seed, None if azimuth is None else float(azimuth), tolerance, extra)
    attrs["few_pairs_bins"] = _few_pairs(count, "semivariogram")
    units = f"({attrs['value_units']})^2" if attrs["value_units"] else ""
    return _build("semivariance", obs, count, lags, edges, env, attrs, units=units)


def directional_semivariograms(
    ds: xr.Dataset,
    *,
    azimuths: Sequence[float] = (0, 45, 90, 135),
    tolerance: float = 22.5,
    **kw,
) -> xr.Dataset:
    """Semivariograms in several directions from one pass over the pairs.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data along ``obs``.
    azimuths : sequence of float
        Directions in degrees clockwise from north (+y); 90 is east-west.
    tolerance : float
        Half-width of each direction sector in degrees (0-90].
    **kw
        ``bins``, ``lag_limit``, ``estimator``, ``permutations``, ``seed``, ``variable`` as in
        :func:`semivariogram` (the same permutations serve every direction).

    Returns
    -------
    xarray.Dataset
        As :func:`semivariogram` with an extra leading dimension ``azimuth``; ``lag`` has dims
        ``(azimuth, bin)``. ``few_pairs_bins`` lists bins short of pairs in any direction.
    """
    unknown = set(kw) - {"bins", "lag_limit", "estimator", "permutations", "seed", "variable"}
    if unknown:
        raise TypeError(f"unexpected keyword arguments: {', '.join(sorted(unknown))}")
    tolerance = _check_tolerance(tolerance)
    azimuths = [float(a) for a in azimuths]
    if not azimuths:
        raise InputError("azimuths: give at least one direction")
    opts = {"bins": 15, "lag_limit": None, "estimator": "classical", "permutations": 0, "seed": None, "variable": None}
    opts.update(kw)
    name, edges, count, lags, obs, env, permutations, seed, extra = _semivariogram(
        ds, directions=azimuths, tolerance=tolerance, **opts,
    )
    attrs = _attrs(ds, name, edges, permutations, seed, "see coordinate azimuth", tolerance, extra)
    attrs["few_pairs_bins"] = _few_pairs(count, "directional semivariograms")
    units = f"({attrs['value_units']})^2" if attrs["value_units"] else ""
    return _build("semivariance", obs, count, lags, edges, env, attrs, azimuths=azimuths, units=units)


def correlogram(
    ds: xr.Dataset,
    *,
    bins: int = 15,
    lag_limit: float | None = None,
    permutations: int = 0,
    seed: int | None = None,
    azimuth: float | None = None,
    tolerance: float = 22.5,
    variable: str | None = None,
) -> xr.Dataset:
    """Empirical correlogram with optional permutation envelope.

    In each bin, the Pearson correlation of the pair values with each pair counted in both
    orders: with S1 = sum (z_i + z_j), S2 = sum (z_i^2 + z_j^2), S12 = sum z_i z_j over the N
    pairs, mean m = S1 / 2N and

        r = (S12 / N - m^2) / (S2 / 2N - m^2).

    Bin 0 is the lag-0 bin (``lag`` = ``bin_lower`` = ``bin_upper`` = 0, ``pairs`` = n, each point
    with itself, correlation exactly 1, envelope 1 and p-value 1 when permuted); bins 1..``bins``
    are the lag bins of :func:`lag_bins`. Parameters as in :func:`semivariogram`.

    Returns
    -------
    xarray.Dataset
        Dimension ``bin`` (``bins + 1`` long), variables ``correlation``, ``pairs``,
        ``few_pairs`` (never for the lag-0 bin) and, with permutations, ``envelope_low``,
        ``envelope_high``, ``p_value``; coordinates and attributes as in :func:`semivariogram`.
    """
    directions = None
    if azimuth is not None:
        tolerance = _check_tolerance(tolerance)
        directions = [float(azimuth)]
    name, z, edges, sums, permutations, seed = _compute(
        ds, bins=bins, lag_limit=lag_limit, permutations=permutations, seed=seed, directions=directions,
        tolerance=tolerance, variable=variable, want=_WANT_CORR,
    )
    count = sums["count"][..., None].astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        m = sums["s1"] / (2.0 * count)
        cov = sums["s12"] / count - m * m
        var = sums["s2"] / (2.0 * count) - m * m
        r = np.where(var > 0, cov / var, np.nan)
    ncol = r.shape[-1]
    r = np.concatenate([np.ones((1, 1, ncol)), r], axis=1)  # lag-0 bin
    obs, env = _envelope(r, permutations)
    cnt = np.concatenate([[[z.size]], sums["count"]], axis=1)
    lags = np.concatenate([[[0.0]], _lags(sums["count"], sums["dsum"], edges)], axis=1)
    extra = {"estimator": "pearson (pairs in both orders)", "reference": "Pearson correlation of head and tail values"}
    attrs = _attrs(ds, name, edges, permutations, seed, None if azimuth is None else float(azimuth), tolerance, extra)
    attrs["bins"] = int(edges.size - 1)
    attrs["few_pairs_bins"] = _few_pairs(sums["count"], "correlogram", first_bin=1)
    out = _build("correlation", obs, cnt, lags, np.concatenate([[0.0], edges]), env, attrs)
    out["few_pairs"][0] = False
    return out
