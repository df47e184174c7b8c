"""Tests of the sampling design aid (bayesgeo.data.design) against kriging facts and scikit-learn."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from bayesgeo.data.design import design_table, grid_nodes, kriging_variance, plot_design
from bayesgeo.common.validate import InputError


def test_grid_nodes_surround_cell_centre():
    """6 x 6 nodes, symmetric about the origin, nearest at half a diagonal (geometry)."""
    nodes = grid_nodes(10.0, 6)
    assert nodes.shape == (36, 2)
    np.testing.assert_allclose(nodes.mean(axis=0), 0.0, atol=1e-12)
    d = np.hypot(*nodes.T)
    np.testing.assert_allclose(d.min(), 10.0 / np.sqrt(2.0))
    with pytest.raises(InputError, match="even number"):
        grid_nodes(1.0, 5)


def test_no_nugget_variance_zero_at_data_node():
    """Without nugget kriging is an exact interpolator: zero variance at a data location
    (Cressie 1993, sec. 3.2; FACTS.md, checked by running)."""
    nodes = grid_nodes(20.0, 6)
    for kind in ("simple", "ordinary"):
        v = kriging_variance(nodes, nodes[14], scale=15.0, partial_sill=2.0, nugget=0.0, kind=kind)
        assert v[0] < 1e-6


def test_simple_kriging_matches_sklearn_gpr():
    """Simple kriging variance of a new measurement equals the predictive variance of scikit-learn's
    GaussianProcessRegressor with ConstantKernel * Matern(nu=1.5, length_scale=sqrt(3) phi) +
    WhiteKernel(tau2), optimizer=None (reference library)."""
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

    phi, s2, t2 = 12.0, 1.7, 0.3
    nodes = grid_nodes(9.0, 6)
    target = np.array([[1.3, -2.2]])
    kern = ConstantKernel(s2, "fixed") * Matern(np.sqrt(3.0) * phi, "fixed", nu=1.5) + WhiteKernel(t2, "fixed")
    gp = GaussianProcessRegressor(kern, alpha=1e-12, optimizer=None, normalize_y=False)
    gp.fit(nodes, np.zeros(len(nodes)))
    _, std = gp.predict(target, return_std=True)
    v = kriging_variance(nodes, target[0], scale=phi, partial_sill=s2, nugget=t2, kind="simple", measurement=True)
    np.testing.assert_allclose(v[0], std[0] ** 2, rtol=1e-6)


def test_limits_small_and_large_spacing():
    """Normal theory (common practice): with k^2 = 36 samples that all coincide, ordinary kriging of a
    new measurement is the sample mean, variance tau2 (1 + 1/36); simple kriging gives the conjugate
    normal result tau2 + (1/sigma2 + 36/tau2)^-1. Far apart, simple kriging tends to the total sill
    and ordinary kriging to the total sill times (1 + 1/36) (variance of the estimated mean)."""
    phi, s2, t2 = 10.0, 1.0, 0.25
    tiny, huge = grid_nodes(1e-7, 6), grid_nodes(1e4, 6)
    ok = kriging_variance(tiny, (0, 0), scale=phi, partial_sill=s2, nugget=t2, measurement=True)
    sk = kriging_variance(tiny, (0, 0), scale=phi, partial_sill=s2, nugget=t2, kind="simple", measurement=True)
    np.testing.assert_allclose(ok[0], t2 * (1 + 1 / 36), rtol=1e-5)
    np.testing.assert_allclose(sk[0], t2 + 1.0 / (1 / s2 + 36 / t2), rtol=1e-5)
    ok = kriging_variance(huge, (0, 0), scale=phi, partial_sill=s2, nugget=t2, measurement=True)
    sk = kriging_variance(huge, (0, 0), scale=phi, partial_sill=s2, nugget=t2, kind="simple", measurement=True)
    np.testing.assert_allclose(sk[0], s2 + t2, rtol=1e-9)
    np.testing.assert_allclose(ok[0], (s2 + t2) * (1 + 1 / 36), rtol=1e-9)


def test_ordinary_is_simple_plus_mean_term_and_vectorised():
    """Ordinary >= simple kriging variance (the unknown mean adds a non-negative term; Cressie 1993
    eq. 3.2.16 vs 3.4.59) and many parameter sets at once equal one at a time."""
    rng = np.random.default_rng(0)
    phi, s2, t2 = rng.uniform(5, 50, 7), rng.uniform(0.5, 2, 7), rng.uniform(0, 0.5, 7)
    nodes = grid_nodes(15.0, 6)
    ok = kriging_variance(nodes, (0, 0), scale=phi, partial_sill=s2, nugget=t2)
    sk = kriging_variance(nodes, (0, 0), scale=phi, partial_sill=s2, nugget=t2, kind="simple")
    assert np.all(ok >= sk - 1e-12)
    one = [kriging_variance(nodes, (0, 0), scale=a, partial_sill=b, nugget=c)[0] for a, b, c in zip(phi, s2, t2)]
    np.testing.assert_allclose(ok, one, rtol=1e-10)


def _draws(m=200, seed=1):
    rng = np.random.default_rng(seed)
    prange = np.exp(rng.normal(np.log(150), 0.3, m))
    psill = np.exp(rng.normal(np.log(0.45), 0.25, m))
    nug = 0.15 / 0.85 * psill
    from bayesgeo.gp.covariance import get_covariance

    scale = get_covariance("matern32").scale_from_range(prange)
    shape = (2, m // 2)
    return xr.Dataset({k: (("chain", "draw"), v.reshape(shape)) for k, v in
                       (("scale", scale), ("partial_sill", psill), ("nugget", nug), ("practical_range", prange))})


def test_design_table_grows_with_spacing_towards_total_sill(tmp_path):
    """The kriging sd grows with grid spacing; at wide spacing a new measurement's sd approaches
    sqrt(total sill) (ordinary kriging: slightly above, by the factor sqrt(1 + 1/36) for the estimated
    mean) and the field's sd approaches sqrt(sigma2 + total sill / 36); the new-measurement sd never
    falls below sqrt(nugget) (kriging facts, common practice; Cressie 1993 sec. 3.2)."""
    ds = _draws()
    tab = design_table(ds, spacings=np.geomspace(5, 5000, 12), distance_units="m", value_units="log(mg/kg)")
    sd = tab["sd_mean"].values
    assert np.all(np.diff(sd) > 0)
    total = np.sqrt(tab.attrs["total_sill_mean"])
    s2, t2 = ds["partial_sill"].values, ds["nugget"].values
    # field: sigma2 + (sigma2 + tau2) / 36; new measurement: (sigma2 + tau2)(1 + 1/36)
    assert sd[-1] == pytest.approx(np.mean(np.sqrt(s2 + (s2 + t2) / 36)), rel=1e-3)
    msd = tab["measurement_sd_mean"].values
    assert msd[-1] == pytest.approx(np.mean(np.sqrt((s2 + t2) * (1 + 1 / 36))), rel=1e-3)
    assert total < msd[-1] < total * 1.02
    assert np.all(tab["measurement_sd_mean"].values >= np.sqrt(ds["nugget"].values.min()))
    assert np.all(tab["sd_q05"] <= tab["sd_q50"]) and np.all(tab["sd_q50"] <= tab["sd_q95"])
    np.testing.assert_allclose(tab["density"].values, 1 / tab["spacing"].values ** 2)
    assert "caution" in tab.attrs
    fig = plot_design(tab)
    fig.savefig(tmp_path / "design.png")
    assert (tmp_path / "design.png").stat().st_size > 1000


def test_design_table_default_spacings_and_bad_input():
    """Default spacings span 0.05-2 x the median practical range; missing variables are refused."""
    ds = _draws(100)
    tab = design_table(ds, max_draws=50)
    med = float(np.median(ds["practical_range"].values[np.unravel_index(
        np.unique(np.linspace(0, 99, 50).round().astype(int)), (2, 50))]))
    np.testing.assert_allclose(tab["spacing"].values[[0, -1]], [0.05 * med, 2.0 * med], rtol=1e-9)
    assert tab.attrs["draws"] == 50
    with pytest.raises(InputError, match="nugget"):
        design_table(ds.drop_vars("nugget"))
    with pytest.raises(InputError, match="spacings"):
        design_table(ds, spacings=[10.0, -1.0])
