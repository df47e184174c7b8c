"""GP marginal likelihood (value, analytic gradient, PyTensor Op) against outside references.

Sources are named in each test's docstring. The covariance matrices below are written out from the
closed forms (Diggle and Ribeiro 2007, *Model-based Geostatistics*, sec. 3.4) independently of
bayesgeo.gp.covariance.
"""

from __future__ import annotations

import math
import threading
import warnings

import numpy as np
import pytensor
import pytensor.tensor as pt
import pytest
from scipy import stats

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.gp.dense import (
    FAST_FAMILIES,
    JITTER,
    GPLogpGrad,
    loglik_and_grad,
    loglik_numpy,
    marginal_loglik,
)

# closed forms of rho(u), u = d / phi, written out here (not taken from bayesgeo.gp.covariance)
RHO = {
    "exponential": lambda u: np.exp(-u),
    "matern32": lambda u: (1 + u) * np.exp(-u),
    "matern52": lambda u: (1 + u + u**2 / 3) * np.exp(-u),
    "gaussian": lambda u: np.exp(-(u**2)),
    "spherical": lambda u: np.where(u < 1, 1 - 1.5 * u + 0.5 * u**3, 0.0),
}
# parameters (phi, sigma2, tau2) per family: phi in metres for sites spread over ~100 m
PARAMS = {"exponential": 25.0, "matern32": 12.0, "matern52": 10.0, "gaussian": 15.0, "spherical": 45.0}


def _sites(n, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 100.0, size=(n, 2))
    d = np.sqrt(((x[:, None, :] - x[None, :, :]) ** 2).sum(-1))
    return x, d, rng


def _k(d, family, phi, s2, t2):
    return s2 * RHO[family](d / phi) + (t2 + JITTER * s2) * np.eye(len(d))


@pytest.mark.parametrize("nugget", [0.0, 0.3])
@pytest.mark.parametrize("family", FAST_FAMILIES)
def test_value_equals_scipy_multivariate_normal(family, nugget):
    """log N(r | 0, K) equals scipy.stats.multivariate_normal.logpdf (reference library), with and
    without nugget, for every family with a closed-form kernel."""
    x, d, rng = _sites(50)
    r = rng.normal(size=50)
    phi, s2 = PARAMS[family], 1.7
    ref = stats.multivariate_normal(mean=np.zeros(50), cov=_k(d, family, phi, s2, nugget)).logpdf(r)
    cov = get_covariance(family)
    lp = loglik_and_grad(r, d, cov, phi, s2, nugget)[0]
    assert lp == pytest.approx(ref, rel=1e-9, abs=1e-8)
    assert loglik_numpy(r, d, cov, phi, s2, nugget) == pytest.approx(ref, rel=1e-9, abs=1e-8)


@pytest.mark.parametrize("family", ["exponential", "matern32", "matern52", "gaussian"])
def test_value_equals_scikit_learn_gpr(family):
    """Equals scikit-learn GaussianProcessRegressor(optimizer=None).log_marginal_likelihood_value_
    (reference library) with ConstantKernel(sigma2) * Matern(l = sqrt(2 nu) phi, nu) or RBF
    (l = phi / sqrt(2)) + WhiteKernel(tau2 + jitter); alpha=0 so sklearn adds nothing of its own."""
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import RBF, ConstantKernel, Matern, WhiteKernel

    x, d, rng = _sites(60, seed=3)
    y = rng.normal(size=60)
    phi, s2, t2 = PARAMS[family], 0.8, 0.15
    nu = {"exponential": 0.5, "matern32": 1.5, "matern52": 2.5}.get(family)
    base = RBF(length_scale=phi / math.sqrt(2)) if nu is None else Matern(length_scale=math.sqrt(2 * nu) * phi, nu=nu)
    kern = ConstantKernel(s2, constant_value_bounds="fixed") * base + WhiteKernel(t2 + JITTER * s2)
    gpr = GaussianProcessRegressor(kernel=kern, optimizer=None, alpha=0.0, normalize_y=False).fit(x, y)
    lp = loglik_and_grad(y, d, get_covariance(family), phi, s2, t2)[0]
    assert lp == pytest.approx(gpr.log_marginal_likelihood_value_, rel=1e-9)


def _central_difference(f, theta, rel=1e-6):
    g = np.empty(len(theta))
    for i in range(len(theta)):
        h = rel * max(abs(theta[i]), 1e-3)
        up, dn = np.array(theta, float), np.array(theta, float)
        up[i] += h
        dn[i] -= h
        g[i] = (f(up) - f(dn)) / (2 * h)
    return g


@pytest.mark.parametrize("nugget", [0.0, 0.2])
@pytest.mark.parametrize("family", FAST_FAMILIES)
def test_gradient_equals_finite_differences(family, nugget):
    """Analytic gradient 0.5 tr((alpha alpha^T - K^-1) dK/dtheta) and -alpha (Rasmussen and Williams
    2006, eq. 5.9) equal central differences of the scipy multivariate-normal log-density."""
    x, d, rng = _sites(40, seed=5)
    r = rng.normal(size=40)
    cov = get_covariance(family)
    theta = np.array([PARAMS[family], 1.3, nugget])
    lp, g_r, g_phi, g_s2, g_t2 = loglik_and_grad(r, d, cov, *theta)

    def f(th):
        return stats.multivariate_normal(mean=np.zeros(40), cov=_k(d, family, *th)).logpdf(r)

    fd = _central_difference(f, theta)
    np.testing.assert_allclose([g_phi, g_s2, g_t2], fd, rtol=2e-5, atol=2e-5)
    fd_r = _central_difference(lambda rr: stats.multivariate_normal(mean=np.zeros(40), cov=_k(d, family, *theta)).logpdf(rr), r)
    np.testing.assert_allclose(g_r, fd_r, rtol=1e-5, atol=1e-5)


@pytest.mark.parametrize("family", FAST_FAMILIES)
def test_op_gradient_equals_autodiff_reference(family):
    """The Op's gradient equals PyTensor's automatic differentiation through pt.linalg.cholesky
    (the reference graph, method="reference"); Python linker, so that compiling stays quick (the
    Numba implementation is compared with this one in test_numba_and_python_implementations_agree)."""
    x, d, rng = _sites(45, seed=7)
    r0 = rng.normal(size=45)
    cov = get_covariance(family)
    rv, ph, s2, t2 = pt.dvector("r"), pt.dscalar("phi"), pt.dscalar("s2"), pt.dscalar("t2")
    outs = []
    for method in ("fast", "reference"):
        lp = marginal_loglik(rv, d, cov, ph, s2, t2, method=method)
        outs.append([lp, *pt.grad(lp, [rv, ph, s2, t2])])
    f = pytensor.function([rv, ph, s2, t2], outs[0] + outs[1], mode="FAST_COMPILE")
    res = [np.asarray(v) for v in f(r0, PARAMS[family] * 1.1, 0.9, 0.25)]
    for a, b in zip(res[:5], res[5:]):
        np.testing.assert_allclose(a, b, rtol=1e-7, atol=1e-9)


def test_verify_grad_through_transforms():
    """pytensor.gradient.verify_grad (PyTensor's own finite-difference checker) passes for the Op
    composed with log transforms, as in a model that samples log(phi), log(sigma2), log(tau2)."""
    x, d, rng = _sites(30, seed=11)
    r0 = rng.normal(size=30)
    cov = get_covariance("matern32")

    def fn(r, lphi, ls2, lt2):
        return marginal_loglik(r, d, cov, pt.exp(lphi), pt.exp(ls2), pt.exp(lt2), method="fast")

    pytensor.gradient.verify_grad(fn, [r0, np.array(math.log(12.0)), np.array(0.1), np.array(-1.5)],
                                  rng=np.random.default_rng(0), abs_tol=1e-6, rel_tol=1e-6, mode="FAST_COMPILE")


def _not_a_metric():
    """Three 'sites' with d12 = d13 = 0 and d23 large: the correlation matrix [[1,1,1],[1,1,0],[1,0,1]]
    has determinant -1, so K is indefinite whatever the family (not a valid distance matrix)."""
    return np.array([[0.0, 0.0, 0.0], [0.0, 0.0, 1e3], [0.0, 1e3, 0.0]])


@pytest.mark.parametrize("family", FAST_FAMILIES)
def test_failed_factorisation_gives_minus_inf(family):
    """An indefinite K (numpy.linalg.eigvalsh finds a negative eigenvalue: reference library) gives
    logp = -inf and a finite (zero) gradient, both from the kernel and the compiled Op."""
    d = _not_a_metric()
    k = _k(d, family, 1.0, 1.0, 0.0)
    assert np.linalg.eigvalsh(k).min() < -0.1
    r0 = np.array([0.3, -0.2, 0.5])
    cov = get_covariance(family)
    lp, g_r, *g = loglik_and_grad(r0, d, cov, 1.0, 1.0, 0.0)
    assert lp == -math.inf and np.all(g_r == 0) and g == [0.0, 0.0, 0.0]
    assert loglik_numpy(r0, d, cov, 1.0, 1.0, 0.0) == -math.inf
    rv, ph = pt.dvector("r"), pt.dscalar("phi")
    lp_t = marginal_loglik(rv, d, cov, ph, 1.0, 0.0)
    f = pytensor.function([rv, ph], [lp_t, *pt.grad(lp_t, [rv, ph])], mode="FAST_COMPILE")
    val, gr, gp = f(r0, 1.0)
    assert val == -math.inf and np.all(np.isfinite(gr)) and np.isfinite(gp)


@pytest.mark.parametrize("bad", [(0.0, 1.0, 0.1), (-3.0, 1.0, 0.1), (5.0, -1.0, 0.1), (5.0, 1.0, -0.1),
                                 (np.nan, 1.0, 0.1), (5.0, np.inf, 0.1)])
def test_invalid_parameters_give_minus_inf(bad):
    """Scale <= 0, negative sill or nugget, NaN or infinity: outside the parameter space, so the
    log-density is -inf (definition of a density's support) and the sampler rejects the point."""
    x, d, rng = _sites(10)
    assert loglik_and_grad(rng.normal(size=10), d, get_covariance("exponential"), *bad)[0] == -math.inf


def test_numba_and_python_implementations_agree():
    """The Numba implementation (Numba linker, as nutpie uses) gives the value of
    scipy.stats.multivariate_normal (reference library) and the same value and gradient as the Python
    perform (FAST_COMPILE uses the Python linker), with no fall-back to object mode; an indefinite K
    gives -inf there too."""
    x, d, rng = _sites(35, seed=2)
    r0 = rng.normal(size=35)
    rv, ph, s2, t2 = pt.dvector("r"), pt.dscalar("phi"), pt.dscalar("s2"), pt.dscalar("t2")
    dd = pt.dmatrix("d")
    op = GPLogpGrad("matern52")
    lp = op(rv, dd, ph, s2, t2)[0]
    outs = [lp, *pt.grad(lp, [rv, ph, s2, t2])]
    res = {}
    for mode in ("NUMBA", "FAST_COMPILE"):
        with warnings.catch_warnings():
            warnings.simplefilter("error", UserWarning)  # the object-mode fallback warns with UserWarning
            f = pytensor.function([rv, dd, ph, s2, t2], outs, mode=mode)
        assert any(isinstance(node.op, GPLogpGrad) for node in f.maker.fgraph.toposort())
        res[mode] = [np.asarray(v) for v in f(r0, d, 10.0, 1.1, 0.2)]
        bad = f(np.array([0.3, -0.2, 0.5]), _not_a_metric(), 1.0, 1.0, 0.0)
        assert float(bad[0]) == -math.inf and all(np.all(np.isfinite(b)) for b in bad[1:])
    ref = stats.multivariate_normal(mean=np.zeros(35), cov=_k(d, "matern52", 10.0, 1.1, 0.2)).logpdf(r0)
    assert float(res["NUMBA"][0]) == pytest.approx(ref, rel=1e-10)
    for a, b in zip(res["NUMBA"], res["FAST_COMPILE"]):
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12)


def test_general_matern_uses_reference_graph():
    """The Bessel-form Matérn has no Numba kernel: "auto" falls back to the autodiff graph, whose value
    equals scipy.stats.multivariate_normal with scipy.special.kv correlations (reference library);
    "fast" refuses it with a message naming the families covered."""
    from scipy import special

    x, d, rng = _sites(25, seed=4)
    r0 = rng.normal(size=25)
    cov = get_covariance("matern", nu=1.0)
    u = d / 9.0
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where(u > 0, u * special.kv(1.0, u), 1.0)  # 2^(1-nu)/Gamma(nu) = 1 at nu = 1
    ref = stats.multivariate_normal(mean=np.zeros(25), cov=rho + JITTER * np.eye(25) + 0.1 * np.eye(25)).logpdf(r0)
    rv = pt.dvector("r")
    lp = marginal_loglik(rv, d, cov, 9.0, 1.0, 0.1)
    assert not any(isinstance(v.owner.op, GPLogpGrad) for v in pytensor.graph.ancestors([lp]) if v.owner)
    assert float(lp.eval({rv: r0})) == pytest.approx(ref, rel=1e-8)
    with pytest.raises(ValueError, match="exponential, matern32"):
        marginal_loglik(rv, d, cov, 9.0, 1.0, 0.1, method="fast")


def test_threads_share_no_work_buffer():
    """Concurrent calls from several threads (as sampler chains make them) give the same numbers as
    serial calls: each thread has its own work buffer (determinism: same inputs, same output)."""
    x, d, rng = _sites(80, seed=9)
    cov = get_covariance("exponential")
    cases = [(rng.normal(size=80), 10.0 + 5 * i, 0.5 + 0.2 * i, 0.05 * i) for i in range(6)]
    serial = [loglik_and_grad(r, d, cov, *th) for r, *th in cases]
    results = [None] * len(cases)

    def work(i):
        for _ in range(20):
            results[i] = loglik_and_grad(cases[i][0], d, cov, *cases[i][1:])

    threads = [threading.Thread(target=work, args=(i,)) for i in range(len(cases))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    for a, b in zip(results, serial):
        assert a[0] == b[0] and np.array_equal(a[1], b[1]) and a[2:] == b[2:]


def _tiny_model(n=40, seed=21):
    import pymc as pm

    x, d, rng = _sites(n, seed=seed)
    cov = get_covariance("exponential")
    y = rng.multivariate_normal(np.full(n, 1.0), _k(d, "exponential", 20.0, 1.0, 0.1))
    with pm.Model() as model:
        phi = pm.LogNormal("phi", mu=math.log(20.0), sigma=0.5)
        s2 = pm.LogNormal("s2", mu=0.0, sigma=0.5)
        t2 = pm.LogNormal("t2", mu=math.log(0.1), sigma=0.7)
        mu = pm.Normal("mu", 0.0, 2.0)
        pm.Potential("gp", marginal_loglik(y - mu, d, cov, phi, s2, t2))
    return model, y, d


def test_model_logp_and_dlogp_compile():
    """model.compile_logp / compile_dlogp with the Op: the log-density equals the priors
    (scipy.stats lognorm and norm) plus scipy.stats.multivariate_normal (reference libraries), and the
    gradient equals central differences of that log-density."""
    model, y, d = _tiny_model()
    point = {"phi_log__": math.log(18.0), "s2_log__": 0.2, "t2_log__": math.log(0.12), "mu": 0.9}
    lp = model.compile_logp()(point)

    def ref(v):
        phi, s2, t2, mu = math.exp(v[0]), math.exp(v[1]), math.exp(v[2]), v[3]
        out = stats.multivariate_normal(mean=np.full(len(y), mu), cov=_k(d, "exponential", phi, s2, t2)).logpdf(y)
        out += stats.lognorm(s=0.5, scale=20.0).logpdf(phi) + v[0]  # + log-Jacobian of the log transform
        out += stats.lognorm(s=0.5, scale=1.0).logpdf(s2) + v[1]
        out += stats.lognorm(s=0.7, scale=0.1).logpdf(t2) + v[2]
        return out + stats.norm(0.0, 2.0).logpdf(mu)

    v0 = np.array([point[k] for k in ("phi_log__", "s2_log__", "t2_log__", "mu")])
    assert lp == pytest.approx(ref(v0), rel=1e-10)
    dlogp = model.compile_dlogp()(point)
    order = [v.name for v in model.value_vars]
    expected = dict(zip(("phi_log__", "s2_log__", "t2_log__", "mu"), _central_difference(ref, v0)))
    np.testing.assert_allclose(dlogp, [expected[k] for k in order], rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("sampler", [pytest.param("nutpie", marks=pytest.mark.slow), "pymc"])
def test_tiny_model_samples(sampler):
    """A 40-site model samples under nutpie (PyMC 6's default with the Numba backend) and under PyMC's
    own NUTS with the Op, without the object-mode fallback; draws are finite and the posterior of
    the nugget stays near its simulated value 0.1 (loose: 2 x 150 draws). The nutpie case is marked
    slow: its Numba compilation of the model takes about 30 s here."""
    import pymc as pm

    model, y, d = _tiny_model()
    with model, warnings.catch_warnings():
        warnings.filterwarnings("error", message=".*object mode.*")
        idata = pm.sample(draws=150, tune=150, chains=2, cores=1, random_seed=3, nuts_sampler=sampler,
                          progressbar=False, compute_convergence_checks=False)
    post = idata.posterior
    for name in ("phi", "s2", "t2", "mu"):
        assert np.all(np.isfinite(post[name].values))
    assert post["phi"].std() > 0  # the chain moved
    assert 0.01 < float(post["t2"].median()) < 0.6


@pytest.mark.parametrize("method", ["fast", "reference"])
def test_trend_integrated_out_with_an_extra_matrix(method):
    """With extra = b^2 F F^T the likelihood is the marginal of y = F beta + e, e ~ N(0, K),
    beta ~ N(0, b^2 I) (Rasmussen and Williams 2006, sec. 2.7; published formula): equal to
    scipy.stats.multivariate_normal(0, K + b^2 F F^T).logpdf(y) (reference library) and, by Bayes'
    rule, to log N(y | F beta, K) + log N(beta | 0, b^2 I) - log N(beta | m, V) at any beta, with the
    conjugate posterior V = (F^T K^-1 F + I / b^2)^-1, m = V F^T K^-1 y (Gelman et al., BDA3,
    sec. 14.2). The analytic gradient in (phi, sigma2, tau2) matches central differences."""
    import pytensor
    import pytensor.tensor as pt

    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.gp.dense import covariance_matrix, loglik_and_grad, marginal_loglik

    rng = np.random.default_rng(12)
    n, b = 35, 2.5
    xy = rng.random((n, 2))
    d = np.sqrt(((xy[:, None, :] - xy[None, :, :]) ** 2).sum(-1))
    f = np.column_stack([np.ones(n), xy - 0.5])
    y = f @ np.array([0.3, -1.0, 0.5]) + rng.normal(size=n)
    cov = get_covariance("exponential")
    phi, s2, t2 = 0.3, 0.8, 0.2
    k = covariance_matrix(d, cov, phi, s2, t2)
    ref = stats.multivariate_normal(np.zeros(n), k + b**2 * f @ f.T).logpdf(y)
    ki = np.linalg.inv(k)
    v = np.linalg.inv(f.T @ ki @ f + np.eye(3) / b**2)
    m = v @ f.T @ ki @ y
    beta = rng.normal(size=3)
    bayes = (stats.multivariate_normal(f @ beta, k).logpdf(y) + stats.norm(0, b).logpdf(beta).sum()
             - stats.multivariate_normal(m, v).logpdf(beta))
    assert bayes == pytest.approx(ref, rel=1e-9)
    a, s, t = pt.dscalars("a", "s", "t")
    out = marginal_loglik(pt.as_tensor(y), d, cov, a, s, t, method=method, extra=b**2 * f @ f.T)
    fn = pytensor.function([a, s, t], [out, *pt.grad(out, [a, s, t])])
    val, *grad = fn(phi, s2, t2)
    assert val == pytest.approx(ref, rel=1e-10)
    h = 1e-6

    def lp(*p):
        return loglik_and_grad(y, d, cov, *p, extra=b**2 * f @ f.T)[0]

    num = [(lp(phi + h, s2, t2) - lp(phi - h, s2, t2)) / (2 * h), (lp(phi, s2 + h, t2) - lp(phi, s2 - h, t2)) / (2 * h),
           (lp(phi, s2, t2 + h) - lp(phi, s2, t2 - h)) / (2 * h)]
    np.testing.assert_allclose(grad, num, rtol=1e-5, atol=1e-6)
