"""Exploratory pair statistics checked against brute force over all pairs (scipy pdist, numpy
corrcoef), published estimator formulas and facts derivable by hand."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.spatial.distance import pdist

from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.explore.variogram import (
    FewPairsWarning,
    correlogram,
    directional_semivariograms,
    lag_bins,
    semivariogram,
)
from bayesgeo.common.geometry import cross_distance
from bayesgeo.explore.trend import fit_trend
from bayesgeo.common.validate import InputError

pytestmark = pytest.mark.filterwarnings("ignore::bayesgeo.explore.variogram.FewPairsWarning")


def _ds(x, y, z, site=None, coords="xy"):
    units = "km" if coords == "lonlat" else "m"
    return points_dataset(x, y, z, site=site, attrs={"coords": coords, "distance_units": units, "value_units": "mg/kg"})


def _random(n=60, seed=0, span=100.0):
    rng = np.random.default_rng(seed)
    return _ds(span * rng.random(n), span * rng.random(n), rng.lognormal(1.0, 0.6, n))


def _brute_pairs(ds, edges):
    """All pairs i < j by scipy pdist, their bin (floor(d / width)), |dz|, and i, j."""
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    z = ds["value"].values
    d = pdist(xy)
    adz = pdist(z[:, None], "cityblock")
    i, j = np.triu_indices(len(z), k=1)  # same order as pdist
    keep = d <= edges[-1]
    k = np.minimum((d[keep] / (edges[1] - edges[0])).astype(int), len(edges) - 2)
    return d[keep], adz[keep], k, i[keep], j[keep]


def _field(n, seed, practical_range, side=1.0, nugget=0.0):
    rng = np.random.default_rng(seed)
    xy = side * rng.random((n, 2))
    z = simulate_field(xy, covariance="exponential", practical_range=practical_range, partial_sill=1.0,
                       nugget=nugget, rng=rng)
    return _ds(xy[:, 0], xy[:, 1], z)


# --- exact results ----------------------------------------------------------------------------


def test_linear_trend_transect_gives_a2h2_over_2():
    """z = a x on a regular transect: every pair at lag h has dz = a h, so gamma(h) = a^2 h^2 / 2
    exactly (derivable by hand), with N(h) = n - h pairs. Bins of width 1.05 hold exactly one grid
    lag each, strictly inside the bin."""
    a, n = 0.7, 30
    x = np.arange(n, dtype=float)
    sv = semivariogram(_ds(x, np.zeros(n), a * x), bins=10, lag_limit=10.5)
    h = np.arange(1, 11, dtype=float)
    np.testing.assert_allclose(sv["lag"].values, h, rtol=1e-12)
    np.testing.assert_allclose(sv["semivariance"].values, a**2 * h**2 / 2, rtol=1e-10)
    np.testing.assert_array_equal(sv["pairs"].values, n - h.astype(int))


def test_all_pairs_in_one_bin_equals_sample_variance():
    """Over all n(n-1)/2 pairs, sum (z_i - z_j)^2 / 2 = n sum (z_i - mean)^2 / 2, so the classical
    semivariance of one bin holding every pair is the sample variance with ddof = 1 (algebraic
    identity)."""
    ds = _random(n=45, seed=1)
    far = pdist(np.column_stack([ds["x"].values, ds["y"].values])).max()
    sv = semivariogram(ds, bins=1, lag_limit=far)
    assert int(sv["pairs"][0]) == 45 * 44 // 2
    assert float(sv["semivariance"][0]) == pytest.approx(np.var(ds["value"].values, ddof=1), rel=1e-12)


def test_classical_and_cressie_hawkins_equal_brute_force():
    """Matheron (1962): gamma = sum dz^2 / (2 N); Cressie and Hawkins (1980, Math. Geol. 12, eq. 2.4):
    2 gamma = [mean |dz|^(1/2)]^4 / (0.457 + 0.494 / N) (constants from memory, 0.457 checked as
    (E|Z|^(1/2))^4 for Z ~ N(0, 1)); both computed by brute force over scipy pdist pairs."""
    ds = _random(n=70, seed=2)
    edges = lag_bins(ds, bins=6, lag_limit=55.0)
    d, adz, k, _, _ = _brute_pairs(ds, edges)
    classical = semivariogram(ds, bins=6, lag_limit=55.0)
    robust = semivariogram(ds, bins=6, lag_limit=55.0, estimator="cressie-hawkins")
    for b in range(6):
        sel = k == b
        nb = sel.sum()
        assert nb > 30
        assert int(classical["pairs"][b]) == nb
        assert float(classical["lag"][b]) == pytest.approx(d[sel].mean(), rel=1e-12)
        assert float(classical["semivariance"][b]) == pytest.approx(np.sum(adz[sel] ** 2) / (2 * nb), rel=1e-10)
        ch = 0.5 * np.mean(np.sqrt(adz[sel])) ** 4 / (0.457 + 0.494 / nb)
        assert float(robust["semivariance"][b]) == pytest.approx(ch, rel=1e-10)
    assert robust.attrs["estimator"] == "cressie-hawkins"


def test_cressie_hawkins_constant():
    """0.457 ~= (E|Z|^(1/2))^4 for Z ~ N(0, 1), with E|Z|^(1/2) = 2^(1/4) Gamma(3/4) / sqrt(pi)
    (absolute moments of the normal distribution)."""
    from scipy.special import gamma

    assert (2**0.25 * gamma(0.75) / np.sqrt(np.pi)) ** 4 == pytest.approx(0.457, abs=5e-4)


def test_correlogram_equals_numpy_corrcoef_of_symmetric_pairs():
    """Each bin is numpy.corrcoef of head and tail values with every pair in both orders (reference:
    numpy); the lag-0 bin holds n self-pairs with correlation exactly 1."""
    ds = _field(80, seed=3, practical_range=0.4)
    cg = correlogram(ds, bins=5, lag_limit=0.5)
    assert float(cg["correlation"][0]) == 1.0 and int(cg["pairs"][0]) == 80 and float(cg["lag"][0]) == 0.0
    edges = lag_bins(ds, bins=5, lag_limit=0.5)
    _, _, k, i, j = _brute_pairs(ds, edges)
    z = ds["value"].values
    for b in range(5):
        sel = k == b
        head = np.concatenate([z[i[sel]], z[j[sel]]])
        tail = np.concatenate([z[j[sel]], z[i[sel]]])
        assert float(cg["correlation"][b + 1]) == pytest.approx(np.corrcoef(head, tail)[0, 1], rel=1e-9, abs=1e-12)
        assert int(cg["pairs"][b + 1]) == sel.sum()
    np.testing.assert_allclose(cg["bin_upper"].values[1:], edges[1:])
    assert cg["correlation"].values[1] > 0.3  # a correlated field at short lag


def test_correlogram_unaffected_by_large_offset():
    """Correlation does not change when a constant is added (Pearson correlation is shift invariant);
    values near 1e6 must not lose the answer to cancellation."""
    ds = _field(60, seed=4, practical_range=0.4)
    shifted = ds.copy()
    shifted["value"] = ds["value"] + 1e6
    a = correlogram(ds, bins=4, lag_limit=0.5)["correlation"].values
    b = correlogram(shifted, bins=4, lag_limit=0.5)["correlation"].values
    np.testing.assert_allclose(a, b, atol=1e-8)


def test_plateau_approaches_sample_variance_beyond_range():
    """gamma(h) = C(0) - C(h) and C(h) ~ 0 beyond the range, so the semivariogram levels off at the
    variance (common practice; Journel and Huijbregts 1978). Exponential field, n = 2,000, practical
    range 0.05 in a unit square: bins beyond 0.15 within 10% of the sample variance, and short lags
    well below it."""
    ds = _field(2000, seed=5, practical_range=0.05)
    sv = semivariogram(ds, bins=20, lag_limit=0.6)
    s2 = np.var(ds["value"].values, ddof=1)
    far = sv["semivariance"].where(sv["lag"] > 0.15, drop=True).values
    np.testing.assert_allclose(far, s2, rtol=0.10)
    assert float(sv["semivariance"][0]) < 0.75 * s2


# --- permutations -----------------------------------------------------------------------------


def test_permutations_reproducible_and_ordered():
    """The same seed gives identical envelopes (numpy Generator); another seed differs;
    envelope_low <= envelope_high everywhere."""
    ds = _random(n=50, seed=6)
    a = semivariogram(ds, bins=5, permutations=39, seed=11)
    b = semivariogram(ds, bins=5, permutations=39, seed=11)
    c = semivariogram(ds, bins=5, permutations=39, seed=12)
    for v in ("envelope_low", "envelope_high", "p_value"):
        np.testing.assert_array_equal(a[v].values, b[v].values)
    assert not np.array_equal(a["envelope_high"].values, c["envelope_high"].values)
    assert np.all(a["envelope_low"].values <= a["envelope_high"].values)
    assert a.attrs["seed"] == 11 and a.attrs["permutations"] == 39


def test_envelope_and_p_value_match_brute_force_definition():
    """Envelope = numpy 2.5%/97.5% quantiles of the permutation semivariograms; p = (1 + #{|T_k - m| >=
    |T_obs - m|}) / (1 + N) with m the permutation mean (Monte Carlo p-value counting the observed
    value, Davison and Hinkley 1997, sec. 4.3). Permutation k is z[rng.permutation(n)] for a
    numpy Generator seeded with `seed`, as documented; statistics recomputed with scipy pdist."""
    ds = _random(n=40, seed=7)
    sv = semivariogram(ds, bins=4, lag_limit=50.0, permutations=29, seed=3)
    edges = lag_bins(ds, bins=4, lag_limit=50.0)
    _, _, k, i, j = _brute_pairs(ds, edges)
    z = ds["value"].values - ds["value"].values.mean()
    rng = np.random.default_rng(3)
    perms = [z[rng.permutation(z.size)] for _ in range(29)]

    def gam(v):
        return np.array([np.mean((v[i[k == b]] - v[j[k == b]]) ** 2) / 2 for b in range(4)])

    t = np.array([gam(p) for p in perms])
    obs = gam(z)
    np.testing.assert_allclose(sv["envelope_low"].values, np.quantile(t, 0.025, axis=0), rtol=1e-10)
    np.testing.assert_allclose(sv["envelope_high"].values, np.quantile(t, 0.975, axis=0), rtol=1e-10)
    m = t.mean(axis=0)
    p = (1 + (np.abs(t - m) >= np.abs(obs - m)).sum(axis=0)) / 30
    np.testing.assert_allclose(sv["p_value"].values, p)


def test_envelope_contains_iid_noise_semivariogram():
    """With no spatial structure (iid noise) the observed semivariogram lies inside the pointwise 95%
    permutation envelope at most bins (expected 95%; we ask for 80%, common practice tolerance)."""
    rng = np.random.default_rng(8)
    ds = _ds(100 * rng.random(150), 100 * rng.random(150), rng.normal(size=150))
    sv = semivariogram(ds, bins=10, permutations=99, seed=1)
    g = sv["semivariance"].values
    inside = (g >= sv["envelope_low"].values) & (g <= sv["envelope_high"].values)
    assert inside.mean() >= 0.8
    cg = correlogram(ds, bins=10, permutations=99, seed=1)
    r = cg["correlation"].values[1:]
    inside = (r >= cg["envelope_low"].values[1:]) & (r <= cg["envelope_high"].values[1:])
    assert inside.mean() >= 0.8
    assert float(cg["p_value"][0]) == 1.0


def test_structured_field_has_small_p_values_at_short_lags():
    """A strongly correlated field (practical range about the survey size) is far below the
    permutation envelope at short lags: p-value at its minimum 1 / (1 + N) = 0.01 with 99
    permutations."""
    ds = _field(120, seed=9, practical_range=1.5)
    sv = semivariogram(ds, bins=8, permutations=99, seed=2)
    assert np.all(sv["p_value"].values[:2] <= 0.02)
    assert np.all(sv["semivariance"].values[:2] < sv["envelope_low"].values[:2])
    cg = correlogram(ds, bins=8, permutations=99, seed=2)
    assert np.all(cg["p_value"].values[1:3] <= 0.02)


# --- directions, sites, great circle ------------------------------------------------------------


def test_directional_trend_z_equals_x_on_grid():
    """z = x on a 12 x 12 unit grid: pairs exactly east-west (azimuth 90) have dz = h, so gamma =
    h^2 / 2; pairs exactly north-south (azimuth 0) have dz = 0 (derivable by hand). A 5 degree
    tolerance holds only the exact axis pairs on this grid (tan 5 deg < 1/11)."""
    gx, gy = np.meshgrid(np.arange(12.0), np.arange(12.0))
    ds = _ds(gx.ravel(), gy.ravel(), gx.ravel())
    dv = directional_semivariograms(ds, azimuths=(0, 90), tolerance=5.0, bins=6, lag_limit=6.3)
    h = np.arange(1, 7, dtype=float)
    ew = dv.sel(azimuth=90.0)
    ns = dv.sel(azimuth=0.0)
    np.testing.assert_allclose(ew["lag"].values, h)
    np.testing.assert_allclose(ew["semivariance"].values, h**2 / 2, rtol=1e-12)
    np.testing.assert_allclose(ns["semivariance"].values, 0.0, atol=1e-12)
    np.testing.assert_array_equal(ew["pairs"].values, 12 * (12 - h.astype(int)))
    # the default 22.5 degree sector: north-south stays far below east-west
    wide = directional_semivariograms(ds, bins=6, lag_limit=6.3)
    assert list(wide["azimuth"].values) == [0.0, 45.0, 90.0, 135.0]
    assert np.all(wide["semivariance"].sel(azimuth=0.0) < 0.2 * wide["semivariance"].sel(azimuth=90.0))


def test_directional_matches_single_direction_calls():
    """One pass over several directions equals separate semivariogram(azimuth=...) calls, and an
    azimuth of 270 is the same direction as 90 (directions folded to [0, 180))."""
    ds = _random(n=60, seed=10)
    dv = directional_semivariograms(ds, azimuths=(30, 120), tolerance=30, bins=5, permutations=9, seed=4)
    for az in (30, 120):
        one = semivariogram(ds, azimuth=az, tolerance=30, bins=5, permutations=9, seed=4)
        np.testing.assert_allclose(dv["semivariance"].sel(azimuth=az).values, one["semivariance"].values)
        np.testing.assert_array_equal(dv["pairs"].sel(azimuth=az).values, one["pairs"].values)
        np.testing.assert_allclose(dv["envelope_high"].sel(azimuth=az).values, one["envelope_high"].values)
    np.testing.assert_array_equal(semivariogram(ds, azimuth=270, bins=5)["pairs"].values,
                                  semivariogram(ds, azimuth=90, bins=5)["pairs"].values)
    # the sectors of 0/45/90/135 with tolerance 22.5 cover every pair (boundaries counted twice)
    full = directional_semivariograms(ds, bins=5)
    assert full["pairs"].sum("azimuth").values.sum() >= semivariogram(ds, bins=5)["pairs"].values.sum()


def test_great_circle_pair_distances_match_geometry():
    """Pair distances for lon/lat data equal geometry.cross_distance(..., "greatcircle") (haversine km):
    the per-bin counts equal a numpy histogram of those distances and the lag-weighted sum their sum;
    the default max lag is half the largest distance (common practice)."""
    rng = np.random.default_rng(11)
    lon = 8.0 + 3.0 * rng.random(25)
    lat = 50.0 + 2.0 * rng.random(25)
    ds = _ds(lon, lat, rng.normal(size=25), coords="lonlat")
    d = cross_distance(np.column_stack([lon, lat]), np.column_stack([lon, lat]), "greatcircle")
    d = d[np.triu_indices(25, 1)]
    edges = lag_bins(ds, bins=12)
    assert edges[-1] == pytest.approx(d.max() / 2, rel=1e-10)
    sv = semivariogram(ds, bins=12)
    inside = d[d <= edges[-1]]
    np.testing.assert_array_equal(sv["pairs"].values, np.histogram(inside, bins=edges)[0])
    total = np.nansum(np.where(sv["pairs"] > 0, sv["lag"] * sv["pairs"], 0.0))
    assert total == pytest.approx(inside.sum(), rel=1e-10)
    assert sv.attrs["metric"] == "greatcircle"


def test_pairs_only_within_sites():
    """With a site coordinate, pairs join points of the same site only: counts equal the brute-force
    within-site pair counts; permutations shuffle within sites."""
    rng = np.random.default_rng(12)
    x = np.concatenate([100 * rng.random(30), 1000 + 100 * rng.random(20)])
    y = 100 * rng.random(50)
    site = np.array(["A"] * 30 + ["B"] * 20)
    ds = _ds(x, y, rng.normal(size=50), site=site)
    edges = lag_bins(ds, bins=5)
    within = np.concatenate([pdist(np.column_stack([x[site == s], y[site == s]])) for s in ("A", "B")])
    assert edges[-1] == pytest.approx(within.max() / 2)
    sv = semivariogram(ds, bins=5, permutations=5, seed=1)
    np.testing.assert_array_equal(sv["pairs"].values, np.histogram(within[within <= edges[-1]], bins=edges)[0])
    assert sv.attrs["pairs_within"] == "site"


def test_uses_residual_after_trend():
    """After fit_trend the residual is analysed; a planar trend z = 5 x + noise leaves a flat
    semivariogram near the noise variance (common practice: detrend before estimating)."""
    rng = np.random.default_rng(13)
    x, y = 100 * rng.random(120), 100 * rng.random(120)
    ds = _ds(x, y, 5 * x + rng.normal(size=120))
    raw = semivariogram(ds, bins=5)
    det = semivariogram(fit_trend(ds, 1), bins=5)
    assert raw.attrs["variable"] == "value" and det.attrs["variable"] == "residual"
    assert float(raw["semivariance"][-1]) > 100 * float(det["semivariance"][-1])
    np.testing.assert_allclose(det["semivariance"].values, 1.0, rtol=0.5)
    same = semivariogram(fit_trend(ds, 1), bins=5, variable="value")
    np.testing.assert_allclose(same["semivariance"].values, raw["semivariance"].values)


# --- warnings, attributes, bad input ------------------------------------------------------------


def test_few_pairs_warning_lists_bins():
    """Bins with fewer than 30 pairs (common practice threshold) are warned about and listed."""
    ds = _random(n=25, seed=14)
    edges = lag_bins(ds, bins=8)
    _, _, k, _, _ = _brute_pairs(ds, edges)
    expected = [b for b in range(8) if (k == b).sum() < 30]
    assert expected  # small data: some bins are short of pairs
    with pytest.warns(FewPairsWarning, match=r"lag bins .* fewer than 30 pairs"):
        sv = semivariogram(ds, bins=8)
    assert sv.attrs["few_pairs_bins"] == expected
    np.testing.assert_array_equal(np.flatnonzero(sv["few_pairs"].values), expected)
    with pytest.warns(FewPairsWarning):
        cg = correlogram(ds, bins=8)
    assert cg.attrs["few_pairs_bins"] == [b + 1 for b in expected]


def test_no_warning_when_bins_are_full():
    """No FewPairsWarning when every bin holds at least 30 pairs (common practice threshold)."""
    ds = _random(n=120, seed=15)
    with warnings.catch_warnings():
        warnings.simplefilter("error", FewPairsWarning)
        sv = semivariogram(ds, bins=4, lag_limit=40.0)
    assert sv.attrs["few_pairs_bins"] == []


def test_layout_and_attributes():
    """The documented layout: dimension bin, coordinates lag/bin_lower/bin_upper, units and settings."""
    ds = _random(n=60, seed=16)
    sv = semivariogram(ds, bins=5, lag_limit=50.0, permutations=4, seed=2)
    assert set(sv.dims) == {"bin"}
    assert {"lag", "bin_lower", "bin_upper"} <= set(sv.coords)
    assert {"semivariance", "pairs", "envelope_low", "envelope_high", "p_value"} <= set(sv.data_vars)
    np.testing.assert_allclose(sv["bin_lower"].values, np.arange(5) * 10.0)
    np.testing.assert_allclose(sv["bin_upper"].values, np.arange(1, 6) * 10.0)
    a = sv.attrs
    assert (a["estimator"], a["bins"], a["lag_limit"], a["distance_units"], a["value_units"]) == (
        "classical", 5, 50.0, "m", "mg/kg")
    assert a["azimuth"] == "omnidirectional" and "caution" in a
    assert sv["semivariance"].attrs["units"] == "(mg/kg)^2"
    assert semivariogram(ds, bins=3, seed=None).attrs["seed"] == "none"
    assert "envelope_low" not in semivariogram(ds, bins=3)


def test_empty_bins_are_nan_with_centre_lag():
    """An empty bin reports NaN and its bin centre as lag."""
    x = np.array([0.0, 1.0, 2.0, 10.0, 11.0, 12.0, 20.0, 21.0, 22.0, 23.0])
    sv = semivariogram(_ds(x, np.zeros(10), np.arange(10.0)), bins=8, lag_limit=8.0)
    empty = sv["pairs"].values == 0
    assert empty.any()
    assert np.all(np.isnan(sv["semivariance"].values[empty]))
    np.testing.assert_allclose(sv["lag"].values[empty], (sv["bin_lower"] + sv["bin_upper"]).values[empty] / 2)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"estimator": "median"}, r"^estimator: 'median' is not one of classical, cressie-hawkins"),
        ({"bins": 0}, r"^bins: expected an integer >= 1"),
        ({"lag_limit": -1.0}, r"^lag_limit: expected a positive number"),
        ({"permutations": -5}, r"^permutations: expected an integer >= 0"),
        ({"seed": "abc"}, r"--seed: expected an integer from 0 to 9223372036854775807"),
        ({"seed": 2**70}, r"--seed: expected an integer from 0 to 9223372036854775807"),
        ({"azimuth": 30, "tolerance": 120}, r"tolerance: 120 degrees is over 90"),
        ({"variable": "lead"}, r"variable: 'lead' is not a variable"),
    ],
)
def test_bad_options(kwargs, match):
    """Bad options raise InputError naming the option, the bad value and what is accepted."""
    with pytest.raises(InputError, match=match):
        semivariogram(_random(n=20), **kwargs)


def test_nan_values_refused():
    """NaN values are refused with the input-file row (header = row 1)."""
    ds = _random(n=20)
    ds["value"][3] = np.nan
    with pytest.raises(InputError, match=r"value: NaN or infinite values at rows 5"):
        semivariogram(ds)


def test_same_numbers_with_one_or_two_threads():
    """The pair sums are split among threads by row blocks; one thread and two give the same numbers
    up to floating-point summation order (brute-force check above covers correctness)."""
    import numba

    ds = _random(n=300, seed=17)
    before = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        one = semivariogram(ds, bins=6, permutations=9, seed=5)
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        two = semivariogram(ds, bins=6, permutations=9, seed=5)
    finally:
        numba.set_num_threads(before)
    np.testing.assert_array_equal(one["pairs"].values, two["pairs"].values)
    np.testing.assert_allclose(one["semivariance"].values, two["semivariance"].values, rtol=1e-12)
    np.testing.assert_allclose(one["envelope_high"].values, two["envelope_high"].values, rtol=1e-12)


def test_no_lag_without_two_distinct_locations():
    """Two sites of one point each give no pair: refused with one line."""
    ds = _ds(np.array([0.0, 5.0]), np.array([0.0, 5.0]), np.array([1.0, 2.0]), site=np.array(["A", "B"]))
    with pytest.raises(InputError, match=r"no two points \(of one site\) at distinct locations"):
        semivariogram(ds)


def test_larger_set_with_permutations_equals_pdist_bincount():
    """n = 1,500 with 19 permutations (several row tiles, two threads): every permutation column's
    semivariogram equals scipy pdist + numpy bincount by brute force; checked through the envelope
    and p-values, which use all columns."""
    ds = _random(n=1500, seed=18, span=1000.0)
    sv = semivariogram(ds, bins=7, permutations=19, seed=9)
    edges = lag_bins(ds, bins=7)
    d, _, k, i, j = _brute_pairs(ds, edges)
    z = ds["value"].values - ds["value"].values.mean()
    rng = np.random.default_rng(9)
    cols = [z] + [z[rng.permutation(z.size)] for _ in range(19)]
    n_pairs = np.bincount(k, minlength=7)
    gam = np.array([np.bincount(k, weights=(c[i] - c[j]) ** 2, minlength=7) / (2 * n_pairs) for c in cols])
    np.testing.assert_array_equal(sv["pairs"].values, n_pairs)
    np.testing.assert_allclose(sv["lag"].values, np.bincount(k, weights=d, minlength=7) / n_pairs, rtol=1e-12)
    np.testing.assert_allclose(sv["semivariance"].values, gam[0], rtol=1e-10)
    np.testing.assert_allclose(sv["envelope_low"].values, np.quantile(gam[1:], 0.025, axis=0), rtol=1e-10)
    np.testing.assert_allclose(sv["envelope_high"].values, np.quantile(gam[1:], 0.975, axis=0), rtol=1e-10)


def test_directional_geometric_anisotropy():
    """Geometric anisotropy (common practice): a field whose correlation reaches 4x farther east-west
    than north-south rises faster in the north-south (0 deg) semivariogram than the east-west (90 deg)
    one at short lags. Simulated by stretching the y coordinate by 4 before an isotropic field."""
    rng = np.random.default_rng(19)
    xy = rng.random((500, 2))
    z = simulate_field(xy * np.array([1.0, 4.0]), covariance="exponential", practical_range=1.2,
                       partial_sill=1.0, nugget=0.0, rng=rng)
    ds = _ds(xy[:, 0], xy[:, 1], z)
    dv = directional_semivariograms(ds, azimuths=(0, 90), bins=5, lag_limit=0.3)
    ns = dv["semivariance"].sel(azimuth=0.0).values
    ew = dv["semivariance"].sel(azimuth=90.0).values
    # theory at lags 0.03 and 0.09: ratio about 3.6 and 2.9; one realisation scatters, so ask for 1.5
    assert np.all(ns[:2] > 1.5 * ew[:2])
