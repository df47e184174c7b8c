"""Tests of bayesgeo.checks.modelcheck: posterior predictive semivariogram check, LOO comparison, LOO-PIT.

Fast tests use fits built from chosen draws (tests/test_loo.py: make_fit, layout of
bayesgeo.fitting.posterior.fit); the slow ones sample real posteriors with bayesgeo.fitting.posterior.fit.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import optimize, stats
from scipy.spatial.distance import pdist

from bayesgeo.data.points import points_dataset
from bayesgeo.explore.variogram import lag_bins, semivariogram
from bayesgeo.checks.loo import add_log_likelihood, loo_predictive
from bayesgeo.fitting.arrays import fit_arrays
from bayesgeo.checks.modelcheck import compare_fits, fit_loo, loo_pit
from bayesgeo.checks.ppcheck import variogram_check
from bayesgeo.common.validate import InputError
from test_loo import make_fit, simulated


def _range_factor(rho):
    """u at which the correlation falls to 0.05 (practical range / phi), by scipy brentq."""
    return optimize.brentq(lambda u: rho(u) - 0.05, 0.1, 50.0, xtol=1e-14)


def _matern32_gamma(h, practical_range, partial_sill, nugget):
    """Matérn 3/2 semivariogram written out: rho(u) = (1 + u) exp(-u), u = h / phi, with the
    practical range where rho = 0.05, about 4.744 phi (FACTS.md; Diggle and Ribeiro 2007, sec. 3.4)."""
    phi = practical_range / _range_factor(lambda u: (1.0 + u) * math.exp(-u))
    u = h / phi
    return partial_sill * (1.0 - (1.0 + u) * np.exp(-u)) + np.where(h > 0, nugget, 0.0)


def test_observed_semivariogram_is_matheron_on_ols_residuals():
    """The observed semivariogram equals Matheron's estimator sum (r_i - r_j)^2 / (2 N(h)) of the OLS
    residuals (numpy lstsq) over pairs binned by distance (scipy pdist), and bayesgeo.explore.variogram's
    semivariogram of the same residuals with the same bins."""
    ds = simulated(45, seed=11)
    tree = make_fit(ds, trend=1, ndraw=3)
    vc = variogram_check(tree, replicates=4, bins=8, seed=0)
    fa = fit_arrays(tree)
    coef, *_ = np.linalg.lstsq(fa.design, fa.z, rcond=None)
    r = fa.z - fa.design @ coef
    d = pdist(fa.xy)
    sq = pdist(r[:, None], "sqeuclidean")
    edges = lag_bins(ds, bins=8)
    np.testing.assert_allclose(vc["bin_upper"].values, edges[1:])
    k = np.minimum((d / edges[1]).astype(int), 7)
    inside = d <= edges[-1]
    for b in range(8):
        sel = inside & (k == b)
        assert vc["pairs"].values[b] == sel.sum()
        assert vc["observed"].values[b] == pytest.approx(sq[sel].sum() / (2 * sel.sum()), rel=1e-12)
    resid = points_dataset(ds["x"].values, ds["y"].values, r)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # few pairs in the first bin: expected here
        ref = semivariogram(resid, bins=8)
    np.testing.assert_allclose(vc["observed"].values, ref["semivariance"].values, rtol=1e-10)
    np.testing.assert_allclose(vc["lag"].values, ref["lag"].values, rtol=1e-12)
    np.testing.assert_array_equal(vc["pairs"].values, ref["pairs"].values)


def assert_replicate_means_match(vc, fa, ds, cov, mean, *, bins: int) -> None:
    """Mean replicate semivariance of each of ``bins`` equal lag bins against its expectation
    E[r^T A r] = tr(A Sigma) + mu^T A mu for r = M z, z ~ N(mu, cov), M = I - H the OLS residual
    maker (Searle 1971, Linear Models, sec. 2.5), within 4 Monte Carlo standard errors."""
    q, _ = np.linalg.qr(fa.design)
    proj = np.eye(fa.n) - q @ q.T
    i, j = np.triu_indices(fa.n, 1)
    d = np.hypot(*(fa.xy[i] - fa.xy[j]).T)
    edges = lag_bins(ds, bins=bins)
    b = np.minimum((d / edges[1]).astype(int), bins - 1)
    rep = vc["replicate_semivariance"].values
    for bb in range(bins):
        sel = (d <= edges[-1]) & (b == bb)
        e = np.zeros((fa.n, sel.sum()))
        e[i[sel], np.arange(sel.sum())] = 1.0
        e[j[sel], np.arange(sel.sum())] -= 1.0
        a = proj @ e  # columns M (e_i - e_j)
        expect = (np.einsum("ik,ij,jk->", a, cov, a) + np.sum((a.T @ mean) ** 2)) / (2 * sel.sum())
        se = rep[:, bb].std(ddof=1) / math.sqrt(rep.shape[0])
        assert abs(rep[:, bb].mean() - expect) < 4 * se


def test_replicates_reproduce_quadratic_form_expectation():
    """With one parameter value, the mean replicate semivariance of a bin equals its expectation,
    E[r^T A r] = tr(A Sigma) + mu^T A mu for r = M z, z ~ N(mu, K), M = I - H (expectation of a
    quadratic form; Searle 1971, Linear Models, sec. 2.5), within 4 Monte Carlo standard errors."""
    ds = simulated(30, seed=12)
    tree = make_fit(ds, ndraw=10, spread=0.0)
    vc = variogram_check(tree, replicates=1500, bins=5, seed=3)
    fa = fit_arrays(tree)
    from bayesgeo.gp.dense_loo import draw_covariances

    _, mu, k = next(draw_covariances(fa, [0]))
    s, m0 = fa.spec.value_sd, fa.spec.value_mean
    cov = s * s * k
    mean = m0 + s * mu
    assert_replicate_means_match(vc, fa, ds, cov, mean, bins=5)


def test_model_band_at_one_parameter_value_is_the_formula():
    """All draws equal: the model band collapses onto the Matérn 3/2 semivariogram
    sigma^2 (1 - (1 + u) e^-u) + tau^2 in data units at every lag."""
    ds = simulated(30, seed=13)
    truth = {"practical_range": 35.0, "partial_sill": 0.8, "nugget": 0.15, "mean": 2.0}
    tree = make_fit(ds, ndraw=5, spread=0.0, truth=truth)
    vc = variogram_check(tree, replicates=5, bins=6, seed=1)
    ref = _matern32_gamma(vc["lag"].values, 35.0, 0.8, 0.15)
    for name in ("model_q05", "model_q50", "model_q95"):
        np.testing.assert_allclose(vc[name].values, ref, rtol=1e-9)
    np.testing.assert_allclose(vc["curve_q50"].values, _matern32_gamma(vc["distance"].values, 35.0, 0.8, 0.15),
                               rtol=1e-9, atol=1e-12)


def test_seed_reproduces_and_p_values_follow_their_definition():
    """The same seed gives identical replicates, another seed different ones; p_value is the share of
    replicates at or above the observed semivariance (Gelman, Meng and Stern 1996) and outside_band
    counts bins outside the replicate 5-95% quantiles (numpy.quantile)."""
    ds = simulated(35, seed=14)
    tree = make_fit(ds, ndraw=40)
    a = variogram_check(tree, replicates=30, bins=6, seed=7)
    b = variogram_check(tree, replicates=30, bins=6, seed=7)
    c = variogram_check(tree, replicates=30, bins=6, seed=8)
    np.testing.assert_array_equal(a["replicate_semivariance"].values, b["replicate_semivariance"].values)
    assert not np.array_equal(a["replicate_semivariance"].values, c["replicate_semivariance"].values)
    rep, obs = a["replicate_semivariance"].values, a["observed"].values
    np.testing.assert_allclose(a["p_value"].values, (rep >= obs).mean(axis=0))
    lo, hi = np.quantile(rep, [0.05, 0.95], axis=0)
    assert a.attrs["outside_band"] == int(((obs < lo) | (obs > hi)).sum())
    assert a.attrs["seed"] == 7 and a.attrs["replicates"] == 30
    assert any("licensed professional" in s for s in a.attrs["cautions"])


def test_log_transform_checks_on_the_log_scale():
    """Under transform="log" the observed semivariogram is that of log(values) (after removing the
    mean), Matheron's estimator on scipy pdist pairs."""
    ds = simulated(30, seed=15, log=True)
    tree = make_fit(ds, transform="log", ndraw=3)
    vc = variogram_check(tree, replicates=3, bins=4, seed=0)
    logv = np.log(ds["value"].values)
    d, sq = pdist(np.column_stack([ds["x"], ds["y"]])), pdist(logv[:, None], "sqeuclidean")
    edges = lag_bins(ds, bins=4)
    sel = d < edges[1]
    assert vc["observed"].values[0] == pytest.approx(sq[sel].sum() / (2 * sel.sum()), rel=1e-12)
    assert vc.attrs["model_units"] == "log(mg/kg)"


def test_bad_options_are_input_errors():
    """Replicates, seed and prob are checked where they enter (InputError naming the option)."""
    tree = make_fit(simulated(15, seed=16), ndraw=2)
    with pytest.raises(InputError, match="^replicates"):
        variogram_check(tree, replicates=0)
    with pytest.raises(InputError, match="--seed"):
        variogram_check(tree, seed=-1)
    with pytest.raises(InputError, match="prob"):
        variogram_check(tree, prob=1.5)
    with pytest.raises(InputError, match="^bins"):
        variogram_check(tree, bins=0)


def test_loo_pit_single_parameter_value_is_normal_cdf():
    """With (nearly) one parameter value the LOO-PIT is Phi((z_i - mu_-i) / sd_-i) of the exact LOO
    normal (scipy.stats.norm.cdf)."""
    ds = simulated(30, seed=17)
    tree = make_fit(ds, ndraw=50, spread=1e-7)
    pit = loo_pit(tree)
    pred = loo_predictive(tree).isel(chain=0, draw=0)
    ref = stats.norm.cdf(ds["value"].values, pred["loo_mean"].values, pred["loo_sd"].values)
    np.testing.assert_allclose(pit.values, ref, atol=1e-5)


def test_loo_pit_uniform_under_the_true_model():
    """Under the model that made the data each exact LOO-PIT value is uniform on (0, 1) (probability
    integral transform; Gneiting, Balabdaoui and Raftery 2007): a Kolmogorov-Smirnov test
    (scipy.stats.kstest) does not reject at the 1% level for n = 150 (fixed seed)."""
    truth = {"practical_range": 40.0, "partial_sill": 1.0, "nugget": 0.2, "mean": 2.0}
    ds = simulated(150, seed=18, **{k: v for k, v in truth.items()})
    tree = make_fit(ds, ndraw=30, spread=1e-7, truth=truth)
    pit = loo_pit(tree).values
    assert stats.kstest(pit, "uniform").pvalue > 0.01


def test_compare_refuses_different_data_and_orders_by_elpd():
    """Fits of different data (other values or other locations) are refused with InputError; the
    ranking of fits of the same data is by elpd_loo from arviz.loo on the exact LOO group, the best
    has elpd_diff 0, and pareto_k_high counts k > 0.7 (Vehtari et al. 2024)."""
    import arviz as az

    ds = simulated(40, seed=19)
    a = make_fit(ds, ndraw=100, seed=1)
    b = make_fit(ds, covariance="exponential", ndraw=100, seed=2)
    other = ds.copy()
    other["value"] = ds["value"] + 0.01
    with pytest.raises(InputError, match="not fitted to the same data"):
        compare_fits({"a": a, "c": make_fit(other, ndraw=100)})
    moved = ds.copy()
    moved = moved.assign_coords(x=moved["x"] + 1.0)
    with pytest.raises(InputError, match="locations differ"):
        compare_fits({"a": a, "m": make_fit(moved, ndraw=100)})
    with pytest.raises(InputError, match="at least two"):
        compare_fits({"a": a})
    res = compare_fits({"m32": a, "exp": b})
    elpd = {k: az.loo(add_log_likelihood(t)).elpd for k, t in (("m32", a), ("exp", b))}
    best = max(elpd, key=elpd.get)
    assert str(res["fit"].values[0]) == best
    assert res["elpd_diff"].values[0] == 0.0
    for k in ("m32", "exp"):
        assert float(res["elpd_loo"].sel(fit=k)) == pytest.approx(elpd[k], abs=1e-9)
    assert int(res["pareto_k_high"].sel(fit="m32")) == int((res["pareto_k"].sel(fit="m32") > 0.7).sum())
    assert list(res["covariance"].values) == [{"m32": "matern32", "exp": "exponential"}[str(f)] for f in res["fit"].values]
    assert any("licensed professional" in c for c in res.attrs["cautions"])
    np.testing.assert_allclose(res["loo_pit"].sel(fit="exp").values, loo_pit(b).values, rtol=1e-12)


def test_compare_ranks_true_smoothness_first_plug_in():
    """On a smooth field (Matérn 5/2, tiny nugget) the Matérn 5/2 fit beats the exponential one by a
    clear elpd margin (> 2 dse): plug-in posteriors at each family's maximum-likelihood estimate
    (bayesgeo.explore.quickfit.fit_ml), so no sampling; the smoother family predicts held-out points of a
    smooth field better (Stein 1999, Interpolation of Spatial Data, ch. 3: misspecified smoothness
    hurts prediction)."""
    from bayesgeo.explore.quickfit import fit_ml

    ds = simulated(90, seed=20, covariance="matern52", practical_range=60.0, partial_sill=1.0, nugget=0.002)
    fits = {}
    for fam in ("exponential", "matern52"):
        ml = fit_ml(ds, fam)
        truth = {"practical_range": ml["practical_range"], "partial_sill": ml["partial_sill"],
                 "nugget": max(ml["nugget"], 1e-6), "mean": ml["beta"]["1"]}
        fits[fam] = make_fit(ds, covariance=fam, ndraw=40, spread=1e-4, truth=truth)
    res = compare_fits(fits)
    assert str(res["fit"].values[0]) == "matern52"
    assert -res["elpd_diff"].values[1] > 2 * res["dse"].values[1]


@pytest.fixture(scope="module")
def sampled():
    """Real posteriors (bayesgeo.fitting.posterior.fit, nutpie, 2 chains x 300 draws) of a smooth simulated
    field for two families."""
    from bayesgeo.fitting.posterior import fit

    truth = {"practical_range": 60.0, "partial_sill": 1.0, "nugget": 0.01, "mean": 2.0}
    ds = simulated(80, seed=21, covariance="matern52", **truth)
    trees = {fam: fit(ds, covariance=fam, chains=2, draws=300, tune=300, seed=5)
             for fam in ("matern52", "exponential")}
    return ds, truth, trees


@pytest.mark.slow
def test_sampled_model_band_contains_the_maximum_likelihood_semivariogram(sampled):
    """For a real fit, the 90% model band covers the Matérn 5/2 semivariogram
    sigma^2 (1 - (1 + u + u^2/3) e^-u) + tau^2 (Diggle and Ribeiro 2007, sec. 3.4; practical range
    5.919 phi, FACTS.md) at the maximum-likelihood parameters of scikit-learn's
    GaussianProcessRegressor (ConstantKernel x Matern(nu=2.5) + WhiteKernel on the centred values;
    bayesgeo's phi = length_scale / sqrt(5)) at nearly every lag (>= 80% of the bins: the band is
    pointwise). With weak priors the posterior concentrates around the likelihood's maximum. The
    band is not compared with the simulation's truth: one data set need not be covered at every lag
    (this one realised a partial sill of about 0.52 for a true 1.0; the posterior's 90% interval
    is 0.33-1.04, measured on 3 December 2026)."""
    from sklearn.gaussian_process import GaussianProcessRegressor
    from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel

    ds, truth, trees = sampled
    vc = variogram_check(trees["matern52"], replicates=100, bins=10, seed=2)
    factor = _range_factor(lambda u: (1.0 + u + u * u / 3.0) * math.exp(-u))
    assert factor == pytest.approx(5.919, abs=1e-3)
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    z = ds["value"].values
    kernel = (ConstantKernel(1.0, (1e-3, 1e2)) * Matern(length_scale=20.0, length_scale_bounds=(1e-1, 1e3), nu=2.5)
              + WhiteKernel(0.01, (1e-6, 1e1)))
    gp = GaussianProcessRegressor(kernel, n_restarts_optimizer=3, random_state=0).fit(xy, z - z.mean())
    sill, phi, nugget = (gp.kernel_.k1.k1.constant_value, gp.kernel_.k1.k2.length_scale / math.sqrt(5.0),
                         gp.kernel_.k2.noise_level)
    u = vc["lag"].values / phi
    ml = sill * (1.0 - (1.0 + u + u * u / 3.0) * np.exp(-u)) + nugget
    inside = (vc["model_q05"].values <= ml) & (ml <= vc["model_q95"].values)
    assert inside.mean() >= 0.8


@pytest.mark.slow
def test_sampled_compare_ranks_true_family_first(sampled):
    """With real posteriors, PSIS-LOO ranks the true (Matérn 5/2) family above the exponential one on a
    smooth field, and fit_loo runs on bayesgeo.fitting.posterior.fit output."""
    _, _, trees = sampled
    res = compare_fits(trees)
    assert str(res["fit"].values[0]) == "matern52"
    assert fit_loo(trees["matern52"]).elpd == pytest.approx(float(res["elpd_loo"].sel(fit="matern52")))


def test_dkw_band_halfwidth():
    """The simultaneous ECDF band uses the Dvoretzky-Kiefer-Wolfowitz inequality with Massart's (1990)
    constant: eps = sqrt(log(2 / alpha) / (2 n)); at n = 100, alpha = 0.05 that is 0.1358 (computed by
    hand), and the ECDF of n = 400 uniform values (numpy) stays inside it in at least 93 of 100 seeded
    repetitions (the band covers at least 95%; 93 leaves room for Monte Carlo scatter)."""
    from bayesgeo.checks.figures import dkw_halfwidth

    assert dkw_halfwidth(100) == pytest.approx(0.13581, abs=1e-5)
    rng = np.random.default_rng(0)
    eps = dkw_halfwidth(400)
    inside = 0
    for _ in range(100):
        v = np.sort(rng.random(400))
        i = np.arange(1, 401)
        dev = max(np.max(i / 400 - v), np.max(v - (i - 1) / 400))
        inside += dev <= eps
    assert inside >= 93


def test_variogram_check_cli_site_option(tmp_path, capsys):
    """`variogram-check --site NAME` names its outputs after the site (variogram_check_<NAME>.png/.csv, our
    documented layout, docs/cli.md); on a single-site fit --site is refused with one line (exit 2), and
    without --site the single-site outputs equal variogram_check on the same fit (the CLI is a thin shell)."""
    import pandas as pd

    from bayesgeo.cli import main
    from bayesgeo.common.layout import vgcheck_names as output_names
    assert output_names(None) == ("variogram_check.png", "variogram_check.csv")
    png, csv = output_names("rail siding/2")  # an unsafe label: safe part + hash (bayesgeo.common.sitenames)
    assert png.startswith("variogram_check_rail_siding_2+") and png.endswith(".png") and csv == png[:-4] + ".csv"
    assert output_names("rail_siding_2") == ("variogram_check_rail_siding_2.png", "variogram_check_rail_siding_2.csv")
    tree = make_fit(simulated(30, seed=13), ndraw=6)
    (tmp_path / "fit").mkdir()
    tree.to_netcdf(tmp_path / "fit" / "posterior.nc", engine="netcdf4")
    assert main(["variogram-check", str(tmp_path / "fit"), "--site", "a-yard", "--json"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--site: " in err[0] and "holds a single-site fit; drop the site" in err[0]
    assert main(["variogram-check", str(tmp_path / "fit"), "--replicates", "12", "--bins", "6", "--seed", "4",
                 "--json"]) == 0
    capsys.readouterr()
    got = pd.read_csv(tmp_path / "fit" / "variogram_check.csv")
    ref = variogram_check(tree, replicates=12, bins=6, seed=4)
    np.testing.assert_allclose(got["replicate_q95"].values, ref["replicate_q95"].values, rtol=1e-8)
    assert ref.attrs["site"] == ""
