"""Trace autocorrelation and integrated autocorrelation time (bayesgeo.convergence.autocorr)."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from bayesgeo.convergence.autocorr import (
    acf_array,
    autocorrelation,
    default_lag_limit,
    iat_array,
    integrated_autocorrelation_time,
    stack_parameters,
)
from bayesgeo.common.validate import InputError


def ar1(phi: float, chains: int = 4, draws: int = 5000, seed: int = 0) -> np.ndarray:
    """Stationary AR(1) chains x_t = phi x_{t-1} + e_t, e_t ~ N(0, 1), started from the stationary law."""
    rng = np.random.default_rng(seed)
    e = rng.normal(size=(chains, draws))
    x = np.empty_like(e)
    x[:, 0] = e[:, 0] / np.sqrt(1.0 - phi**2)
    for t in range(1, draws):
        x[:, t] = phi * x[:, t - 1] + e[:, t]
    return x


@pytest.fixture(scope="module")
def ar09():
    return ar1(0.9)


def test_acf_of_ar1_is_phi_to_the_k(ar09):
    """AR(1) autocorrelation rho_k = phi^k (Box, Jenkins and Reinsel 2008, Time Series Analysis, sec. 3.2).

    Tolerance from Bartlett's formula (from memory): sd(r_k) <= sqrt((1 + phi^2) / ((1 - phi^2) n)),
    about 0.022 for the 4-chain average at phi = 0.9, n = 5,000 per chain; we allow 0.08.
    """
    rho = acf_array(ar09, lag_limit=30)
    assert rho.shape == (4, 31)
    assert np.all(rho[:, 0] == 1.0)
    k = np.arange(31)
    np.testing.assert_allclose(rho.mean(axis=0), 0.9**k, atol=0.08)


@pytest.mark.parametrize("method", ["geyer", "sokal"])
def test_iat_of_ar1(ar09, method):
    """AR(1) IAT = (1 + phi)/(1 - phi) = 19 at phi = 0.9 (Sokal 1997; Geyer 1992).

    Tolerance +-25%: FACTS.md measured that ESS estimates scatter by about that much around N/IAT
    at phi = 0.9 with 4 x 5,000 draws.
    """
    tau = float(iat_array(ar09, method=method))
    assert tau == pytest.approx(19.0, rel=0.25)
    per_chain = iat_array(ar09, method=method, per_chain=True)
    assert per_chain.shape == (4,)
    assert np.all(np.abs(per_chain / 19.0 - 1.0) < 0.4)


def test_iat_of_antithetic_ar1():
    """Negative phi = -0.5: IAT = (1 + phi)/(1 - phi) = 1/3 < 1 (Geyer 1992: antithetic chains beat iid).

    Only Geyer's estimator: Sokal's window assumes positive autocorrelation (documented limitation).
    """
    tau = float(iat_array(ar1(-0.5, seed=3), method="geyer"))
    assert tau == pytest.approx(1.0 / 3.0, rel=0.25)


def test_iat_of_independent_draws_is_one():
    """Independent draws: rho_k = 0 for k >= 1, so IAT = 1 (definition; Sokal 1997)."""
    x = np.random.default_rng(4).normal(size=(4, 4000))
    assert float(iat_array(x)) == pytest.approx(1.0, abs=0.15)
    assert float(iat_array(x, method="sokal")) == pytest.approx(1.0, abs=0.15)


def test_acf_equals_arviz_stats(ar09):
    """Our ACF kernel equals arviz_stats.base.array_stats.autocorr (ArviZ 1.x) on the same draws."""
    from arviz_stats.base import array_stats

    ours = acf_array(ar09)
    theirs = array_stats.autocorr(ar09, axis=-1)
    np.testing.assert_allclose(ours, theirs, rtol=1e-10, atol=1e-12)


def test_geyer_iat_matches_arviz_mean_ess(ar09):
    """Geyer's initial monotone sequence with chains combined (Vehtari et al. 2021, eq. 10) is the
    computation behind ArviZ's ESS of the mean on split chains: N / IAT(split chains) == az.ess(method="mean")."""
    import arviz as az

    for x in (ar09, ar1(0.3, draws=800, seed=9), np.random.default_rng(2).normal(size=(3, 301))):
        half = x.shape[1] // 2
        split = np.vstack([x[:, :half], x[:, -half:]])
        ess = float(az.ess(x, method="mean"))
        assert split.size / float(iat_array(split)) == pytest.approx(ess, rel=1e-10)


def test_stuck_chain_gives_nan():
    """A chain that never moves has no defined autocorrelation (0/0): NaN, never a made-up value."""
    x = np.random.default_rng(5).normal(size=(3, 200))
    x[1] = 2.5
    rho = acf_array(x)
    assert np.isnan(rho[1]).all() and np.isfinite(rho[0]).all()
    per_chain = iat_array(x, per_chain=True)
    assert np.isnan(per_chain[1]) and np.isfinite(per_chain[[0, 2]]).all()


def test_default_lag_limit_covers_the_decay(ar09):
    """Default lag axis reaches past the decay: phi^K < 0.01 at K = default_lag_limit (AR(1) ACF phi^k)."""
    k = default_lag_limit(ar09)
    assert 0.9**k < 0.01
    assert k < ar09.shape[1] - 1
    iid = np.random.default_rng(1).normal(size=(2, 100))
    assert default_lag_limit(iid) == 20


def _tree(rng, chains=4, draws=300):
    import arviz as az

    post = {"nugget": rng.gamma(2.0, size=(chains, draws)), "beta": rng.normal(size=(chains, draws, 2))}
    return az.from_dict({"posterior": post}, dims={"beta": ["term"]}, coords={"term": ["intercept", "x"]})


def test_tree_input_flattens_vector_elements():
    """A vector variable is checked per element, labelled name[coord] (issue 4)."""
    tree = _tree(np.random.default_rng(0))
    draws = stack_parameters(tree)
    assert list(draws["parameter"].values) == ["nugget", "beta[intercept]", "beta[x]"]
    np.testing.assert_array_equal(draws.sel(parameter="beta[x]").values,
                                  tree["posterior"]["beta"].sel(term="x").values)
    acf = autocorrelation(tree, lag_limit=10)
    assert acf.dims == ("parameter", "chain", "lag") and acf.sizes["lag"] == 11
    tau = integrated_autocorrelation_time(tree, var_names=["beta"])
    assert list(tau["parameter"].values) == ["beta[intercept]", "beta[x]"]
    assert "Geyer" in tau.attrs["estimator"]


def test_dataarray_input_keeps_other_dims(ar09):
    """DataArray input: extra dims survive; per_chain values equal the NumPy kernel."""
    da = xr.DataArray(np.stack([ar09, ar09[::-1]]), dims=("site", "chain", "draw"), coords={"site": ["A", "B"]})
    acf = autocorrelation(da, lag_limit=5)
    assert acf.dims == ("site", "chain", "lag")
    tau = integrated_autocorrelation_time(da, per_chain=True, method="sokal")
    assert tau.dims == ("site", "chain")
    np.testing.assert_allclose(tau.sel(site="A").values, iat_array(ar09, method="sokal", per_chain=True))


def test_bad_inputs_raise_input_error():
    """Bad options name the option and the accepted values (common practice, bayesgeo.common.validate)."""
    tree = _tree(np.random.default_rng(0))
    with pytest.raises(InputError, match="lag_limit"):
        autocorrelation(tree, lag_limit=300)
    with pytest.raises(InputError, match="not one of geyer, sokal"):
        integrated_autocorrelation_time(tree, method="magic")
    with pytest.raises(InputError, match="'range' not found"):
        stack_parameters(tree, var_names=["range"])
    with pytest.raises(InputError, match="chain"):
        autocorrelation(xr.DataArray(np.zeros((3, 10)), dims=("a", "draw")))


def test_stuck_chain_with_inexact_mean_gives_nan():
    """A repeated non-representable value (mean off by an ulp) is still recognised as stuck."""
    x = np.random.default_rng(6).gamma(2.0, 0.1, size=(2, 1000))
    x[0] = x[0, 7]
    assert np.isnan(acf_array(x)[0]).all()
    assert np.isnan(iat_array(x, per_chain=True)[0])
