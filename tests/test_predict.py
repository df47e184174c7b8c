"""Tests of Bayesian kriging (bayesgeo.predict.prediction, bayesgeo.gp.kriging) against outside references."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xarray as xr
from scipy import integrate, optimize, stats

from bayesgeo.gp import kriging as K
from bayesgeo.predict import prediction as P
from bayesgeo.gp.joint import block_moments, conditional_simulations
from bayesgeo.gp.kriging import draw_moments, kriging_moments, make_basis
from bayesgeo.gp.covariance import get_covariance
from bayesgeo.data.demo import simulate_field
from bayesgeo.data.targets import grid_targets
from bayesgeo.predict.simulation import simulate_targets

RNG = np.random.default_rng(20261202)


def _sites(n, rng, side=100.0):
    return rng.random((n, 2)) * side


def test_no_nugget_reproduces_data_with_zero_variance():
    """Kriging without nugget is an exact interpolator: at a data site the mean is the datum and
    the variance is zero (Cressie 1993, Statistics for Spatial Data, sec. 3.2; FACTS.md 'Kriging').
    Tolerances allow for the 1e-10 relative jitter on the diagonal."""
    xy = _sites(40, RNG)
    y = RNG.standard_normal(40) + 3.0
    f = np.column_stack([np.ones(40), xy[:, 0] / 100])
    for cov in ("exponential", "matern32", "spherical"):
        mean, var = kriging_moments(xy, y, f, xy, f, cov, 25.0, 2.0, 0.0, [3.0, 0.5], include_nugget=False, jitter=1e-10)
        np.testing.assert_allclose(mean, y, atol=1e-5)
        assert np.all(var < 1e-6 * 2.0)
    # away from the data the variance is positive and below the sill
    mean, var = kriging_moments(xy, y, f, xy + 0.5, f, "matern32", 25.0, 2.0, 0.0, [3.0, 0.5], include_nugget=False)
    assert np.all(var > 0) and np.all(var < 2.0)


@pytest.mark.parametrize("family,nu", [("exponential", 0.5), ("matern32", 1.5), ("matern52", 2.5)])
@pytest.mark.parametrize("include_nugget", [True, False])
def test_matches_scikit_learn_gaussian_process(family, nu, include_nugget):
    """Mean and sd equal scikit-learn's GaussianProcessRegressor with fixed hyperparameters
    (ConstantKernel * Matern + WhiteKernel; sklearn's Matern length scale l = sqrt(2 nu) phi for
    our d/phi form). The WhiteKernel adds the nugget to the predictive variance (new measurement);
    alpha = nugget instead gives the variance of the field. Constant known mean c: sklearn sees
    y - c."""
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

    from bayesgeo.gp.kriging import JITTER

    rng = np.random.default_rng(5)
    xy, xy_new = _sites(60, rng), _sites(25, rng)
    sill, phi, tau2, c = 1.7, 18.0, 0.3, 4.0
    y = simulate_field(xy, covariance=family, practical_range=phi * 3.0, partial_sill=sill, nugget=tau2,
                       mean=c, rng=rng)
    mean, var = kriging_moments(xy, y, np.ones((60, 1)), xy_new, np.ones((25, 1)), family, phi, sill, tau2, [c],
                      include_nugget=include_nugget)
    kern = ConstantKernel(sill, "fixed") * Matern(length_scale=math.sqrt(2 * nu) * phi, nu=nu,
                                                  length_scale_bounds="fixed")
    if include_nugget:
        gpr = GaussianProcessRegressor(kern + WhiteKernel(tau2, "fixed"), optimizer=None, alpha=JITTER * sill)
    else:
        gpr = GaussianProcessRegressor(kern, optimizer=None, alpha=tau2 + JITTER * sill)
    gpr.fit(xy, y - c)
    m_ref, s_ref = gpr.predict(xy_new, return_std=True)
    np.testing.assert_allclose(mean, m_ref + c, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(np.sqrt(var), s_ref, rtol=1e-6, atol=1e-9)


def test_single_draw_exceedance_and_quantiles_are_normal_and_lognormal():
    """For one draw the predictive distribution is N(mu, v): P(Z > T) = scipy.stats.norm.sf and the
    quantiles are norm.ppf; under the log transform it is log-normal (scipy.stats.lognorm with
    s = sqrt(v), scale = exp(mu)): mean, sf and ppf agree."""
    mu = np.array([[0.3, -1.0, 2.0, 1.5]])
    var = np.array([[0.25, 1.0, 0.04, 0.0]])
    sd = np.sqrt(var[0])
    out = K.mixture_summary(mu, var, thresholds=[0.0, 1.0], probs=(0.05, 0.5, 0.95))
    pos = sd > 0
    np.testing.assert_allclose(out["p_exceed"][1][pos], stats.norm.sf(1.0, mu[0][pos], sd[pos]), rtol=1e-12)
    np.testing.assert_allclose(out["quantiles"][:, pos], stats.norm.ppf([[0.05], [0.5], [0.95]], mu[0][pos], sd[pos]),
                               atol=1e-7)
    assert out["p_exceed"][1][3] == 1.0 and out["sd"][3] == 0.0  # zero variance: a point mass at 1.5
    ln = K.mixture_summary(mu[:, pos], var[:, pos], thresholds=[2.0], transform="log")
    ref = stats.lognorm(s=sd[pos], scale=np.exp(mu[0][pos]))
    np.testing.assert_allclose(ln["mean"], ref.mean(), rtol=1e-12)
    np.testing.assert_allclose(ln["sd"], ref.std(), rtol=1e-9)
    np.testing.assert_allclose(ln["p_exceed"][0], ref.sf(2.0), rtol=1e-12)
    np.testing.assert_allclose(ln["quantiles"], ref.ppf(np.array([[0.05], [0.5], [0.95]])), rtol=1e-7)


def test_mixture_quantiles_invert_the_mixture_cdf():
    """Mixture quantiles solve mean_d Phi((q - mu_d)/sd_d) = p: checked against scipy.optimize.brentq
    on the same CDF written with scipy.stats.norm.cdf; mixture mean/variance against numerical
    integration (scipy.integrate.quad) of the mixture density."""
    rng = np.random.default_rng(2)
    mu = rng.normal(0, 2, (30, 5))
    sd = rng.uniform(0.2, 1.5, (30, 5))
    q = K.mixture_quantiles(mu, sd, (0.05, 0.5, 0.95))
    for j in range(5):
        for i, p in enumerate((0.05, 0.5, 0.95)):
            ref = optimize.brentq(lambda x: stats.norm.cdf(x, mu[:, j], sd[:, j]).mean() - p, -30, 30, xtol=1e-12)
            assert abs(q[i, j] - ref) < 1e-8
    out = K.mixture_summary(mu, sd**2)
    dens = lambda x: stats.norm.pdf(x, mu[:, 0], sd[:, 0]).mean()  # noqa: E731
    m1 = integrate.quad(lambda x: x * dens(x), -40, 40, limit=200)[0]
    m2 = integrate.quad(lambda x: (x - m1) ** 2 * dens(x), -40, 40, limit=200)[0]
    assert abs(out["mean"][0] - m1) < 1e-8 and abs(out["sd"][0] - math.sqrt(m2)) < 1e-7


def test_ninety_percent_intervals_cover_about_ninety_percent():
    """On fields simulated from known parameters (bayesgeo.data.demo.simulate_field, Matérn 3/2 with
    nugget), 90% predictive intervals of a new measurement at held-out points, predicted with the
    true parameters as a single draw, cover about 90%. 12 independent fields x 25 held-out points;
    bound: binomial 0.1% / 99.9% quantiles for 300 trials (scipy.stats.binom), which is generous
    for the dependence among points of one field."""
    hits, total = 0, 0
    for rep in range(12):
        rng = np.random.default_rng(100 + rep)
        xy = _sites(105, rng)
        z = simulate_field(xy, covariance="matern32", practical_range=40.0, partial_sill=1.0, nugget=0.2,
                           mean=2.0, rng=rng)
        tr, te = slice(0, 80), slice(80, 105)
        basis = make_basis(xy[tr], z[tr], np.ones((80, 1)), covariance="matern32", scale=40.0 / get_covariance("matern32").range_factor,
                           partial_sill=1.0, nugget=0.2, beta=[2.0])
        mean, var = draw_moments(basis, xy[te], np.ones((25, 1)), include_nugget=True)
        s = K.mixture_summary(mean, var, probs=(0.05, 0.95))
        hits += int(np.sum((z[te] > s["quantiles"][0]) & (z[te] < s["quantiles"][1])))
        total += 25
    lo, hi = stats.binom.ppf([0.001, 0.999], total, 0.9)
    assert lo <= hits <= hi, (hits, total)


def _basis_three_draws(transform=None, seed=3):
    rng = np.random.default_rng(seed)
    xy = _sites(50, rng)
    z = simulate_field(xy, covariance="exponential", practical_range=60.0, partial_sill=0.5, nugget=0.05,
                       mean=1.0, rng=rng)
    return make_basis(xy, z, np.ones((50, 1)), covariance="exponential", scale=[15.0, 20.0, 25.0],
                      partial_sill=[0.4, 0.5, 0.6], nugget=[0.03, 0.05, 0.08], beta=[[0.9], [1.0], [1.1]],
                      transform=transform)


def test_block_average_agrees_with_conditional_simulation():
    """Block kriging (mean of point means, variance 1'Sigma 1/M^2) equals the Monte Carlo mean and
    variance of area averages of joint conditional simulations (Journel and Huijbregts 1978, Mining
    Geostatistics, sec. V.A: block estimate = average of point estimates)."""
    basis = _basis_three_draws()
    pts = np.column_stack(np.meshgrid(np.linspace(30, 50, 8), np.linspace(40, 55, 6))).reshape(2, -1).T
    f = np.ones((len(pts), 1))
    m, v = block_moments(basis, pts, f)
    sims = conditional_simulations(basis, pts, f, n_sim=4000, seed=11, include_nugget=False).mean(axis=2)
    se = np.sqrt(v / 4000)
    assert np.all(np.abs(sims.mean(axis=1) - m) < 4.5 * se)
    np.testing.assert_allclose(sims.var(axis=1, ddof=1), v, rtol=0.12)


def test_log_area_average_mean_is_mean_of_lognormal_point_means():
    """Under the log transform the expected area average is the average over points of the
    log-normal means exp(mu + v/2) (linearity of expectation); the simulation-based area_average
    must agree within Monte Carlo error."""
    basis = _basis_three_draws(transform="log")
    pts = np.column_stack([np.linspace(20, 60, 30), np.linspace(30, 70, 30)])
    f = np.ones((30, 1))
    mean, var = draw_moments(basis, pts, f, include_nugget=False)
    expected = np.exp(mean + var / 2).mean()
    out = P.area_average(basis, pts, f, thresholds=[3.0], n_sim=2000, seed=4)
    assert abs(out["mean"] - expected) < 4 * out["sd"] / math.sqrt(3 * 2000)
    assert out["q05"] < out["mean"] < out["q95"] and 0 <= out["p_exceed"][0] <= 1


def test_results_do_not_depend_on_chunking_or_scheduler():
    """Same inputs, different chunk sizes and schedulers: bit-identical numbers (per-cell arithmetic
    is independent of the chunking; targets are padded so that BLAS treats every chunk alike).
    Requirement of the project (reproducibility), no outside reference needed."""
    basis = _basis_three_draws()
    grid = grid_targets(basis.xy, cells=12, hull=True)
    a = P.predict_targets(basis, grid, thresholds=[1.0, 2.0], chunk_cells=7, scheduler="synchronous")
    b = P.predict_targets(basis, grid, thresholds=[1.0, 2.0], chunk_cells=10_000, scheduler="threads")
    for name in ("mean", "sd", "q05", "q50", "q95", "p_exceed"):
        np.testing.assert_array_equal(a[name].values, b[name].values)
    outside = ~grid["inside"].values
    assert outside.any() and np.all(np.isnan(a["mean"].values[outside]))
    assert np.all(np.isfinite(a["mean"].values[~outside]))
    assert a["p_exceed"].dims == ("threshold", "y", "x")


def test_posterior_parameters_converts_units_and_thins_evenly():
    """Unit conversion follows the model's standardisation (bayesgeo.fitting.model docstring): range times
    the distance scale, sd times value_sd, intercept shifted by value_mean; thinning keeps the first
    and last of the chains concatenated."""
    from types import SimpleNamespace

    from bayesgeo.fitting.spec import SpecBase

    class Spec(SimpleNamespace):  # the settings' unit conversions on hand-set constants
        practical_range_of, variance_of, values_of = (SpecBase.practical_range_of, SpecBase.variance_of,
                                                      SpecBase.values_of)

    spec = Spec(value_sd=2.0, value_mean=5.0, distance_scale=100.0, range_factor=4.0,
                terms=("1", "x"), model_units="mg/kg", distance_units="m")
    post = xr.Dataset({
        "practical_range_z": (("chain", "draw"), np.full((2, 10), 0.5)),
        "sd_z": (("chain", "draw"), np.full((2, 10), 0.5)),
        "nugget_sd_z": (("chain", "draw"), np.full((2, 10), 0.1)),
        "beta_z": (("chain", "draw", "term"), np.tile([0.25, 1.0], (2, 10, 1))),
    }, coords={"chain": [0, 1], "draw": np.arange(10), "term": ["1", "x"]})
    out = P.posterior_parameters(post, spec, draws=5)
    assert out.sizes["sample"] == 5
    assert (int(out["chain"][0]), int(out["draw"][0]), int(out["chain"][-1]), int(out["draw"][-1])) == (0, 0, 1, 9)
    np.testing.assert_allclose(out["practical_range"], 50.0)
    np.testing.assert_allclose(out["scale"], 12.5)
    np.testing.assert_allclose(out["partial_sill"], 1.0)
    np.testing.assert_allclose(out["nugget"], 0.04)
    np.testing.assert_allclose(out["beta"].values[0], [5.5, 2.0])


def test_joint_covariance_matches_scikit_learn_and_simulations_follow_it():
    """The joint conditional covariance (kriging_moments full_cov) equals scikit-learn's
    GaussianProcessRegressor.predict(return_cov=True) for the field; joint conditional simulations
    (simulate_targets, one draw) have that mean and covariance up to Monte Carlo error."""
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern

    from bayesgeo.gp.kriging import JITTER

    rng = np.random.default_rng(8)
    xy, xy_new = _sites(40, rng), _sites(6, rng)
    y = rng.standard_normal(40)
    mean, cov = kriging_moments(xy, y, np.ones((40, 1)), xy_new, np.ones((6, 1)), "matern52", 15.0, 1.3, 0.2, [0.0],
                      include_nugget=False, full_cov=True)
    kern = ConstantKernel(1.3, "fixed") * Matern(length_scale=math.sqrt(5.0) * 15.0, nu=2.5, length_scale_bounds="fixed")
    gpr = GaussianProcessRegressor(kern, optimizer=None, alpha=0.2 + JITTER * 1.3).fit(xy, y)
    m_ref, c_ref = gpr.predict(xy_new, return_cov=True)
    np.testing.assert_allclose(mean, m_ref, atol=1e-9)
    np.testing.assert_allclose(cov, c_ref, atol=1e-9)

    basis = make_basis(xy, y, np.ones((40, 1)), covariance="matern52", scale=15.0, partial_sill=1.3, nugget=0.2,
                       beta=[0.0])
    targets = xr.Dataset(coords={"x": ("target", xy_new[:, 0]), "y": ("target", xy_new[:, 1])})
    targets["inside"] = ("target", np.ones(6, bool))
    targets.attrs["kind"] = "points"  # the layout of bayesgeo.data.targets.read_target_points
    sims = simulate_targets(basis, targets, n_sim=20000, seed=3, include_nugget=False)["simulation"].values[0]
    se = np.sqrt(np.diag(cov) / 20000)
    assert np.all(np.abs(sims.mean(axis=0) - mean) < 4.5 * se)
    np.testing.assert_allclose(np.cov(sims.T), cov, atol=0.05 * np.max(np.diag(cov)))


def test_distributed_scheduler_gives_the_same_numbers():
    """A dask.distributed cluster (in-process LocalCluster) gives the numbers of the local threads
    scheduler exactly (same per-cell arithmetic; project requirement)."""
    distributed = pytest.importorskip("distributed")
    basis = _basis_three_draws()
    grid = grid_targets(basis.xy, cells=8)
    local = P.predict_targets(basis, grid, thresholds=[1.0], chunk_cells=20)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False, dashboard_address=None) as lc:
        remote = P.predict_targets(basis, grid, thresholds=[1.0], chunk_cells=20, scheduler=lc.scheduler_address)
    for name in ("mean", "sd", "q05", "q95", "p_exceed"):
        np.testing.assert_array_equal(local[name].values, remote[name].values)


def test_nn_basis_equals_exact_kriging_with_all_neighbours():
    """Nearest-neighbour kriging with every data point as a neighbour is simple kriging
    (Rasmussen and Williams 2006, eqs. 2.23-2.24): the nn basis of a large-data fit reproduces
    the exact basis; joint quantities are refused on it with a one-line InputError."""
    from bayesgeo.gp.engines import engine
    from bayesgeo.gp.joint import block_moments
    from bayesgeo.gp.kriging import draw_moments, make_basis
    from bayesgeo.common.validate import InputError

    rng = np.random.default_rng(4)
    xy = rng.random((40, 2)) * 100.0
    z = rng.normal(size=40)
    design = np.ones((40, 1))
    new = rng.random((7, 2)) * 100.0
    kw = dict(covariance="matern32", scale=np.array([20.0, 35.0]), partial_sill=np.array([1.0, 0.7]),
              nugget=np.array([0.1, 0.2]), beta=np.array([[0.3], [-0.1]]))
    exact = draw_moments(make_basis(xy, z, design, **kw), new, np.ones((7, 1)))
    nn_basis = make_basis(xy, z, design, neighbours=40, **kw)
    approx = engine(nn_basis.engine_name).draw_moments(nn_basis, new, np.ones((7, 1)))
    np.testing.assert_allclose(approx[0], exact[0], rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(approx[1], exact[1], rtol=1e-7, atol=1e-9)
    with pytest.raises(InputError, match="nearest-neighbour"):
        block_moments(nn_basis, new, np.ones((7, 1)))
