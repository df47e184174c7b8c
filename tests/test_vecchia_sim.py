"""Tests of bayesgeo.gp.nn_simulate: simulation from the nearest-neighbour (Vecchia) model and the
posterior predictive semivariogram check of nearest-neighbour fits.

Small n throughout; each check names its outside reference.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import linalg, stats
from scipy.spatial.distance import pdist
from sklearn.gaussian_process.kernels import RBF, ConstantKernel, Matern, WhiteKernel

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.common.geometry import distance_matrix
from bayesgeo.gp.dense import JITTER, covariance_matrix
from bayesgeo.fitting.arrays import fit_arrays
from bayesgeo.checks.ppcheck import variogram_check
from bayesgeo.gp.nn import maximin_order, nearest_previous, nn_loglik_and_grad
from bayesgeo.gp.nn_simulate import nn_factors, nn_simulate
from test_loo import make_fit, simulated
from test_modelcheck import assert_replicate_means_match


def _points(n, seed, side=100.0):
    return np.random.default_rng(seed).random((n, 2)) * side


def _implied(xy, family, scale, s2, t2, m, **kw):
    """(I - B)^-1 F^1/2 from nn_simulate itself (identity noise: field k is column k), and its covariance."""
    a = nn_simulate(xy, family, scale, s2, t2, neighbours=m, noise=np.eye(len(xy)), **kw).T
    return a, a @ a.T


def _sklearn_kernel(family, scale, s2, t2):
    """scikit-learn's kernel for our family in the u = d / phi form, nugget and jitter as white noise."""
    if family == "exponential":
        base = Matern(length_scale=scale, nu=0.5)  # exp(-d / l)
    elif family == "matern32":
        base = Matern(length_scale=math.sqrt(3.0) * scale, nu=1.5)  # (1 + sqrt3 d / l) exp(-sqrt3 d / l)
    else:
        base = RBF(length_scale=scale / math.sqrt(2.0))  # exp(-d^2 / (2 l^2)) = exp(-(d / phi)^2)
    return ConstantKernel(s2, "fixed") * base + WhiteKernel(t2 + JITTER * s2, "fixed")


@pytest.mark.parametrize("family", ["exponential", "matern32", "gaussian"])
def test_full_neighbours_give_exactly_K(family):
    """With m = n - 1 the recursion is the chain rule of the joint Gaussian, so the implied covariance
    (I - B)^-1 F (I - B)^-T equals K (Vecchia 1988; Katzfuss and Guinness 2021, sec. 2) to rounding:
    checked against bayesgeo.gp.dense.covariance_matrix and scikit-learn's Matern / RBF kernels
    (plus WhiteKernel for nugget and jitter)."""
    xy = _points(40, 1)
    scale, s2, t2 = 12.0, 1.7, 0.3 if family != "gaussian" else 0.5
    _, implied = _implied(xy, family, scale, s2, t2, 39)
    k = covariance_matrix(distance_matrix(xy, "euclidean"), get_covariance(family), scale, s2, t2)
    np.testing.assert_allclose(implied, k, atol=1e-10 * s2)
    ref = _sklearn_kernel(family, scale, s2, t2)(xy)
    np.testing.assert_allclose(implied, ref, atol=1e-9 * s2)


def test_full_neighbours_great_circle_and_distance_scale():
    """Lon/lat points, distances in km divided by a distance scale: with m = n - 1 the implied
    covariance equals covariance_matrix on bayesgeo.common.geometry's haversine distances (chain rule of a
    Gaussian), so the metric and the scaling are those of the likelihood."""
    rng = np.random.default_rng(4)
    xy = np.column_stack([10.0 + rng.random(30) * 0.2, 50.0 + rng.random(30) * 0.2])
    ds = 25.0
    _, implied = _implied(xy, "exponential", 0.2, 1.0, 0.1, 29, metric="greatcircle", distance_scale=ds)
    k = covariance_matrix(distance_matrix(xy, "greatcircle") / ds, get_covariance("exponential"), 0.2, 1.0, 0.1)
    np.testing.assert_allclose(implied, k, atol=1e-10)


def test_empirical_covariance_of_draws_matches_K():
    """20,000 draws at m = n - 1: the sample covariance agrees with K entry by entry within 5 standard
    errors, sqrt((K_ij^2 + K_ii K_jj) / N) for the sample covariance of a known-mean Gaussian pair
    (Anderson 2003, An Introduction to Multivariate Statistical Analysis, sec. 3.3; from memory), and
    the sample mean with 0 within 5 sd / sqrt(N). The same seed repeats the draws exactly."""
    xy = _points(25, 2)
    n, draws = 25, 20000
    y = nn_simulate(xy, "matern32", 15.0, 1.2, 0.25, neighbours=n - 1, size=draws, seed=11)
    assert y.shape == (draws, n)
    k = covariance_matrix(distance_matrix(xy, "euclidean"), get_covariance("matern32"), 15.0, 1.2, 0.25)
    emp = y.T @ y / draws
    se = np.sqrt((k**2 + np.outer(np.diag(k), np.diag(k))) / draws)
    assert np.max(np.abs(emp - k) / se) < 5.0
    assert np.max(np.abs(y.mean(axis=0)) / np.sqrt(np.diag(k) / draws)) < 5.0
    np.testing.assert_array_equal(y[:50], nn_simulate(xy, "matern32", 15.0, 1.2, 0.25, neighbours=n - 1,
                                                      size=draws, seed=11)[:50])
    other = nn_simulate(xy, "matern32", 15.0, 1.2, 0.25, neighbours=n - 1, size=3, seed=12)
    assert not np.array_equal(other, y[:3])


def test_factors_are_the_likelihoods_conditionals():
    """m = 20 at n = 150: the neighbour sets are the likelihood's (maximin order, nearest previous
    points); each b_i solves K_NN b = K_Ni (scipy.linalg.solve) and f_i + b_i^T K_NN b_i = K_ii
    (conditional-variance decomposition of a Gaussian, Rasmussen and Williams 2006, eq. A.6) to
    rounding."""
    xy = _points(150, 3)
    nf = nn_factors(xy, "matern32", 14.0, 1.0, 0.2, neighbours=20)
    order = maximin_order(xy)
    np.testing.assert_array_equal(nf.order, order)
    np.testing.assert_array_equal(nf.nbr, nearest_previous(xy, order, neighbours=20))
    k = covariance_matrix(distance_matrix(xy, "euclidean"), get_covariance("matern32"), 14.0, 1.0, 0.2)
    for i in range(150):
        nb = nf.nbr[i][nf.nbr[i] >= 0]
        knn = k[np.ix_(nb, nb)]
        b = nf.b[i, :nb.size]
        np.testing.assert_allclose(b, linalg.solve(knn, k[nb, i], assume_a="pos"), rtol=1e-8, atol=1e-12)
        assert nf.f[i] + b @ knn @ b == pytest.approx(k[i, i], rel=1e-12)
        assert np.all(nf.b[i, nb.size:] == 0.0)


def test_simulated_model_has_the_nn_likelihood_as_its_density():
    """m = 10 at n = 60: the log density of N(0, A A^T), A the linear map of nn_simulate (scipy.stats
    multivariate_normal), equals the nearest-neighbour log-likelihood bayesgeo.gp.nn.nn_loglik_and_grad
    at several vectors: the draws come from the very model a nearest-neighbour fit evaluates (product
    of Gaussian conditionals, Vecchia 1988)."""
    xy = _points(60, 5)
    _, implied = _implied(xy, "exponential", 10.0, 1.0, 0.1, 10)
    rng = np.random.default_rng(0)
    for _ in range(3):
        y = rng.standard_normal(60)
        ref = stats.multivariate_normal(np.zeros(60), implied).logpdf(y)
        ll = nn_loglik_and_grad(y, xy, "exponential", 10.0, 1.0, 0.1, neighbours=10)[0]
        assert ll == pytest.approx(ref, abs=1e-8)


def test_implied_diagonal_is_close_to_K_at_m20_but_not_exact():
    """m = 20 at n = 150: each conditional step is exact (previous test) but the implied covariance
    of a point's neighbours is itself approximate, so the implied variances are close to, not equal
    to, K_ii (Katzfuss and Guinness 2021, sec. 2: the Vecchia covariance matches K only where the
    conditioning sets are complete). Measured here: largest relative error 0.06%; asserted < 1%, and
    > 0 to document that it is not exact. With m = n - 1 it is exact (first test)."""
    xy = _points(150, 3)
    _, implied = _implied(xy, "matern32", 14.0, 1.0, 0.2, 20)
    k = covariance_matrix(distance_matrix(xy, "euclidean"), get_covariance("matern32"), 14.0, 1.0, 0.2)
    rel = np.abs(np.diag(implied) - np.diag(k)) / np.diag(k)
    assert rel.max() < 0.01
    assert rel.max() > 1e-10


def test_semivariogram_of_simulated_fields_is_the_model_semivariogram():
    """m = 20, n = 300, 300 fields: Matheron's estimator sum (y_i - y_j)^2 / (2 N(h)) (pairs from scipy
    pdist) averaged over fields agrees in each of 5 lag bins with the mean over the bin's pairs of
    gamma(d) = sigma^2 (1 - rho(d)) + tau^2 (+ the jitter, part of K's diagonal), the expectation
    under the exact model (Matheron 1962; Cressie 1993, sec. 2.4), within 4 standard errors across
    fields plus 1% of the sill for the approximation."""
    xy = _points(300, 6)
    s2, t2, scale = 1.0, 0.2, 12.0
    y = nn_simulate(xy, "matern32", scale, s2, t2, neighbours=20, size=300, seed=5)
    d = pdist(xy)
    edges = np.linspace(0.0, 60.0, 6)
    cov = get_covariance("matern32")
    gamma = s2 * (1.0 + JITTER) + t2 - s2 * cov.correlation(d, scale)
    sq = np.stack([pdist(f[:, None], "sqeuclidean") for f in y]) / 2.0  # (fields, pairs)
    for lo, hi in zip(edges[:-1], edges[1:]):
        sel = (d > lo) & (d <= hi)
        per_field = sq[:, sel].mean(axis=1)
        se = per_field.std(ddof=1) / math.sqrt(per_field.size)
        assert abs(per_field.mean() - gamma[sel].mean()) < 4.0 * se + 0.01 * (s2 + t2)


def test_bad_inputs_are_value_errors():
    """Parameters, sizes and neighbour sets are checked where they enter (scipy.spatial.distance
    style: ValueError for a wrong value; common practice)."""
    xy = _points(20, 7)
    with pytest.raises(ValueError, match="scale"):
        nn_simulate(xy, "exponential", -1.0, 1.0, 0.1, seed=0)
    with pytest.raises(ValueError, match="nugget"):
        nn_simulate(xy, "exponential", 1.0, 1.0, -0.1, seed=0)
    with pytest.raises(ValueError, match="seed or rng"):
        nn_simulate(xy, "exponential", 1.0, 1.0, 0.1, seed=0, rng=np.random.default_rng(0))
    with pytest.raises(ValueError, match="parameter values"):
        nn_simulate(xy, "exponential", [1.0, 2.0], 1.0, 0.1, size=3, seed=0)
    with pytest.raises(ValueError, match="noise"):
        nn_simulate(xy, "exponential", 1.0, 1.0, 0.1, noise=np.zeros((2, 5)))
    with pytest.raises(ValueError, match="no nearest-neighbour kernel"):
        nn_simulate(xy, get_covariance("matern", 1.0), 1.0, 1.0, 0.1, seed=0)
    order = maximin_order(xy)
    nbr = nearest_previous(xy, order, neighbours=4)
    with pytest.raises(ValueError, match="earlier"):
        nn_factors(xy, "exponential", 1.0, 1.0, 0.1, order=order[::-1].copy(), nbr=nbr)
    gap = nbr.copy()
    gap[order[10], 0] = -1
    with pytest.raises(ValueError, match="padded"):
        nn_factors(xy, "exponential", 1.0, 1.0, 0.1, order=order, nbr=gap)
    np.testing.assert_array_equal(nn_factors(xy, "exponential", 1.0, 1.0, 0.1, order=order, nbr=nbr).f,
                                  nn_factors(xy, "exponential", 1.0, 1.0, 0.1, neighbours=4).f)


def test_one_factorisation_per_parameter_set_and_threads_do_not_change_results():
    """Per-field parameters give, field by field, the same numbers as separate calls with the same
    noise (the recursion is deterministic given the noise), whatever the number of threads."""
    xy = _points(50, 8)
    noise = np.random.default_rng(1).standard_normal((4, 50))
    scales = np.array([5.0, 10.0, 15.0, 20.0])
    many = nn_simulate(xy, "matern52", scales, 1.0, 0.1, neighbours=8, noise=noise, threads=2)
    one = nn_simulate(xy, "matern52", scales, 1.0, 0.1, neighbours=8, noise=noise, threads=1)
    np.testing.assert_array_equal(many, one)
    for s in range(4):
        np.testing.assert_array_equal(many[s], nn_simulate(xy, "matern52", scales[s], 1.0, 0.1, neighbours=8,
                                                           noise=noise[s:s + 1])[0])


# --- the semivariogram check of a nearest-neighbour fit ------------------------------------------


def _nn_tree(ds, m, **kw):
    """make_fit's tree, recorded as a nearest-neighbour fit with m neighbours (the draws unchanged)."""
    tree = make_fit(ds, **kw)
    settings = json.loads(tree.attrs["settings"])
    settings["model"]["approx"], settings["model"]["neighbours"] = "nn", int(m)
    tree.attrs = {**tree.attrs, "settings": json.dumps(settings)}
    return tree


def test_variogram_check_of_nn_fit_has_the_dense_structure_and_is_reproducible():
    """A nearest-neighbour fit gives the same variables, dimensions and coordinates as the dense fit
    of the same data and draws; the observed semivariogram, pair counts, lags and model band are the
    same (Matheron's estimator on the same pairs; common practice), the replicates differ only
    because they come from the Vecchia model; the same seed repeats them exactly."""
    ds = simulated(60, seed=21)
    dense = variogram_check(make_fit(ds, trend=1, ndraw=20), replicates=25, bins=7, seed=3)
    tree = _nn_tree(ds, 10, trend=1, ndraw=20)
    nn = variogram_check(tree, replicates=25, bins=7, seed=3)
    assert set(nn.data_vars) == set(dense.data_vars)
    assert {k: v.dims for k, v in nn.variables.items()} == {k: v.dims for k, v in dense.variables.items()}
    assert set(nn.attrs) == set(dense.attrs)
    assert "m = 10" in nn.attrs["simulation"] and "exact" in dense.attrs["simulation"]
    np.testing.assert_array_equal(nn["pairs"].values, dense["pairs"].values)
    np.testing.assert_allclose(nn["observed"].values, dense["observed"].values, rtol=1e-10)
    np.testing.assert_allclose(nn["lag"].values, dense["lag"].values, rtol=1e-12)
    for v in ("model_q05", "model_q50", "model_q95", "curve_q50"):
        np.testing.assert_allclose(nn[v].values, dense[v].values, rtol=1e-12)
    assert np.all(np.isfinite(nn["replicate_semivariance"].values))
    again = variogram_check(tree, replicates=25, bins=7, seed=3)
    np.testing.assert_array_equal(again["replicate_semivariance"].values, nn["replicate_semivariance"].values)
    other = variogram_check(tree, replicates=25, bins=7, seed=4)
    assert not np.array_equal(other["replicate_semivariance"].values, nn["replicate_semivariance"].values)
    assert any("licensed professional" in c for c in nn.attrs["cautions"])


def test_variogram_check_progress_and_chunking_do_not_change_the_numbers(monkeypatch, recording_progress):
    """The check advances a progress bar once per replicate and once for the semivariances (common
    practice: long work shows progress), for nn and dense fits alike; simulating the nn replicates
    in chunks draws the same noise as one call (numpy Generators stream normals without a buffer),
    so the chunked and the one-piece results are identical."""
    from bayesgeo.checks import ppcheck
    factory, bars = recording_progress

    ds = simulated(50, seed=23)
    tree = _nn_tree(ds, 8, ndraw=30)
    chunked = variogram_check(tree, replicates=60, bins=6, seed=5, progress=factory)  # 25 + 25 + 10
    monkeypatch.setattr(ppcheck, "REPLICATE_CHUNK", 1000)
    whole = variogram_check(tree, replicates=60, bins=6, seed=5)
    np.testing.assert_array_equal(chunked["replicate_semivariance"].values, whole["replicate_semivariance"].values)
    variogram_check(make_fit(ds, ndraw=30), replicates=12, bins=6, seed=5, progress=factory)
    assert [(b.total, b.n) for b in bars] == [(61, 61), (13, 13)]


@pytest.mark.parametrize("m", [29, 6])
def test_nn_replicates_reproduce_quadratic_form_expectation(m):
    """One parameter value, 1,500 replicates: the mean replicate semivariance of each bin equals
    E[r^T A r] = tr(A Sigma) + mu^T A mu for r = M z, z ~ N(mu, Sigma) (expectation of a quadratic
    form; Searle 1971, Linear Models, sec. 2.5) within 4 Monte Carlo standard errors, with Sigma = K
    for m = n - 1 (chain rule: exact) and Sigma the Vecchia covariance for m = 6 (the fitted model)."""
    ds = simulated(30, seed=12)
    tree = _nn_tree(ds, m, ndraw=10, spread=0.0)
    vc = variogram_check(tree, replicates=1500, bins=5, seed=3)
    fa = fit_arrays(tree)
    spec = fa.spec
    d0 = {k: v.reshape(-1, *v.shape[2:])[0] for k, v in fa.draws.items()}
    _, sigma = _implied(fa.xy, spec.covariance, d0["practical_range_z"] / spec.range_factor, d0["sd_z"] ** 2,
                        d0["nugget_sd_z"] ** 2, m, distance_scale=spec.distance_scale)
    if m == fa.n - 1:
        k = covariance_matrix(distance_matrix(fa.xy, "euclidean") / spec.distance_scale,
                              get_covariance(spec.covariance), d0["practical_range_z"] / spec.range_factor,
                              d0["sd_z"] ** 2, d0["nugget_sd_z"] ** 2)
        np.testing.assert_allclose(sigma, k, atol=1e-10)
    s = spec.value_sd
    cov = s * s * sigma
    mean = spec.value_mean + s * (fa.design @ d0["beta_z"])
    assert_replicate_means_match(vc, fa, ds, cov, mean, bins=5)


def test_cli_variogram_check_of_nn_fit(tmp_path, capsys):
    """`bayesgeo variogram-check DIR --json` on a saved nearest-neighbour fit prints exactly one JSON
    object (our documented CLI contract, docs/cli.md; common practice for machine-readable output),
    writes the figure and the table, and the table equals variogram_check on the same fit (the CLI
    is a thin shell over the Python function)."""
    import pandas as pd

    from bayesgeo.cli import main

    tree = _nn_tree(simulated(40, seed=22), 8, ndraw=6)
    (tmp_path / "fit").mkdir()
    tree.to_netcdf(tmp_path / "fit" / "posterior.nc", engine="netcdf4")
    assert main(["variogram-check", str(tmp_path / "fit"), "--replicates", "12", "--bins", "6", "--seed", "4",
                 "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["replicates"] == 12 and len(out["observed"]) == 6
    assert (tmp_path / "fit" / "variogram_check.png").stat().st_size > 0
    got = pd.read_csv(tmp_path / "fit" / "variogram_check.csv")
    ref = variogram_check(tree, replicates=12, bins=6, seed=4)
    np.testing.assert_allclose(got["replicate_q95"].values, ref["replicate_q95"].values, rtol=1e-8)
    np.testing.assert_allclose(got["observed"].values, ref["observed"].values, rtol=1e-8)
