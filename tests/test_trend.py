"""Trend surfaces: design matrices on centred, scaled coordinates and their least-squares fit."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.linear_model import LinearRegression
from sklearn.metrics import r2_score

from bayesgeo.data.points import points_dataset
from bayesgeo.explore.trend import design_at, design_matrix, fit_trend, trend_terms
from bayesgeo.common.validate import InputError


def _raw_poly(x, y, order):
    """Raw-coordinate polynomial columns x^i y^j, i + j <= order (independent of bayesgeo)."""
    return np.column_stack([x**i * y**(k - i) for k in range(order + 1) for i in range(k, -1, -1)])


def _points(n=40, seed=0, offset=(1000.0, 2000.0), span=500.0, covariate=False):
    rng = np.random.default_rng(seed)
    x = offset[0] + span * rng.random(n)
    y = offset[1] + span * rng.random(n)
    z = 3.0 + 0.01 * (x - offset[0]) - 0.004 * (y - offset[1]) + rng.normal(size=n)
    cov = {"depth": rng.uniform(0.1, 2.0, n)} if covariate else None
    return points_dataset(x, y, z, covariates=cov, attrs={"coords": "xy", "distance_units": "m"})


def test_term_labels():
    """Full polynomial of total degree k in two variables has (k + 1)(k + 2) / 2 terms (algebra)."""
    assert trend_terms(0) == ["1"]
    assert trend_terms(1) == ["1", "x", "y"]
    assert trend_terms(2) == ["1", "x", "y", "x^2", "x*y", "y^2"]
    assert trend_terms(3, ["depth"]) == ["1", "x", "y", "x^2", "x*y", "y^2", "x^3", "x^2*y", "x*y^2", "y^3", "depth"]
    for k in range(4):
        assert len(trend_terms(k)) == (k + 1) * (k + 2) // 2


@pytest.mark.parametrize("order", [0, 1, 2, 3])
def test_fitted_values_equal_numpy_lstsq_on_raw_polynomial(order):
    """Fitted values equal numpy.linalg.lstsq on the raw-coordinate polynomial (reference: numpy);
    the centring/scaling changes the basis, not the column space, so the fits agree."""
    ds = _points(n=60, seed=order)
    out = fit_trend(ds, order)
    x, y, z = ds["x"].values, ds["y"].values, ds["value"].values
    # centre only the reference design (raw 1e3^3 columns would defeat lstsq in double precision)
    raw = _raw_poly(x - 1000.0, y - 2000.0, order)
    beta, *_ = np.linalg.lstsq(raw, z, rcond=None)
    np.testing.assert_allclose(out["trend"].values, raw @ beta, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(out["residual"].values, z - raw @ beta, rtol=1e-9, atol=1e-9)


def test_residuals_orthogonal_to_design_and_r2_matches_sklearn():
    """Least-squares residuals are orthogonal to every design column (normal equations, e.g.
    Seber and Lee 2003, Linear Regression Analysis, sec. 3.1); R^2 equals sklearn's r2_score and
    LinearRegression.score on the same columns (reference library)."""
    ds = _points(n=50, seed=3, covariate=True)
    out = fit_trend(ds, 2, covariates=["depth"])
    design = design_matrix(ds, 2, ["depth"]).values
    np.testing.assert_allclose(design.T @ out["residual"].values, 0.0, atol=1e-9)
    z = ds["value"].values
    assert out.attrs["trend_r_squared"] == pytest.approx(r2_score(z, out["trend"].values), rel=1e-12)
    lr = LinearRegression().fit(design[:, 1:], z)
    assert out.attrs["trend_r_squared"] == pytest.approx(lr.score(design[:, 1:], z), rel=1e-10)
    np.testing.assert_allclose(out["trend"].values, lr.predict(design[:, 1:]), rtol=1e-10)


def test_recovers_exact_plane_in_scaled_coefficients():
    """z = 2 + 3 x - y exactly: with u = (x - x0) / s, the coefficients are 2 + 3 x0 - y0, 3 s, -s
    (algebra), and R^2 = 1."""
    ds = _points(n=20, seed=4)
    ds["value"] = ("obs", 2.0 + 3.0 * ds["x"].values - ds["y"].values)
    out = fit_trend(ds, 1)
    a = out["coefficient"].attrs
    expected = [2.0 + 3.0 * a["centre_x"] - a["centre_y"], 3.0 * a["scale"], -a["scale"]]
    np.testing.assert_allclose(out["coefficient"].values, expected, rtol=1e-10)
    assert out.attrs["trend_r_squared"] == pytest.approx(1.0)
    np.testing.assert_allclose(out["residual"].values, 0.0, atol=1e-8)


def test_centre_and_scale_recorded():
    """Centre = coordinate means, scale = largest half-span (the stated construction)."""
    ds = _points(n=30, seed=5)
    a = design_matrix(ds, 1).attrs
    x, y = ds["x"].values, ds["y"].values
    assert a["centre_x"] == pytest.approx(x.mean()) and a["centre_y"] == pytest.approx(y.mean())
    assert a["scale"] == pytest.approx(max(np.ptp(x), np.ptp(y)) / 2)


def test_cubic_stable_at_projected_coordinates():
    """A cubic surface at UTM-like coordinates (~5e6 m) is reproduced exactly by the fit: the scaled
    design keeps the normal equations well conditioned (raw x^3 would be ~1e20)."""
    rng = np.random.default_rng(6)
    x = 431_000.0 + 800.0 * rng.random(80)
    y = 5_622_000.0 + 800.0 * rng.random(80)
    u, v = (x - 431_400.0) / 400.0, (y - 5_622_400.0) / 400.0
    z = 1.0 + 0.5 * u - 0.2 * v + 0.3 * u * v - 0.1 * u**3 + 0.05 * v**3
    ds = points_dataset(x, y, z, attrs={"coords": "xy"})
    out = fit_trend(ds, 3)
    np.testing.assert_allclose(out["trend"].values, z, atol=1e-9)


def test_design_at_rebuilds_terms_at_new_locations():
    """design_at at the data locations equals the design matrix, and at new locations it gives the
    same trend as the raw-coordinate lstsq polynomial (numpy reference)."""
    ds = _points(n=60, seed=7, covariate=True)
    out = fit_trend(ds, 2, covariates=["depth"])
    attrs = out["coefficient"].attrs
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    np.testing.assert_allclose(design_at(xy, attrs, ds["depth"].values[:, None]),
                               design_matrix(ds, 2, ["depth"]).values, rtol=1e-13)
    rng = np.random.default_rng(8)
    new = np.column_stack([1000 + 500 * rng.random(5), 2000 + 500 * rng.random(5)])
    new_depth = rng.uniform(0.1, 2.0, 5)
    raw = np.column_stack([_raw_poly(xy[:, 0] - 1000, xy[:, 1] - 2000, 2), ds["depth"].values])
    beta, *_ = np.linalg.lstsq(raw, ds["value"].values, rcond=None)
    expect = np.column_stack([_raw_poly(new[:, 0] - 1000, new[:, 1] - 2000, 2), new_depth]) @ beta
    got = design_at(new, attrs, new_depth[:, None]) @ out["coefficient"].values
    np.testing.assert_allclose(got, expect, rtol=1e-9)
    with pytest.raises(InputError, match="covariates depth"):
        design_at(new, attrs)


@pytest.mark.parametrize("order", [-1, 4, 1.5, True])
def test_bad_order(order):
    """Orders outside 0-3 are refused naming --trend."""
    with pytest.raises(InputError, match=r"^trend: order .* is not one of 0, 1, 2, 3"):
        fit_trend(_points(), order)


def test_cubic_needs_ten_points():
    """A full cubic in two variables has 10 coefficients (algebra), so it needs >= 10 points."""
    with pytest.raises(InputError, match=r"^trend: order 3 .* 10 terms but there are only 9 points"):
        fit_trend(_points(n=9), 3)
    out = fit_trend(_points(n=10, seed=1), 3)
    np.testing.assert_allclose(out["residual"].values, 0.0, atol=1e-7)  # interpolates


def test_collinear_points_cannot_fit_plane():
    """Points on one straight line cannot identify the y term of a plane (rank deficiency)."""
    x = np.arange(12.0)
    ds = points_dataset(x, np.zeros(12), np.sin(x), attrs={"coords": "xy"})
    with pytest.raises(InputError, match=r"^trend: the 3 trend terms .* \(rank 2\)"):
        fit_trend(ds, 1)


def test_unknown_covariate():
    """A covariate that is not a data variable is refused naming the argument (the CLI says --covariate)."""
    with pytest.raises(InputError, match=r"^covariates: 'ph' is not a column"):
        fit_trend(_points(covariate=True), 1, covariates=["ph"])


def test_input_untouched():
    """fit_trend returns a copy; the input Dataset gains nothing."""
    ds = _points()
    before = set(ds.variables)
    fit_trend(ds, 1)
    assert set(ds.variables) == before
