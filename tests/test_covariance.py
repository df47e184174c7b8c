"""Covariance library against outside references (sources named per test)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special

from bayesgeo.gp.covariance import FAMILIES, get_covariance

D = np.linspace(0.0, 12.0, 241)


def _bessel_matern(u, nu):
    """Matérn correlation in the Bessel form: 2^(1-nu)/Gamma(nu) u^nu K_nu(u), via scipy.special.kv."""
    out = np.ones_like(u)
    pos = u > 0
    out[pos] = 2 ** (1 - nu) / special.gamma(nu) * u[pos] ** nu * special.kv(nu, u[pos])
    return out


@pytest.mark.parametrize("name,nu", [("exponential", 0.5), ("matern32", 1.5), ("matern52", 2.5)])
def test_closed_forms_equal_bessel_form(name, nu):
    """Closed forms for nu = 1/2, 3/2, 5/2 equal the Bessel form (scipy.special.kv);
    half-integer Matérn identities, Abramowitz and Stegun 10.2.17."""
    cov = get_covariance(name)
    np.testing.assert_allclose(cov.correlation(D, 2.0), _bessel_matern(D / 2.0, nu), rtol=1e-12, atol=1e-15)
    gen = get_covariance("matern", nu=nu)
    np.testing.assert_allclose(gen.correlation(D, 2.0), cov.correlation(D, 2.0), rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("name,nu", [("exponential", 0.5), ("matern32", 1.5), ("matern52", 2.5), ("matern", 1.0)])
def test_matern_equals_scikit_learn(name, nu):
    """scikit-learn's Matern kernel uses sqrt(2 nu) d / l; ours uses d / phi, so l = sqrt(2 nu) phi."""
    from sklearn.gaussian_process.kernels import Matern

    cov = get_covariance(name, nu=nu if name == "matern" else None)
    phi = 3.7
    x = np.linspace(0, 20, 40)[:, None]
    k = Matern(length_scale=math.sqrt(2 * nu) * phi, nu=nu)(x)
    d = np.abs(x - x.T)
    np.testing.assert_allclose(cov.correlation(d, phi), k, rtol=1e-10, atol=1e-12)


def test_gaussian_equals_scikit_learn_rbf():
    """scikit-learn RBF is exp(-d^2 / (2 l^2)); ours exp(-(d/phi)^2), so l = phi / sqrt(2)."""
    from sklearn.gaussian_process.kernels import RBF

    phi = 2.5
    x = np.linspace(0, 10, 30)[:, None]
    np.testing.assert_allclose(get_covariance("gaussian").correlation(np.abs(x - x.T), phi),
                               RBF(length_scale=phi / math.sqrt(2))(x), rtol=1e-12)


@pytest.mark.parametrize("name,factor", [("exponential", 2.996), ("gaussian", 1.731), ("matern32", 4.744),
                                         ("matern52", 5.919), ("spherical", 1.0)])
def test_practical_range_factors(name, factor):
    """Practical range (correlation 0.05): exponential 3 phi (-ln 0.05 = 2.996), Gaussian sqrt(3) phi
    (1.731), Matérn 3/2 4.744 phi, 5/2 5.919 phi (shared/FACTS.md, checked by running code);
    spherical: the range itself (common practice)."""
    cov = get_covariance(name)
    assert cov.range_factor == pytest.approx(factor, abs=1e-3)
    if name != "spherical":
        assert cov.correlation(np.array([cov.practical_range(1.0)]), 1.0)[0] == pytest.approx(0.05, abs=1e-10)
    np.testing.assert_allclose(cov.scale_from_range(cov.practical_range(7.5)), 7.5)


def test_exponential_practical_range_is_minus_log_005():
    """exp(-r/phi) = 0.05 gives r = -ln(0.05) phi exactly (algebra)."""
    assert get_covariance("exponential").range_factor == pytest.approx(-math.log(0.05), rel=1e-10)


@pytest.mark.parametrize("name", [f for f in FAMILIES if f != "matern"])
def test_variogram_covariance_identities(name):
    """gamma(d) = C(0) - C(d) for d > 0, rho(d) = C(d) / C(0), gamma(0) = 0 (definitions)."""
    cov = get_covariance(name)
    sigma2, tau2, phi = 2.3, 0.4, 1.7
    d = D[1:]
    c0 = cov.covariance(np.array([0.0]), phi, sigma2, tau2)[0]
    assert c0 == pytest.approx(sigma2 + tau2)
    np.testing.assert_allclose(cov.semivariance(d, phi, sigma2, tau2), c0 - cov.covariance(d, phi, sigma2, tau2))
    np.testing.assert_allclose(cov.covariance(d, phi, sigma2) / cov.covariance(np.array([0.0]), phi, sigma2),
                               cov.correlation(d, phi))
    assert cov.semivariance(np.array([0.0]), phi, sigma2, tau2)[0] == 0.0


def test_spherical_reaches_sill_at_range():
    """Spherical: rho = 1 - 1.5 u + 0.5 u^3 for u < 1, 0 beyond (common practice)."""
    cov = get_covariance("spherical")
    assert cov.correlation(np.array([0.5]), 1.0)[0] == pytest.approx(1 - 0.75 + 0.0625)
    np.testing.assert_array_equal(cov.correlation(np.array([1.0, 2.0, 10.0]), 1.0), 0.0)


@pytest.mark.parametrize("name,nu", [("exponential", None), ("matern32", None), ("matern52", None),
                                     ("gaussian", None), ("spherical", None), ("matern", 1.3)])
def test_dlogscale_matches_finite_difference(name, nu):
    """d rho / d log(scale) against a central finite difference (calculus)."""
    cov = get_covariance(name, nu=nu)
    d = np.linspace(0.05, 6.0, 50)
    phi, h = 1.9, 1e-6
    fd = (cov.correlation(d, phi * math.exp(h)) - cov.correlation(d, phi * math.exp(-h))) / (2 * h)
    np.testing.assert_allclose(cov.correlation_dlogscale(d, phi), fd, rtol=1e-5, atol=1e-8)


@pytest.mark.parametrize("name,nu", [("exponential", None), ("matern32", None), ("matern52", None),
                                     ("gaussian", None), ("spherical", None), ("matern", 1.3)])
def test_pytensor_form_equals_numpy(name, nu):
    """One definition for numpy and PyTensor: both give the same numbers."""
    import pytensor

    cov = get_covariance(name, nu=nu)
    d = np.linspace(0.0, 5.0, 26)
    fn = pytensor.function([], cov.pt_correlation(pytensor.tensor.as_tensor(d), 1.3))
    np.testing.assert_allclose(fn(), cov.correlation(d, 1.3), rtol=1e-10, atol=1e-12)


def test_microergodic():
    """Zhang (2004): sigma^2 / phi^(2 nu) for Matérn; undefined (NaN) for Gaussian."""
    assert get_covariance("matern32").microergodic(2.0, 4.0) == pytest.approx(2.0 / 4.0**3)
    assert get_covariance("exponential").microergodic(2.0, 4.0) == pytest.approx(0.5)
    assert np.isnan(get_covariance("gaussian").microergodic(2.0, 4.0))


def test_bad_names_and_nu():
    """Unknown family names, a Matérn without nu and nu on a fixed-smoothness family are refused with the valid names (behaviour check)."""
    with pytest.raises(ValueError, match="unknown covariance 'matren'.*exponential"):
        get_covariance("matren")
    with pytest.raises(ValueError, match="needs its smoothness nu"):
        get_covariance("matern")
    with pytest.raises(ValueError, match="nu applies to 'matern' only"):
        get_covariance("exponential", nu=0.5)
    with pytest.raises(ValueError, match="scale must be positive"):
        get_covariance("exponential").correlation(D, -1.0)
    with pytest.raises(TypeError):
        get_covariance(3)
