"""Tests of bayesgeo.gp.trend_posterior: the trend coefficients drawn from their exact conditional
posterior after the covariance parameters were sampled with the coefficients integrated out."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy import stats

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.gp.dense import covariance_matrix, solve_covariance
from bayesgeo.fitting.model import model_inputs
from bayesgeo.gp.trend_posterior import draw_trend, trend_prior_covariance


def _inputs(n=40, seed=2, trend=1, covariance="matern32"):
    rng = np.random.default_rng(seed)
    xy = rng.random((n, 2)) * 500.0
    z = simulate_field(xy, covariance="matern32", practical_range=150.0, partial_sill=1.0, nugget=0.2,
                       mean=4.0, rng=rng) + 0.003 * xy[:, 0]
    ds = points_dataset(xy[:, 0], xy[:, 1], z, attrs={"source": "sim", "distance_units": "m"})
    spec, y, design, dist = model_inputs(ds, covariance=covariance, trend=trend)
    return spec, y, design.values, dist


def _posterior(values: dict, chains=1, draws=1):
    """A posterior Dataset repeating fixed parameter values (chain, draw)."""
    return xr.Dataset({k: (("chain", "draw"), np.full((chains, draws), v)) for k, v in values.items()},
                      coords={"chain": np.arange(chains), "draw": np.arange(draws)})


@pytest.mark.parametrize("family, nu", [("exponential", None), ("matern32", None), ("matern52", None),
                                        ("gaussian", None), ("spherical", None), ("matern", 1.0)])
def test_solve_covariance_equals_numpy_solve(family, nu):
    """K^-1 B from the Numba kernel (or SciPy for the general Matérn) equals numpy.linalg.solve with
    the K of covariance_matrix (reference library); a matrix that is not positive definite raises."""
    _, _, f, dist = _inputs(n=30)
    cov = get_covariance(family, nu)
    rhs = np.column_stack([f, np.linspace(-1.0, 1.0, 30)])
    k = covariance_matrix(dist, cov, 0.2, 1.3, 0.4)
    np.testing.assert_allclose(solve_covariance(dist, cov, 0.2, 1.3, 0.4, rhs), np.linalg.solve(k, rhs),
                               rtol=1e-8, atol=1e-10)
    with pytest.raises(np.linalg.LinAlgError):
        solve_covariance(dist, cov, 0.2, 1.0, -5.0, rhs)


def test_trend_prior_covariance_is_the_covariance_of_f_beta():
    """Cov(F beta) = F Cov(beta) F' = b^2 F F' for beta ~ N(0, b^2 I) (standard identity), checked
    against the sample covariance of simulated F beta (Monte Carlo, 200,000 draws)."""
    _, _, f, _ = _inputs(n=6)
    b = 3.0
    sims = np.random.default_rng(0).normal(0.0, b, (200_000, f.shape[1])) @ f.T
    np.testing.assert_allclose(trend_prior_covariance(f, b), np.cov(sims.T), atol=0.05 * b**2 * np.abs(f).max() ** 2)


def test_draws_have_the_conditional_mean_and_covariance():
    """At fixed covariance parameters, the draws are N(m, V) with V = (F' K^-1 F + I / b^2)^-1 and
    m = V F' K^-1 y (Rasmussen and Williams 2006, sec. 2.7; Gelman et al., BDA3, sec. 14.2; published
    formulas; m, V from numpy.linalg.inv here). 20,000 draws: each mean within 4.5 Monte Carlo standard
    errors, each variance and covariance within 5% of V's scale (sd of a sample variance: sqrt(2 / N) =
    1%), and the Mahalanobis distances follow chi-square(p) (scipy.stats.kstest, p > 0.001)."""
    spec, y, f, dist = _inputs()
    prange, sd, nsd = 0.3, 0.9, 0.4
    k = covariance_matrix(dist, get_covariance("matern32"), prange / spec.range_factor, sd**2, nsd**2)
    ki = np.linalg.inv(k)
    v = np.linalg.inv(f.T @ ki @ f + np.eye(f.shape[1]) / spec.priors.beta_sd**2)
    m = v @ f.T @ ki @ y
    post = _posterior({"practical_range_z": prange, "sd_z": sd, "nugget_sd_z": nsd}, chains=2, draws=10_000)
    got = draw_trend(post, spec, y, f, dist, seed=4)
    assert got.dims == ("chain", "draw", "term") and list(got["term"].values) == list(spec.terms)
    flat = got.values.reshape(-1, f.shape[1])
    se = np.sqrt(np.diag(v) / len(flat))
    assert np.all(np.abs(flat.mean(axis=0) - m) < 4.5 * se)
    scale = np.sqrt(np.outer(np.diag(v), np.diag(v)))
    assert np.all(np.abs(np.cov(flat.T) - v) < 0.05 * scale)
    d2 = np.einsum("ij,jk,ik->i", flat - m, np.linalg.inv(v), flat - m)
    assert stats.kstest(d2, stats.chi2(f.shape[1]).cdf).pvalue > 0.001


def test_same_seed_same_draws_whatever_the_threads():
    """Reproducible: the same posterior and seed give identical coefficients with one thread or two,
    and a different seed gives different ones."""
    spec, y, f, dist = _inputs(n=25)
    rng = np.random.default_rng(1)
    post = xr.Dataset({"practical_range_z": (("chain", "draw"), rng.uniform(0.1, 0.5, (2, 30))),
                       "sd_z": (("chain", "draw"), rng.uniform(0.5, 1.0, (2, 30))),
                       "nugget_sd_z": (("chain", "draw"), rng.uniform(0.2, 0.5, (2, 30)))})
    a = draw_trend(post, spec, y, f, dist, seed=9, workers=1)
    b = draw_trend(post, spec, y, f, dist, seed=9, workers=2)
    np.testing.assert_array_equal(a.values, b.values)
    assert not np.array_equal(a.values, draw_trend(post, spec, y, f, dist, seed=10).values)
