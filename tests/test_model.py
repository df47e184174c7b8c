"""Tests of bayesgeo.fitting.model: the log-likelihood, the trend coefficients' conditional posterior, the
priors as PyMC sees them, standardisation and input checks. No sampling here (see test_sampling)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.spatial.distance import cdist

from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.gp.dense import JITTER
from bayesgeo.fitting.model import FitSpec, build_model, model_inputs
from bayesgeo.fitting.priors import pc_range_rate, pc_sd_rate
from bayesgeo.common.validate import InputError


def _data(n=35, seed=4, positive=False, site=None):
    rng = np.random.default_rng(seed)
    xy = np.column_stack([431_000 + 300 * rng.random(n), 5_622_000 + 200 * rng.random(n)])
    z = simulate_field(xy, covariance="matern32", practical_range=120.0, partial_sill=0.5, nugget=0.1,
                       mean=2.0, rng=rng) + 0.002 * (xy[:, 0] - 431_150)
    value = np.exp(z) if positive else z
    return points_dataset(xy[:, 0], xy[:, 1], value, site=site,
                          attrs={"source": "sim.csv", "value_column": "conc", "distance_units": "m",
                                 "value_units": "mg/kg", "coords": "xy"})


@pytest.fixture(scope="module")
def model_and_fns():
    """One model (trend order 1) and its potential and joint logp, compiled without Numba (fast).

    Built with the trend coefficients sampled and the sds on the log scale (the private
    ``_coordinates="legacy", _trend="sampled"``): the model exactly as docs/model.md writes it down.
    The default build is tested equal to it (change of variables, trend integrated out) below."""
    ds = _data()
    model, spec = build_model(ds, covariance="matern32", trend=1, _coordinates="legacy", _trend="sampled")
    (pot,) = model.replace_rvs_by_values([model.potentials[0]])
    loglik = model.compile_fn(pot, inputs=model.value_vars, mode="FAST_COMPILE", point_fn=False)
    logp = model.compile_logp(mode="FAST_COMPILE")
    return ds, model, spec, loglik, logp


def _point(model, prange_z, sd_z, nsd_z, beta_z):
    """The model's unconstrained point for the given parameters: log range, log sds, or in the share
    coordinates (log(sd^2 + tau^2), logit(sd^2 / (sd^2 + tau^2))) (docs/model.md, "Parametrisation")."""
    out = {"practical_range_z_log__": np.log(prange_z), "beta_z": np.asarray(beta_z, dtype=float)}
    if "variance_coords_z" in model.named_vars:
        out["variance_coords_z"] = np.array([np.log(sd_z**2 + nsd_z**2), np.log(sd_z**2 / nsd_z**2)])
    else:
        out["sd_z_log__"] = np.log(sd_z)
        if "nugget_sd_z" in model.named_vars:
            out["nugget_sd_z_log__"] = np.log(nsd_z)
    return out


def _m32(d, phi):
    """Matérn nu = 3/2 correlation (1 + d/phi) exp(-d/phi) (Diggle and Ribeiro 2007, sec. 3.4; published formula)."""
    u = d / phi
    return (1 + u) * np.exp(-u)


def test_loglik_equals_scipy_multivariate_normal_in_data_units(model_and_fns):
    """The model's marginal log-likelihood at fixed parameters equals
    scipy.stats.multivariate_normal.logpdf of the values in data units (reference library), after the
    change of variables y = (z - m) / s, whose Jacobian contributes n log s (standard calculus).
    Distances by scipy.spatial.distance.cdist, correlation by the published Matérn 3/2 formula."""
    ds, model, spec, loglik, _ = model_and_fns
    z = ds["value"].values
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    d = cdist(xy, xy)
    from bayesgeo.explore.trend import design_matrix

    x = design_matrix(ds, 1).values
    s, dmax = spec.value_sd, spec.distance_scale
    for prange_z, sd_z, nsd_z, beta_z in [(0.4, 0.9, 0.3, [0.1, -0.2, 0.3]), (1.3, 1.4, 0.05, [0.0, 0.5, 0.0])]:
        point = _point(model, prange_z, sd_z, nsd_z, beta_z)
        ours = float(loglik(*[point[v.name] for v in model.value_vars]))
        # data units
        phi = prange_z * dmax / spec.range_factor
        sigma2, tau2 = (sd_z * s) ** 2, (nsd_z * s) ** 2
        beta = s * np.asarray(beta_z)
        beta[0] += spec.value_mean
        cov = sigma2 * _m32(d, phi) + (tau2 + JITTER * sigma2) * np.eye(len(z))
        ref = stats.multivariate_normal(mean=x @ beta, cov=cov).logpdf(z)
        assert ours - len(z) * np.log(s) == pytest.approx(ref, rel=1e-9, abs=1e-8)


def test_beta_conditional_posterior_is_the_gls_normal(model_and_fns):
    """With the covariance parameters held fixed, the joint log density as a function of the trend
    coefficients is, up to a constant, the log density of the conjugate Gaussian linear model's
    posterior N(m, V), V = (X' K^-1 X + I / b^2)^-1, m = V X' K^-1 y (Gelman et al., BDA3, sec. 14.2;
    Rasmussen and Williams 2006, sec. 2.7; published formula). Checked exactly at random coefficients."""
    ds, model, spec, _, logp = model_and_fns
    from bayesgeo.explore.trend import design_matrix

    x = design_matrix(ds, 1).values
    y = (ds["value"].values - spec.value_mean) / spec.value_sd
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    d = cdist(xy, xy) / spec.distance_scale
    prange_z, sd_z, nsd_z = 0.6, 1.1, 0.4
    k = sd_z**2 * _m32(d, prange_z / spec.range_factor) + (nsd_z**2 + JITTER * sd_z**2) * np.eye(len(y))
    ki = np.linalg.inv(k)
    v = np.linalg.inv(x.T @ ki @ x + np.eye(3) / spec.priors.beta_sd**2)
    m = v @ x.T @ ki @ y
    post = stats.multivariate_normal(mean=m, cov=v)
    rng = np.random.default_rng(0)
    diffs = []
    for _ in range(6):
        b = m + rng.normal(0, 0.5, 3)
        diffs.append(logp(_point(model, prange_z, sd_z, nsd_z, b)) - post.logpdf(b))
    np.testing.assert_allclose(diffs, diffs[0], rtol=0, atol=1e-8)


def _sd_tau(u):
    """(sigma, tau) from u = (log(sigma^2 + tau^2), logit(sigma^2 / (sigma^2 + tau^2)))."""
    v, share = np.exp(u[0]), 1.0 / (1.0 + np.exp(-u[1]))
    return np.sqrt(v * share), np.sqrt(v * (1.0 - share))


def test_priors_in_the_model_are_the_pc_priors(model_and_fns):
    """The sampled practical range has the InverseGamma(1, lambda1) PC prior and the sds the
    Exponential(lambda2) PC prior, on the standardised scale (reference: scipy.stats.invgamma and
    expon; Fuglstad et al. 2019, JASA 114), and in data units they meet the stated tails. In the
    share coordinates (log total variance, logit spatial share) the density must be the PC priors
    times the Jacobian of the change of variables (standard calculus)."""
    import pymc as pm

    ds, model, spec, _, _ = model_and_fns
    lam1 = pc_range_rate(spec.priors.range[0] / spec.distance_scale, spec.priors.range[1])
    for v in (0.01, 0.2, 3.0):
        got = pm.logp(model["practical_range_z"], v).eval()
        assert got == pytest.approx(stats.invgamma(1.0, scale=lam1).logpdf(v), rel=1e-10)
    lam2 = pc_sd_rate(spec.priors.sd[0] / spec.value_sd, spec.priors.sd[1])
    lam3 = pc_sd_rate(spec.priors.nugget[0] / spec.value_sd, spec.priors.nugget[1])
    assert pm.logp(model["sd_z"], 0.7).eval() == pytest.approx(stats.expon(scale=1 / lam2).logpdf(0.7), rel=1e-10)
    assert pm.logp(model["nugget_sd_z"], 0.3).eval() == pytest.approx(stats.expon(scale=1 / lam3).logpdf(0.3),
                                                                      rel=1e-10)
    share, _ = build_model(ds, covariance="matern32", trend=1, _coordinates="share")
    # in the share coordinates the sds are sampled as u = (log v, logit s): their density is the two exponential priors at
    # (sigma, tau)(u) times |det d(sigma, tau) / du| (change of variables; determinant by central differences)
    for u in ([0.3, -1.2], [-1.5, 2.5], [1.1, 0.0]):
        u = np.array(u)
        sigma, tau = _sd_tau(u)
        jac = np.column_stack([(np.array(_sd_tau(u + h)) - np.array(_sd_tau(u - h))) / 2e-6
                               for h in (np.array([1e-6, 0.0]), np.array([0.0, 1e-6]))])
        expect = (stats.expon(scale=1 / lam2).logpdf(sigma) + stats.expon(scale=1 / lam3).logpdf(tau)
                  + np.log(abs(np.linalg.det(jac))))
        assert pm.logp(share["variance_coords_z"], u).eval() == pytest.approx(expect, rel=1e-7)
    # the same Jacobian in closed form (shared/FACTS.md): log v + 0.5 log(s (1 - s)) - log 4
    v, share = np.exp(u[0]), 1 / (1 + np.exp(-u[1]))
    assert np.log(abs(np.linalg.det(jac))) == pytest.approx(np.log(v) + 0.5 * np.log(share * (1 - share)) - np.log(4),
                                                          rel=1e-7)
    # tails in data units
    r0, a1 = spec.priors.range
    assert stats.invgamma(1.0, scale=lam1).cdf(r0 / spec.distance_scale) == pytest.approx(a1, rel=1e-10)
    s0, a2 = spec.priors.sd
    assert stats.expon(scale=1 / lam2).sf(s0 / spec.value_sd) == pytest.approx(a2, rel=1e-10)


def test_spec_records_standardisation_and_round_trips(model_and_fns):
    """FitSpec holds the standardisation constants (mean, sd ddof=1, largest distance by cdist) and
    survives to_json/from_dict unchanged (needed to rebuild a fit from its file)."""
    import json

    ds, _, spec, _, _ = model_and_fns
    z = ds["value"].values
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    assert spec.value_mean == pytest.approx(z.mean())
    assert spec.value_sd == pytest.approx(z.std(ddof=1))
    assert spec.distance_scale == pytest.approx(cdist(xy, xy).max())
    assert spec.terms == ("1", "x", "y") and spec.n == ds.sizes["obs"]
    assert FitSpec.from_dict(json.loads(spec.to_json())) == spec
    assert spec.priors.range[0] == pytest.approx(0.05 * spec.distance_scale)  # documented default


def test_no_nugget_model_has_no_nugget_variable():
    """nugget=False drops the nugget variable; the likelihood keeps only the jitter (docs/model.md)."""
    model, spec = build_model(_data(n=20), covariance="exponential", nugget=False)
    assert "nugget_sd_z" not in model.named_vars and not spec.nugget
    assert {v.name for v in model.free_RVs} == {"practical_range_z", "sd_z"}  # beta_z integrated out (dense)


def test_log_transform_models_the_logarithm():
    """transform='log' standardises log(values) (spec records it; units labelled log)."""
    ds = _data(positive=True)
    spec, y, _, _ = model_inputs(ds, transform="log")
    z = np.log(ds["value"].values)
    np.testing.assert_allclose(y, (z - z.mean()) / z.std(ddof=1))
    assert spec.model_units == "log(mg/kg)"


def test_log_transform_refuses_zero_and_negative_values():
    """Zero or negative values under the log transform: InputError naming the rows and the column."""
    ds = _data(positive=True)
    v = ds["value"].values.copy()
    v[[2, 5]] = [0.0, -1.0]
    ds["value"] = ("obs", v)
    with pytest.raises(InputError, match=r"sim.csv: --transform log .* column 'conc' .* rows 4, 7"):
        build_model(ds, transform="log")


def test_several_sites_are_refused_one_site_is_accepted():
    """The single-site model refuses data holding several sites and accepts a one-site label."""
    n = 30
    with pytest.raises(InputError, match="--site: the data hold 2 sites"):
        build_model(_data(n=n, site=np.array(["a"] * 15 + ["b"] * 15)))
    spec, *_ = model_inputs(_data(n=n, site=np.array(["a"] * n)))
    assert spec.n == n


@pytest.mark.parametrize("kw, match", [
    ({"covariance": "cubic"}, "unknown covariance"),
    ({"covariance": "matern"}, "needs its smoothness"),
    ({"trend": 5}, "trend: order 5"),
    ({"transform": "sqrt"}, "^transform"),
    ({"priors": {"range": (10.0, 2.0)}}, r"priors\[.range.\]"),
])
def test_bad_settings_are_refused(kw, match):
    """Bad settings raise InputError naming the option (common practice)."""
    with pytest.raises(InputError, match=match):
        model_inputs(_data(n=20), **kw)


def test_nearest_neighbour_model_with_all_previous_points_equals_dense():
    """Vecchia (1988): conditioning each point on ALL previous points is the exact chain rule of
    the joint density, so with m = n - 1 the nn model's log density equals the dense model's."""
    rng = np.random.default_rng(11)
    xy = rng.random((30, 2)) * 100.0
    z = simulate_field(xy, covariance="exponential", practical_range=40.0, partial_sill=1.0, nugget=0.1,
                       mean=2.0, rng=rng)
    ds = points_dataset(xy[:, 0], xy[:, 1], z, attrs={"source": "sim", "distance_units": "m"})
    dense, dspec = build_model(ds, covariance="exponential", approx="dense", _trend="sampled")
    nn, nspec = build_model(ds, covariance="exponential", approx="nn", neighbours=29)
    assert (dspec.approx, nspec.approx, nspec.neighbours) == ("dense", "nn", 29)
    point = dense.initial_point()
    np.testing.assert_allclose(nn.compile_logp()(point), dense.compile_logp()(point), rtol=1e-9)
    assert build_model(ds, covariance="exponential")[1].approx == "dense"  # auto: small n is dense
    with pytest.raises(InputError, match="^approx"):
        build_model(ds, covariance="exponential", approx="fast")


def _legacy_point(u_point):
    """The legacy model's point (log sd_z, log nugget_sd_z) for a point of the new coordinates."""
    sigma, tau = _sd_tau(u_point["variance_coords_z"])
    out = {k: v for k, v in u_point.items() if k != "variance_coords_z"}
    return {**out, "sd_z_log__": np.log(sigma), "nugget_sd_z_log__": np.log(tau)}


def _log_jacobian_numeric(u):
    """log |det d(log sigma, log tau) / d(log v, logit s)| by central differences."""
    def f(x):
        return np.log(np.array(_sd_tau(x)))

    h = 1e-6
    jac = np.column_stack([(f(u + e) - f(u - e)) / (2 * h) for e in (np.array([h, 0.0]), np.array([0.0, h]))])
    return np.log(abs(np.linalg.det(jac)))


@pytest.mark.parametrize("covariance, nu, approx", [
    ("exponential", None, "dense"), ("matern32", None, "dense"), ("matern52", None, "dense"),
    ("gaussian", None, "dense"), ("spherical", None, "dense"), ("matern", 1.0, "dense"),
    ("exponential", None, "nn"), ("matern32", None, "nn"), ("matern52", None, "nn"),
    ("gaussian", None, "nn"), ("spherical", None, "nn"),
])
def test_new_coordinates_density_is_the_old_one_plus_the_log_jacobian(covariance, nu, approx):
    """The model sampled in (log v, logit s, log r) (the default ``_coordinates="share"``) is the
    documented model: at random points its log density equals the log density of the earlier model,
    sampled in (log sd, log tau, log r) (same PC priors, same likelihood), plus
    log |det d(log sd, log tau) / d(log v, logit s)|, computed here by central differences
    (change of variables, standard calculus); analytically that determinant is -1/4 everywhere."""
    ds = _data(n=30, seed=9)
    kw = dict(covariance=covariance, nu=nu, trend=1, approx=approx, neighbours=8)
    new, _ = build_model(ds, **kw, _coordinates="share", _trend="sampled")
    old, _ = build_model(ds, **kw, _coordinates="legacy", _trend="sampled")
    assert "variance_coords_z" in new.named_vars and "sd_z_log__" in old.initial_point()
    f_new, f_old = new.compile_logp(mode="FAST_COMPILE"), old.compile_logp(mode="FAST_COMPILE")
    rng = np.random.default_rng(5)
    for _ in range(5):
        point = {"practical_range_z_log__": rng.normal(-1.0, 1.0), "beta_z": rng.normal(0, 0.5, 3),
                 "variance_coords_z": rng.normal([0.0, 0.0], [1.0, 2.5])}
        jac = _log_jacobian_numeric(point["variance_coords_z"])
        assert jac == pytest.approx(-np.log(4.0), abs=1e-7)
        assert f_new(point) == pytest.approx(f_old(_legacy_point(point)) + jac, rel=1e-9, abs=1e-7)


def test_no_nugget_model_keeps_log_sd_and_log_range():
    """Without a nugget the coordinates are log sd_z and log practical_range_z, the old ones: the two
    builds have the same log density at random points (nothing to change of variables)."""
    ds = _data(n=25, seed=2)
    new, _ = build_model(ds, covariance="matern32", nugget=False, _trend="sampled")
    old, _ = build_model(ds, covariance="matern32", nugget=False, _coordinates="legacy", _trend="sampled")
    f_new, f_old = new.compile_logp(mode="FAST_COMPILE"), old.compile_logp(mode="FAST_COMPILE")
    rng = np.random.default_rng(1)
    for _ in range(3):
        point = {"practical_range_z_log__": rng.normal(-1, 1), "sd_z_log__": rng.normal(0, 1),
                 "beta_z": rng.normal(0, 1, 1)}
        assert f_new(point) == pytest.approx(f_old(point), rel=1e-12)


@pytest.mark.slow
def test_posterior_equals_pymc_gp_marginal_with_the_same_priors():
    """The posterior of the package's model, as ``bayesgeo.fitting.posterior.fit`` computes it (sampled in the
    variance-split coordinates with the trend integrated out, the coefficients drawn afterwards from
    their exact conditional), equals, within Monte
    Carlo error, the posterior of an independent implementation of the model of docs/model.md:
    PyMC's own ``pm.gp.Marginal`` with a ``Matern12`` kernel (exp(-d / l), PyMC source; our
    exponential family exp(-d / phi)), a constant mean, noise sd tau and the same PC priors written
    with PyMC's InverseGamma and Exponential (reference library). Means and the 10/50/90% quantiles
    of the log range, both sds, the intercept, the log microergodic parameter sd^2 / range (Zhang
    2004: the well-determined combination, so the sharpest test of the kernel's scaling) and the log
    total variance are compared in units of their combined Monte Carlo standard error (ArviZ mcse);
    |z| < 4.5 for each of the 24 comparisons. Power, measured once on these data and seeds: with the
    reference kernel's length scale wrongly multiplied by 1.3 the largest |z| was 5.1 (log range,
    10% quantile), with the right one 2.6."""
    import arviz as az
    import pymc as pm
    import xarray as xr

    from bayesgeo.fitting.posterior import fit
    from bayesgeo.fitting.sampling import sample

    rng = np.random.default_rng(21)
    xy = rng.random((100, 2)) * 100.0
    z = simulate_field(xy, covariance="exponential", practical_range=45.0, partial_sill=1.0, nugget=0.4,
                       mean=3.0, rng=rng)
    ds = points_dataset(xy[:, 0], xy[:, 1], z, attrs={"source": "sim", "distance_units": "m"})
    spec, y, _, _ = model_inputs(ds, covariance="exponential")
    rates = spec.rates
    x_std = (xy - xy.mean(axis=0)) / spec.distance_scale
    with pm.Model() as ref:
        prange = pm.InverseGamma("practical_range_z", alpha=1.0, beta=rates["range"])
        sd = pm.Exponential("sd_z", lam=rates["sd"])
        tau = pm.Exponential("nugget_sd_z", lam=rates["nugget"])
        beta = pm.Normal("beta_z", mu=0.0, sigma=spec.priors.beta_sd)
        gp = pm.gp.Marginal(mean_func=pm.gp.mean.Constant(beta),
                            cov_func=sd**2 * pm.gp.cov.Matern12(2, ls=prange / spec.range_factor))
        gp.marginal_likelihood("y", X=x_std, y=y, sigma=tau)
    kw = dict(chains=4, draws=1000, tune=1000, seed=11)
    a = fit(ds, covariance="exponential", max_draws=1000, **kw)["posterior"].to_dataset()
    b = sample(ref, **kw)["posterior"].to_dataset()

    def pick(post):
        return xr.Dataset({"log_range": np.log(post["practical_range_z"]), "sd_z": post["sd_z"],
                           "nugget_sd_z": post["nugget_sd_z"], "beta_z": post["beta_z"].squeeze(drop=True),
                           "log_microergodic": np.log(post["sd_z"] ** 2 / post["practical_range_z"]),
                           "log_total_variance": np.log(post["sd_z"] ** 2 + post["nugget_sd_z"] ** 2)})

    a, b = pick(a), pick(b)
    checks = [("mean", None), ("quantile", 0.1), ("quantile", 0.5), ("quantile", 0.9)]
    for method, prob in checks:
        ma, mb = az.mcse(a, method=method, prob=prob), az.mcse(b, method=method, prob=prob)
        for name in a.data_vars:
            if method == "mean":
                va, vb = float(a[name].mean()), float(b[name].mean())
            else:
                va, vb = float(a[name].quantile(prob)), float(b[name].quantile(prob))
            zscore = (va - vb) / np.hypot(float(ma[name]), float(mb[name]))
            assert abs(zscore) < 4.5, (name, method, prob, va, vb, zscore)


@pytest.mark.parametrize("covariance, nu, nugget", [
    ("exponential", None, True), ("matern32", None, True), ("matern52", None, True), ("gaussian", None, True),
    ("spherical", None, True), ("matern", 1.0, True), ("matern32", None, False),
])
def test_trend_integrated_out_is_the_sampled_model_by_bayes_rule(covariance, nu, nugget):
    """The default dense model integrates the trend coefficients out. Its log density at theta must
    equal, at any beta, the log density of the model that samples them minus the log density of their
    exact conditional posterior N(m, V) at that beta: Bayes' rule, p(y | theta) = p(y | theta, beta)
    p(beta) / p(beta | y, theta), with V = (F' K^-1 F + I / b^2)^-1, m = V F' K^-1 y (Rasmussen and
    Williams 2006, sec. 2.7; Gelman et al., BDA3, sec. 14.2; published formulas). m and V come from
    numpy.linalg.inv here, the conditional density from scipy.stats.multivariate_normal; K is the
    package's covariance matrix, itself checked against scipy in
    test_loglik_equals_scipy_multivariate_normal_in_data_units."""
    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.gp.dense import covariance_matrix

    ds = _data(n=30, seed=9)
    kw = dict(covariance=covariance, nu=nu, nugget=nugget, trend=1)
    integ, spec = build_model(ds, **kw)
    samp, _ = build_model(ds, **kw, _trend="sampled")
    assert "beta_z" not in integ.named_vars and "beta_z" in samp.named_vars
    _, y, design, dist = model_inputs(ds, **kw)
    f, b = design.values, spec.priors.beta_sd
    cov = get_covariance(covariance, nu)
    f_int, f_samp = integ.compile_logp(mode="FAST_COMPILE"), samp.compile_logp(mode="FAST_COMPILE")
    rng = np.random.default_rng(3)
    for _ in range(4):
        prange, sd, nsd = np.exp(rng.normal([-1.0, 0.0, -1.0], 0.7))
        beta = rng.normal(0.0, 0.5, 3)
        k = covariance_matrix(dist, cov, prange / spec.range_factor, sd**2, nsd**2 if nugget else 0.0)
        ki = np.linalg.inv(k)
        v = np.linalg.inv(f.T @ ki @ f + np.eye(3) / b**2)
        m = v @ f.T @ ki @ y
        point = _point(samp, prange, sd, nsd, beta)
        reduced = {key: val for key, val in point.items() if key != "beta_z"}
        expect = f_samp(point) - stats.multivariate_normal(mean=m, cov=v).logpdf(beta)
        assert f_int(reduced) == pytest.approx(expect, rel=1e-8, abs=1e-7)


def test_free_variables_of_the_default_builds():
    """Dense: the log range and (with a nugget) the two variance coordinates are sampled, the trend is
    not; nn: the trend coefficients are sampled. Asking to integrate the trend out of the nn
    likelihood is refused."""
    ds = _data(n=30, seed=9)
    dense, _ = build_model(ds, covariance="matern32", trend=1)
    nn, _ = build_model(ds, covariance="matern32", trend=1, approx="nn", neighbours=8)
    assert [v.name for v in dense.free_RVs] == ["practical_range_z", "variance_coords_z"]
    assert {"sd_z", "nugget_sd_z"} <= {v.name for v in dense.deterministics}
    assert [v.name for v in nn.free_RVs] == ["practical_range_z", "variance_coords_z", "beta_z"]
    with pytest.raises(ValueError, match="dense likelihood only"):
        build_model(ds, covariance="matern32", approx="nn", neighbours=8, _trend="integrated")
