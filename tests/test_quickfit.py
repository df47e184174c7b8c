"""Quick WLS and ML covariance fits against outside references (source named in each test)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xarray as xr
from scipy import optimize, stats

from bayesgeo.explore import quickfit
from bayesgeo.gp.covariance import get_covariance
from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.explore.variogram import semivariogram
from bayesgeo.common.geometry import distance_matrix
from bayesgeo.gp.dense import covariance_matrix, loglik_numpy
from bayesgeo.explore.quickfit import fit_ml, quick_fits
from bayesgeo.explore.wls import fit_wls
from bayesgeo.explore.trend import design_matrix
from bayesgeo.common.validate import InputError

# Truth of the simulated field: exponential, practical range 1/3 of a 1,000 m square, nugget 0.2,
# total sill 1 (partial sill 0.8), mean 5; 350 random points on an invented local grid.
TRUE = {"covariance": "exponential", "practical_range": 333.0, "partial_sill": 0.8, "nugget": 0.2, "mean": 5.0}
EXP = get_covariance("exponential")
TRUE_SCALE = TRUE["practical_range"] / EXP.range_factor
TRUE_MICRO = TRUE["partial_sill"] / TRUE_SCALE


def _field(n=350, seed=2024, plane=(0.0, 0.0)):
    rng = np.random.default_rng(seed)
    xy = rng.random((n, 2)) * 1000.0
    z = simulate_field(xy, covariance="exponential", practical_range=TRUE["practical_range"],
                       partial_sill=TRUE["partial_sill"], nugget=TRUE["nugget"], mean=TRUE["mean"], rng=rng)
    z = z + plane[0] * (xy[:, 0] - 500.0) / 500.0 + plane[1] * (xy[:, 1] - 500.0) / 500.0
    ds = points_dataset(xy[:, 0] + 431_000.0, xy[:, 1] + 5_622_000.0, z,
                        attrs={"distance_units": "m", "value_units": "mg/kg", "coords": "xy"})
    return ds


@pytest.fixture(scope="module")
def field():
    return _field()


@pytest.fixture(scope="module")
def ml_fit(field):
    return fit_ml(field, "exponential")


def _model_vg(cov, lags, scale, psill, nugget, pairs):
    g = cov.semivariance(lags, scale, psill, nugget)
    return xr.Dataset({"semivariance": ("bin", g), "pairs": ("bin", pairs)}, coords={"lag": ("bin", lags)})


# --- weighted least squares -------------------------------------------------------------------


@pytest.mark.parametrize("name", ["exponential", "matern32", "matern52", "gaussian", "spherical"])
@pytest.mark.parametrize("nugget", [0.3, 0.0])
def test_wls_exact_recovery(name, nugget):
    """A semivariogram computed exactly from a model (no noise) is fitted back to that model's
    parameters: Cressie's (1985) criterion sum N (gamma_hat / gamma_model - 1)^2 is >= 0 and zero
    only at the true parameters (exact-recovery check)."""
    cov = get_covariance(name)
    lags = np.linspace(20.0, 600.0, 15)
    pairs = np.linspace(300, 900, 15).astype(int)
    prange, psill = 250.0, 2.5
    vg = _model_vg(cov, lags, cov.scale_from_range(prange), psill, nugget, pairs)
    fit = fit_wls(vg, name, nugget=nugget > 0)
    assert fit["converged"]
    assert fit["objective"] < 1e-12
    np.testing.assert_allclose(fit["practical_range"], prange, rtol=1e-6)
    np.testing.assert_allclose(fit["partial_sill"], psill, rtol=1e-6)
    assert fit["nugget"] == pytest.approx(nugget, abs=1e-6 * psill)
    np.testing.assert_allclose(fit["scale"], cov.scale_from_range(prange), rtol=1e-6)


def test_wls_minimum_at_least_as_low_as_a_generic_optimiser(field):
    """Reference: Cressie's (1985) WLS criterion written out here and minimised by
    scipy.optimize.minimize (Nelder-Mead, linear parameters, several starts); our fit must reach
    a criterion no higher than that reference (to 1e-6 relative)."""
    vg = semivariogram(field, bins=15)
    fit = fit_wls(vg, "exponential")
    lag, gam, npairs = vg["lag"].values, vg["semivariance"].values, vg["pairs"].values

    def crit(p):
        tau, sig, phi = p
        if min(tau, sig, phi) < 0 or phi == 0:
            return np.inf
        gm = tau + sig * (1.0 - np.exp(-lag / phi))
        return float(np.sum(npairs * (gam / gm - 1.0) ** 2))

    ref = min(optimize.minimize(crit, x0, method="Nelder-Mead",
                                options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20000}).fun
              for x0 in ([0.1, 1.0, 50.0], [0.3, 0.7, 150.0], [0.01, 1.2, 300.0]))
    assert fit["objective"] <= ref * (1.0 + 1e-6)
    assert crit([fit["nugget"], fit["partial_sill"], fit["scale"]]) == pytest.approx(fit["objective"], rel=1e-9)


def test_wls_recovers_simulated_field(field):
    """Simulated exponential field (n = 350, practical range 333 m = 1/3 of the square, nugget 0.2,
    sill 1). Tolerances come from the spread of WLS estimates over 30 replicate fields that we
    measured on this design (sd: nugget 0.12; log practical range 0.52; log sigma2/phi 0.45;
    partial sill 0.26), taken at about 3 sd: a semivariogram fit is a noisy estimator.
    The microergodic sigma2/phi (Zhang 2004, JASA 99) is checked as well."""
    fit = fit_wls(semivariogram(field, bins=15), "exponential")
    assert fit["nugget"] == pytest.approx(TRUE["nugget"], abs=0.35)
    assert 1 / 4 < fit["practical_range"] / TRUE["practical_range"] < 4
    assert 1 / 4 < (fit["partial_sill"] / fit["scale"]) / TRUE_MICRO < 4
    assert fit["partial_sill"] == pytest.approx(TRUE["partial_sill"], abs=0.75)


def test_wls_refuses_too_few_bins():
    """Three parameters cannot be fitted to three points (common practice: more bins than
    parameters)."""
    cov = get_covariance("exponential")
    vg = _model_vg(cov, np.array([10.0, 20.0, 30.0]), 10.0, 1.0, 0.1, np.array([50, 50, 50]))
    with pytest.raises(InputError, match="bins hold pairs"):
        fit_wls(vg, "exponential")


# --- maximum likelihood -----------------------------------------------------------------------


def test_ml_recovers_simulated_field(ml_fit):
    """Same field as the WLS test. Spread of ML estimates over 30 replicates that we measured on
    this design (sd: nugget 0.05; log practical range 0.28, log sigma2/phi 0.25, log partial sill
    0.18). Tolerances at about 3 sd: nugget +-0.15, microergodic sigma2/phi (Zhang 2004, JASA 99:
    better identified than sigma2 and phi apart) within a factor 2, practical range within a
    factor 2.5. With the domain only three ranges wide, the microergodic ratio is only a little
    better pinned than the range here (Zhang's result is an in-fill asymptotic)."""
    fit = ml_fit
    assert fit["converged"] and not fit["at_bound"]
    assert fit["nugget"] == pytest.approx(TRUE["nugget"], abs=0.15)
    assert 1 / 2 < (fit["partial_sill"] / fit["scale"]) / TRUE_MICRO < 2
    assert 1 / 2.5 < fit["practical_range"] / TRUE["practical_range"] < 2.5
    assert 1 / 1.7 < fit["partial_sill"] / TRUE["partial_sill"] < 1.7
    assert fit["beta"]["1"] == pytest.approx(TRUE["mean"], abs=0.6)


def _profile_at(ds, cov, scale, psill, nugget, order=0):
    """GLS mean (Aitken 1935: (X' K^-1 X)^-1 X' K^-1 y) and the log-likelihood at it."""
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    dist = distance_matrix(xy)
    k = covariance_matrix(dist, cov, scale, psill, nugget)
    x = design_matrix(ds, order).values
    y = ds["value"].values
    ki = np.linalg.inv(k)
    beta = np.linalg.solve(x.T @ ki @ x, x.T @ ki @ y)
    return beta, dist, k, loglik_numpy(y - x @ beta, dist, cov, scale, psill, nugget)


def test_ml_loglik_not_below_truth(field, ml_fit):
    """Optimiser sanity: the maximised log-likelihood is at least the (profile) log-likelihood
    at the true parameters, which is itself at least the log-likelihood at the true mean."""
    _, dist, _, ll_true = _profile_at(field, EXP, TRUE_SCALE, TRUE["partial_sill"], TRUE["nugget"])
    resid = field["value"].values - TRUE["mean"]
    ll_true_mean = loglik_numpy(resid, dist, EXP, TRUE_SCALE, TRUE["partial_sill"], TRUE["nugget"])
    assert ll_true >= ll_true_mean - 1e-9
    assert ml_fit["loglik"] >= ll_true - 1e-6


def test_ml_loglik_equals_scipy_multivariate_normal(field, ml_fit):
    """Reference library: scipy.stats.multivariate_normal.logpdf of the data (data units) with
    the fitted GLS mean and covariance equals both loglik_numpy and the log-likelihood fit_ml
    reports (which it computes on standardised data and converts back: a units check)."""
    f = ml_fit
    beta, dist, k, ll = _profile_at(field, EXP, f["scale"], f["partial_sill"], f["nugget"])
    ref = stats.multivariate_normal(mean=np.full(field.sizes["obs"], beta[0]), cov=k).logpdf(field["value"].values)
    assert ll == pytest.approx(ref, rel=1e-10)
    assert f["loglik"] == pytest.approx(ref, rel=1e-9)
    assert f["beta"]["1"] == pytest.approx(beta[0], rel=1e-9)


def test_ml_is_a_stationary_point(field, ml_fit):
    """At the maximum the profile log-likelihood does not rise when any parameter is nudged by
    0.1 % (first-order optimality, checked by direct evaluation with loglik_numpy)."""
    f = ml_fit
    base = _profile_at(field, EXP, f["scale"], f["partial_sill"], f["nugget"])[3]
    for key in ("scale", "partial_sill", "nugget"):
        for step in (0.999, 1.001):
            p = {k: f[k] for k in ("scale", "partial_sill", "nugget")}
            p[key] *= step
            assert _profile_at(field, EXP, p["scale"], p["partial_sill"], p["nugget"])[3] <= base + 1e-6


def test_ml_gradient_matches_finite_differences():
    """The analytic gradient 0.5 tr((a a^T - K^-1) dK/dtheta) (Rasmussen and Williams 2006,
    eq. 5.9) agrees with forward differences from scipy.optimize.approx_fprime (step 1e-6) to
    1e-4 relative, for each family whose correlation is smooth in the scale."""
    rng = np.random.default_rng(5)
    xy = rng.random((60, 2))
    z = rng.standard_normal(60)
    q = quickfit._gls_basis(np.column_stack([np.ones(60), xy[:, 0]]))
    for name in ("exponential", "matern32", "matern52", "gaussian"):
        lik = quickfit._ProfileLik(z, distance_matrix(xy), q, get_covariance(name), True)
        theta = np.log([0.2, 0.9, 0.15])
        _, g = lik(theta)
        fd = optimize.approx_fprime(theta, lambda t: lik(t)[0], 1e-6)
        np.testing.assert_allclose(g, fd, rtol=1e-4, atol=1e-5)


def test_ml_with_planar_trend_gives_gls_coefficients():
    """With a first-order trend, the reported coefficients equal the generalised least-squares
    estimate (Aitken 1935) at the fitted covariance, for the scaled columns of
    trend.design_matrix, and the plane we added is recovered (slopes of 1.0 and -0.5 over a
    half-span, within 3 GLS standard errors)."""
    ds = _field(n=150, seed=11, plane=(1.0, -0.5))
    f = fit_ml(ds, "exponential", trend=1)
    beta, _, k, ll = _profile_at(ds, EXP, f["scale"], f["partial_sill"], f["nugget"], order=1)
    np.testing.assert_allclose([f["beta"][t] for t in ("1", "x", "y")], beta, rtol=1e-7, atol=1e-9)
    assert f["loglik"] == pytest.approx(ll, rel=1e-9)
    x = design_matrix(ds, 1).values
    se = np.sqrt(np.diag(np.linalg.inv(x.T @ np.linalg.solve(k, x))))
    # design columns are scaled by the largest half-span (about 500 m here), so slopes are ~1.0, -0.5
    assert abs(beta[1] - 1.0) < 3 * se[1] + 0.05
    assert abs(beta[2] + 0.5) < 3 * se[2] + 0.05


def test_ml_refuses_too_many_points_and_several_sites(monkeypatch):
    """Dense matrices are refused above MAX_DENSE_POINTS (with the reason); several sites are
    refused (fit each on its own)."""
    ds = _field(n=40, seed=3)
    monkeypatch.setattr(quickfit, "MAX_DENSE_POINTS", 30)
    with pytest.raises(InputError, match="dense 40 x 40"):
        fit_ml(ds, "exponential")
    monkeypatch.undo()
    two = ds.assign_coords(site=("obs", np.repeat(["a", "b"], 20)))
    with pytest.raises(InputError, match="several sites"):
        fit_ml(two, "exponential")


# --- both -------------------------------------------------------------------------------------


def test_quick_fits_layout_and_determinism():
    """quick_fits stacks fit_wls and fit_ml results on (method, family); a second call gives
    bit-identical numbers (determinism, common practice for reproducible submissions)."""
    ds = _field(n=100, seed=7)
    vg = semivariogram(ds, bins=12)
    fams = ["exponential", "gaussian", "spherical"]
    out = quick_fits(ds, vg, fams)
    assert out["nugget"].dims == ("method", "family")
    assert list(out["method"].values) == ["wls", "ml"] and list(out["family"].values) == fams
    for var in ("nugget", "partial_sill", "practical_range", "scale"):
        assert np.all(np.isfinite(out[var].values)) and np.all(out[var].values >= 0)
    w = fit_wls(vg, "spherical")
    assert float(out["practical_range"].sel({"method": "wls", "family": "spherical"})) == w["practical_range"]
    m = fit_ml(ds, "gaussian", start=fit_wls(vg, "gaussian"))
    assert float(out["loglik"].sel({"method": "ml", "family": "gaussian"})) == m["loglik"]
    assert math.isnan(float(out["loglik"].sel({"method": "wls", "family": "gaussian"})))
    assert out["nugget"].attrs["units"] == "(mg/kg)^2" and out["scale"].attrs["units"] == "m"
    again = quick_fits(ds, vg, fams)
    xr.testing.assert_identical(out, again)


def test_no_nugget_fits_are_nested_in_the_nugget_fits():
    """nugget=False fixes tau2 = 0 in both methods; the ML fit without nugget cannot beat the
    one with a nugget (nested models: the larger model's maximum is at least the smaller's,
    common practice for likelihood-ratio comparisons)."""
    ds = _field(n=120, seed=21)
    vg = semivariogram(ds, bins=12)
    assert fit_wls(vg, "matern32", nugget=False)["nugget"] == 0.0
    without = fit_ml(ds, "matern32", nugget=False)
    with_nugget = fit_ml(ds, "matern32")
    assert without["nugget"] == 0.0
    assert with_nugget["loglik"] >= without["loglik"] - 1e-6


def test_quick_fits_use_the_nearest_neighbour_likelihood_above_its_limit(monkeypatch):
    """Above NN_ML_POINTS the ML rows come from the nearest-neighbour likelihood (recorded in attrs["ml"]) and,
    with every earlier point a neighbour, equal the dense profile-likelihood fit (the Vecchia likelihood is then
    exact, Vecchia 1988; the GLS trend is refitted, so the optima agree to 1e-3); ml=False leaves them NaN with
    the reason recorded, the WLS rows fitted."""
    from bayesgeo.explore import quickfit_nn

    ds = _field(n=60, seed=8)
    vg = semivariogram(ds, bins=6)
    dense = quick_fits(ds, vg, ["exponential"])
    monkeypatch.setattr(quickfit_nn, "NN_ML_POINTS", 50)
    monkeypatch.setattr(quickfit_nn, "QUICK_NEIGHBOURS", 59)
    nn = quick_fits(ds, vg, ["exponential"])
    assert "nearest-neighbour" in nn.attrs["ml"] and "nearest-neighbour" not in dense.attrs["ml"]
    for var in ("nugget", "partial_sill", "practical_range", "loglik"):
        a, b = (float(x[var].sel({"method": "ml", "family": "exponential"})) for x in (dense, nn))
        assert b == pytest.approx(a, rel=1e-3, abs=1e-4)
    off = quick_fits(ds, vg, ["exponential"], ml=False)
    assert np.isnan(float(off["nugget"].sel({"method": "ml", "family": "exponential"})))
    assert "not requested" in off.attrs["ml_skipped"]
    assert np.isfinite(float(off["practical_range"].sel({"method": "wls", "family": "exponential"})))


def test_ml_on_lonlat_matches_a_local_planar_projection():
    """Great-circle distances (haversine, km) over a 0.05 degree patch agree with a local
    equirectangular projection (x = R cos(lat0) dlon, y = R dlat; common practice for small
    extents) to far better than 1e-3, so ML fits on lon/lat and on the projected km
    coordinates agree within 0.5 % and report the practical range in km."""
    from bayesgeo.common.geometry import EARTH_RADIUS_KM

    rng = np.random.default_rng(4)
    lon = 10.0 + 0.05 * rng.random(90)
    lat = 50.0 + 0.05 * rng.random(90)
    xy = np.column_stack([lon, lat])
    z = simulate_field(xy, covariance="exponential", practical_range=1.5, partial_sill=1.0, nugget=0.1,
                       rng=rng, metric="greatcircle")
    geo = points_dataset(lon, lat, z, attrs={"coords": "lonlat", "distance_units": "km"})
    k = math.pi / 180.0 * EARTH_RADIUS_KM
    planar = points_dataset(k * math.cos(math.radians(50.025)) * (lon - 10.0), k * (lat - 50.0), z,
                            attrs={"coords": "xy", "distance_units": "km"})
    a, b = fit_ml(geo, "exponential"), fit_ml(planar, "exponential")
    for key in ("practical_range", "partial_sill", "nugget"):
        assert a[key] == pytest.approx(b[key], rel=5e-3)
    assert 0.3 < a["practical_range"] < 8.0  # km, not degrees


def test_wls_refuses_a_directional_stack():
    """A semivariogram with an azimuth dimension must be fitted one direction at a time."""
    vg = _model_vg(EXP, np.linspace(10.0, 100.0, 8), 20.0, 1.0, 0.1, np.full(8, 50))
    stack = xr.concat([vg, vg], dim="azimuth")
    with pytest.raises(InputError, match="one direction at a time"):
        fit_wls(stack, "exponential")
