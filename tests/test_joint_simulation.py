"""Joint conditional simulation of large target sets (conditioning by kriging, bayesgeo.gp.joint).

Sources: the Gaussian conditional mean and covariance of Rasmussen and Williams (2006), *Gaussian Processes
for Machine Learning*, eqs. 2.23-2.24, computed here with scipy.linalg (not with bayesgeo's kriging);
conditioning by kriging (Journel and Huijbregts 1978, sec. VII.B): an exact unconditional draw corrected by
exact kriging is an exact conditional draw;
the expected number of targets above a threshold is the sum of the marginal probabilities (linearity of
expectation) and its variance the double sum of bivariate-normal orthant probabilities minus their
products, both from scipy.stats; great-circle distances from scikit-learn's haversine_distances.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy import linalg, stats

from bayesgeo.common.defaults import EARTH_RADIUS_KM, JITTER
from bayesgeo.gp.covariance import get_covariance
from bayesgeo.gp.joint import kriged_simulations
from bayesgeo.gp.kriging import make_basis
from bayesgeo.gp.nn_kriging import nn_kriging_moments
from bayesgeo.predict.simulation import simulate_targets


def _planar(a, b):
    return np.sqrt(((a[:, None, :] - b[None, :, :]) ** 2).sum(axis=-1))


def _greatcircle(a, b):
    from sklearn.metrics.pairwise import haversine_distances

    return EARTH_RADIUS_KM * haversine_distances(np.radians(a[:, ::-1]), np.radians(b[:, ::-1]))


def _exact(xy, z, xt, family, phi, s2, t2, beta, dist):
    """Conditional mean and covariance of the latent field at ``xt`` (R&W 2006 eqs. 2.23-2.24, with the
    simulation's jitter s2 * JITTER on both diagonals)."""
    rho = get_covariance(family).correlation
    kdd = s2 * rho(dist(xy, xy), phi) + (t2 + JITTER * s2) * np.eye(len(xy))
    ktd = s2 * rho(dist(xt, xy), phi)
    ktt = s2 * rho(dist(xt, xt), phi) + JITTER * s2 * np.eye(len(xt))
    mean = beta + ktd @ linalg.solve(kdd, z - beta, assume_a="pos")
    return mean, ktt - ktd @ linalg.solve(kdd, ktd.T, assume_a="pos")


def _implied(basis, xt, m):
    """Mean and covariance of the simulated fields: they are linear in their innovations (field at data and
    targets, then the data's nugget), so zero noise gives the mean and unit vectors the columns of a factor."""
    k, n = len(xt), len(basis.xy)
    f = np.ones((k, 1))
    w = 2 * n + k
    zero = kriged_simulations(basis, xt, f, n_sim=1, seed=0, include_nugget=False, neighbours=m,
                              noise=np.zeros((1, 1, w)))[0, 0]
    cols = kriged_simulations(basis, xt, f, n_sim=w, seed=0, include_nugget=False, neighbours=m,
                              noise=np.eye(w)[None])[0] - zero
    return zero, cols.T @ cols


@pytest.mark.parametrize("metric,family", [("euclidean", "matern32"), ("greatcircle", "exponential")])
def test_exact_unconditional_draw_and_exact_kriging_give_the_exact_joint_conditional(metric, family):
    """With m = n + M - 1 the unconditional draw is exact (the chain rule), and a dense fit's kriging is exact,
    so the simulated fields have the mean and covariance of the dense formulas to rounding."""
    rng = np.random.default_rng(5)
    if metric == "euclidean":
        xy, xt, phi, dist = rng.uniform(0, 10, (40, 2)), rng.uniform(0, 10, (25, 2)), 2.0, _planar
    else:  # lon/lat degrees, distances in km
        xy = np.column_stack([rng.uniform(7.0, 7.2, 40), rng.uniform(46.0, 46.1, 40)])
        xt = np.column_stack([rng.uniform(7.0, 7.2, 25), rng.uniform(46.0, 46.1, 25)])
        phi, dist = 3.0, _greatcircle
    z = rng.standard_normal(40)
    basis = make_basis(xy, z, np.ones((40, 1)), covariance=family, scale=[phi], partial_sill=[1.3], nugget=[0.3],
                       beta=[[0.5]], metric=metric)
    mean, cov = _implied(basis, xt, m=64)
    m_ref, c_ref = _exact(xy, z, xt, family, phi, 1.3, 0.3, 0.5, dist)
    np.testing.assert_allclose(mean, m_ref, atol=1e-9)
    np.testing.assert_allclose(cov, c_ref, atol=1e-9)


def test_thirty_neighbours_stay_close_to_the_exact_joint_conditional():
    """With the default m = 30 for the unconditional draw, on a 20 x 20 grid over 150 noisy data (Matérn 3/2)
    the fields of a dense fit keep the exact conditional mean (conditioning by kriging adds the exact kriging
    mean) and a covariance within 5e-3 of the exact one (partial sill 1), every cell's sd within 2% of the exact
    one. Measured: 2.5e-3 and 1.1% (m = 20: 8.8e-3 and 3.3%; m = 40: 1.4e-3 and 0.4%)."""
    rng = np.random.default_rng(7)
    xy = rng.uniform(0, 100, (150, 2))
    g = np.linspace(2.5, 97.5, 20)
    xt = np.array(np.meshgrid(g, g)).reshape(2, -1).T
    z = rng.standard_normal(150)
    basis = make_basis(xy, z, np.ones((150, 1)), covariance="matern32", scale=[15.0], partial_sill=[1.0],
                       nugget=[0.2], beta=[[0.0]])
    mean, cov = _implied(basis, xt, m=30)
    m_ref, c_ref = _exact(xy, z, xt, "matern32", 15.0, 1.0, 0.2, 0.0, _planar)
    np.testing.assert_allclose(mean, m_ref, atol=1e-9)
    assert np.abs(cov - c_ref).max() < 5e-3
    assert np.abs(np.sqrt(np.diag(cov) / np.diag(c_ref)) - 1.0).max() < 0.02


def test_nearest_neighbour_fit_fields_have_the_maps_mean_and_variance():
    """For a nearest-neighbour fit the fields' mean and per-cell variance are those of its nearest-neighbour
    kriging, the map's own (the kriging error's variance; exact unconditional draw, m = n + M - 1)."""
    rng = np.random.default_rng(12)
    xy, xt = rng.uniform(0, 10, (50, 2)), rng.uniform(0, 10, (20, 2))
    z = rng.standard_normal(50)
    basis = make_basis(xy, z, np.ones((50, 1)), covariance="matern52", scale=[1.5], partial_sill=[1.0],
                       nugget=[0.1], beta=[[0.2]], neighbours=10)
    mean, cov = _implied(basis, xt, m=69)
    m_ref, v_ref = nn_kriging_moments(xy, z, np.ones((50, 1)), xt, np.ones((20, 1)), covariance="matern52",
                                      scale=1.5, partial_sill=1.0, nugget=0.1, beta=[0.2], neighbours=10,
                                      include_nugget=False)
    np.testing.assert_allclose(mean, m_ref[0], atol=1e-9)
    np.testing.assert_allclose(np.diag(cov), v_ref[0], atol=2 * JITTER)  # the simulated field carries the jitter


def _points(xt):
    targets = xr.Dataset(coords={"x": ("target", xt[:, 0]), "y": ("target", xt[:, 1])})
    targets["inside"] = ("target", np.ones(len(xt), bool))
    targets.attrs["kind"] = "points"
    return targets


def test_simulated_counts_above_a_threshold_have_the_gaussian_mean_and_variance():
    """Under a log transform, the number of targets above T per simulated field (one draw of a dense fit,
    20,000 fields by conditioning by kriging) has mean sum_i P(Z_i > T) and variance
    sum_ij [P(Z_i > T, Z_j > T) - p_i p_j],
    the marginal and bivariate normal probabilities (scipy.stats) of the exact joint conditional of the
    log values plus nugget; checked within 4.5 Monte Carlo standard errors."""
    rng = np.random.default_rng(11)
    xy, xt = rng.uniform(0, 10, (30, 2)), rng.uniform(0, 10, (12, 2))
    logz = 1.0 + rng.standard_normal(30)
    basis = make_basis(xy, logz, np.ones((30, 1)), covariance="matern52", scale=[2.0], partial_sill=[0.8],
                       nugget=[0.1], beta=[[1.0]], transform="log")
    threshold = 3.0
    ds = simulate_targets(basis, _points(xt), n_sim=20000, seed=4, thresholds=[threshold], keep_fields=False)
    counts = ds["cells_above"].values[0, 0].astype(float)
    mean, cov = _exact(xy, logz, xt, "matern52", 2.0, 0.8, 0.1, 1.0, _planar)
    cov = cov + 0.1 * np.eye(len(xt))  # new measurements: field + nugget
    sd = np.sqrt(np.diag(cov))
    p = stats.norm.sf((np.log(threshold) - mean) / sd)
    joint = np.diag(p).copy()
    for i in range(len(xt)):
        for j in range(i):
            r = cov[i, j] / (sd[i] * sd[j])
            a = (np.log(threshold) - mean[[i, j]]) / sd[[i, j]]
            both = stats.multivariate_normal([0, 0], [[1, r], [r, 1]]).cdf(-a)  # P(U > a_i, V > a_j)
            joint[i, j] = joint[j, i] = both
    ev, var = p.sum(), (joint - np.outer(p, p)).sum()
    assert ds.attrs["simulation_method"].startswith("conditioning by kriging")
    assert abs(counts.mean() - ev) < 4.5 * np.sqrt(var / counts.size)
    assert abs(counts.var() - var) < 4.5 * var * np.sqrt(2.0 / counts.size) * 1.5  # kurtosis allowance 1.5


def test_same_seed_same_fields_whatever_the_threads():
    """Reproducible (project requirement): one seed gives identical fields with 1 or 2 threads; another seed
    differs; with the nugget, the nugget noise comes from the same per-draw stream."""
    rng = np.random.default_rng(2)
    xy, xt = rng.uniform(0, 50, (60, 2)), rng.uniform(0, 50, (200, 2))
    d = 20
    basis = make_basis(xy, rng.standard_normal(60), np.ones((60, 1)), covariance="matern32",
                       scale=rng.uniform(5, 10, d), partial_sill=np.ones(d), nugget=np.full(d, 0.1),
                       beta=np.zeros((d, 1)), neighbours=30)
    f = np.ones((200, 1))
    one = kriged_simulations(basis, xt, f, n_sim=3, seed=9, threads=1)
    two = kriged_simulations(basis, xt, f, n_sim=3, seed=9, threads=2)
    np.testing.assert_array_equal(one, two)
    assert one.shape == (d, 3, 200)
    assert not np.array_equal(one, kriged_simulations(basis, xt, f, n_sim=3, seed=10, threads=2))


def test_probability_of_a_larger_area_is_calibrated_over_replicates():
    """Calibration (the definition of a calibrated forecast probability; common practice for checking one): with
    the true parameters known, data and a true field are drawn jointly 500 times (scipy's multivariate normal,
    30 data, 12 x 12 grid, Matérn 3/2 with nugget); each time the P >= 0.5 cells of the map give a polygon and
    300 simulated fields its probability p that the true area above T is larger. The share of replicates
    where the true area is larger must match the mean of p (binomial bound, 3.5 sd). Measured: 0.624 of the
    replicates against a mean p of 0.621."""
    from bayesgeo.gp.kriging import draw_moments

    rng = np.random.default_rng(21)
    g = np.linspace(0.5, 11.5, 12)
    xt = np.array(np.meshgrid(g, g)).reshape(2, -1).T
    family, phi, s2, t2, threshold = "matern32", 2.5, 1.0, 0.2, 0.8
    rho = get_covariance(family).correlation
    hits, probs = [], []
    for _ in range(500):
        xy = rng.uniform(0, 12, (30, 2))
        every = np.vstack([xy, xt])
        cov = s2 * rho(_planar(every, every), phi) + 1e-9 * np.eye(len(every))
        w = stats.multivariate_normal(np.zeros(len(every)), cov).rvs(random_state=rng)
        z = w[:30] + np.sqrt(t2) * rng.standard_normal(30)
        basis = make_basis(xy, z, np.ones((30, 1)), covariance=family, scale=[phi], partial_sill=[s2], nugget=[t2],
                           beta=[[0.0]])
        mean, var = draw_moments(basis, xt, np.ones((len(xt), 1)), include_nugget=False)
        cells = int((stats.norm.sf((threshold - mean[0]) / np.sqrt(var[0])) >= 0.5).sum())
        counts = kriged_simulations(basis, xt, np.ones((len(xt), 1)), n_sim=300, seed=int(rng.integers(1 << 30)),
                                    include_nugget=False, reduce=lambda f: (f > threshold).sum(axis=1))[0]
        probs.append(np.mean(counts > cells))
        hits.append(int((w[30:] > threshold).sum()) > cells)
    p = float(np.mean(probs))
    assert abs(np.mean(hits) - p) < 3.5 * np.sqrt(p * (1 - p) / len(hits))
