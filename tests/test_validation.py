"""Tests of the simulation-based calibration engine (bayesgeo.calibration.validation).

No test here runs the sampler (that is in tests/test_cli_validate.py); model log densities are
compiled with PyTensor's FAST_COMPILE mode, which is quick.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.gp.dense import covariance_matrix
from bayesgeo.calibration.config import QUICK, SBCConfig, generated_layout, with_settings
from bayesgeo.calibration.simulation import sbc_model, simulate_data
from bayesgeo.calibration.ranks import binomial_bounds, rank_of, rank_uniformity, sbc_summary


def test_binomial_bounds_tail_probabilities():
    """Bounds are the 0.05% and 99.95% quantiles of Binomial(N, p): reference scipy.stats.binom
    (cdf/sf), checked from the definition of a quantile of a discrete distribution."""
    for n, p in ((25, 0.9), (25, 0.5), (100, 0.9), (40, 0.5)):
        lo, hi = binomial_bounds(n, p, level=0.001)
        assert stats.binom.cdf(lo - 1, n, p) < 0.0005 <= stats.binom.cdf(lo, n, p)
        assert stats.binom.sf(hi, n, p) < 0.0005 <= stats.binom.sf(hi - 1, n, p)
    # N = 25 at 90%: values from scipy's quantile function, quoted in docs/validation.md
    assert binomial_bounds(25, 0.9) == (17, 25)


def test_rank_uniformity_matches_pearson_formula():
    """Chi-square statistic sum (O - E)^2 / E with E = N / bins (Pearson 1900), compared with
    scipy.stats.chisquare; the p-value is the chi-square(bins - 1) upper tail."""
    ranks = np.array([0, 1, 5, 7, 9, 9, 3, 3, 4, 8, 2, 6, 0, 1, 9, 5, 5, 5, 5, 2])
    u = rank_uniformity(ranks, 9, bins=5)
    counts = np.bincount(ranks // 2, minlength=5)
    assert u["counts"] == counts.tolist()
    expected = np.sum((counts - 4.0) ** 2 / 4.0)
    assert u["statistic"] == pytest.approx(expected)
    assert u["pvalue"] == pytest.approx(stats.chi2.sf(expected, 4))
    # default bins: the largest divisor of L + 1 with about five expected counts per bin
    assert rank_uniformity(np.arange(100) % 50, 49)["bins"] == 10


def test_rank_of_thins_evenly():
    """Ranks count thinned draws below the truth (Talts et al. 2018, Algorithm 1): with draws
    0..999 in two chains and L = 9 the thinned draws are evenly spaced in each chain."""
    draws = np.arange(1000.0).reshape(2, 500)
    assert rank_of(-1.0, draws, 9) == 0
    assert rank_of(1e9, draws, 9) == 9
    # chain 0 keeps draws 0, 125, 250, 374, 499 and chain 1 four draws from 500..999: two lie below 250
    assert rank_of(250.0, draws, 9) == 2
    with pytest.raises(ValueError, match="at least"):
        rank_of(0.0, np.zeros((1, 5)), 9)


def test_ranks_detect_miscalibration_in_a_conjugate_model():
    """SBC theory (Talts et al. 2018, Theorem 1) on the normal-normal conjugate model
    theta ~ N(0, 1), y_i ~ N(theta, 1), i = 1..n, posterior N(sum y / (n + 1), 1 / (n + 1))
    (Gelman et al., Bayesian Data Analysis, 3rd ed., sec. 2.5): exact posterior draws give uniform
    ranks; draws with half the posterior sd give a U-shaped histogram that the test rejects."""
    rng = np.random.default_rng(4)
    n, reps, L = 5, 400, 19
    good, bad = [], []
    for _ in range(reps):
        theta = rng.normal()
        y = rng.normal(theta, 1.0, n)
        mean, sd = y.sum() / (n + 1), 1.0 / np.sqrt(n + 1)
        e = rng.standard_normal((1, 200))
        good.append(rank_of(theta, mean + sd * e, L))
        bad.append(rank_of(theta, mean + 0.5 * sd * e, L))
    assert rank_uniformity(good, L)["pvalue"] > 0.001
    u = rank_uniformity(bad, L)
    assert u["pvalue"] < 1e-6
    assert u["counts"][0] + u["counts"][-1] > 3 * (reps / u["bins"])  # the U shape


def test_simulated_data_have_the_model_covariance():
    """y = F beta + chol(K) e has mean F beta and covariance K (the Cholesky construction of a
    multivariate normal, common practice); checked by the sample moments of 4,000 draws against
    covariance_matrix, tolerance about 5 Monte Carlo standard errors."""
    ds = generated_layout(8, seed=2)
    _, blocks, spec = sbc_model(ds, SBCConfig(covariance="exponential"))
    truth = {"practical_range_z": 0.4, "sd_z": 1.3, "nugget_sd_z": 0.5, "beta_z": np.array([0.7])}
    rng = np.random.default_rng(0)
    sims = np.array([simulate_data(truth, blocks[0], spec, rng) for _ in range(4000)])
    k = covariance_matrix(blocks[0]["dist"], get_covariance("exponential"), 0.4 / spec.range_factor, 1.3**2, 0.25)
    assert np.allclose(sims.mean(axis=0), 0.7, atol=5 * np.sqrt(k.diagonal().max() / 4000))
    se = np.sqrt((k**2 + np.outer(k.diagonal(), k.diagonal())) / 4000)  # sd of a sample covariance
    assert np.all(np.abs(np.cov(sims.T) - k) < 5 * se)


def _logp(model):
    return model.compile_logp(mode="FAST_COMPILE")


def _assert_same_logp(model, ref, rng, points: int = 5):
    """The two models' log densities agree at ``points`` random points near ref's initial point."""
    f, g = _logp(model), _logp(ref)
    ip = ref.initial_point()
    for _ in range(points):
        point = {k: v + rng.normal(0, 0.5, np.shape(v)) for k, v in ip.items()}
        assert f(point) == pytest.approx(g(point), rel=1e-12, abs=1e-9)
    return f, ip


def test_sbc_model_is_the_package_model():
    """The SBC model has the same log density as build_model at random points (same priors, same
    likelihood; reference: the package's own model, compared at 5 points of the unconstrained
    space), and swapping the data changes it exactly as rebuilding with those data would:
    compared with scipy.stats.multivariate_normal on the standardised scale, with the trend
    integrated out, y ~ N(0, K + b^2 F F^T) (Rasmussen and Williams 2006, sec. 2.7)."""
    from bayesgeo.fitting.model import build_model

    ds = generated_layout(12, seed=3)
    cfg = SBCConfig(covariance="matern32")
    model, blocks, spec = sbc_model(ds, cfg)
    ref, _ = build_model(ds, covariance="matern32")
    rng = np.random.default_rng(1)
    f, ip = _assert_same_logp(model, ref, rng)
    # swap in new data: the change in log density equals the change in the Gaussian log-likelihood
    y_new = rng.normal(size=12)
    shared = {v.name: v for v in model.data_vars} if hasattr(model, "data_vars") else {}
    var = shared.get("sbc_y_0")
    if var is None:
        from pytensor.compile.sharedvalue import SharedVariable
        from pytensor.graph.traversal import ancestors

        var = next(v for v in ancestors(model.potentials) if isinstance(v, SharedVariable) and v.name == "sbc_y_0")
    point = dict(ip)
    before = f(point)
    old = var.get_value()
    var.set_value(y_new)
    after = _logp(model)(point)
    var.set_value(old)
    prange = np.exp(point["practical_range_z_log__"])
    log_v, logit_s = point["variance_coords_z"]
    share = 1.0 / (1.0 + np.exp(-logit_s))
    k = covariance_matrix(blocks[0]["dist"], get_covariance("matern32"), prange / spec.range_factor,
                          np.exp(log_v) * share, np.exp(log_v) * (1.0 - share))
    f = blocks[0]["design"]
    k = k + spec.priors.beta_sd**2 * f @ f.T
    expect = stats.multivariate_normal(None, k).logpdf(y_new) - stats.multivariate_normal(None, k).logpdf(blocks[0]["y"])
    assert after - before == pytest.approx(expect, rel=1e-8, abs=1e-8)


def test_sbc_model_in_the_earlier_coordinates_is_the_package_model_in_them():
    """SBCConfig(coordinates="legacy", trend="sampled") fits build_model(..., _coordinates="legacy",
    _trend="sampled"): the same log density at 5 random unconstrained points (reference: the
    package's model in those coordinates, whose density tests/test_model.py relates to the default's)."""
    from bayesgeo.fitting.model import build_model

    ds = generated_layout(12, seed=3)
    model, _, _ = sbc_model(ds, SBCConfig(covariance="exponential", coordinates="legacy", trend="sampled"))
    ref, _ = build_model(ds, covariance="exponential", _coordinates="legacy", _trend="sampled")
    assert {"sd_z", "nugget_sd_z", "beta_z"} <= {v.name for v in model.free_RVs}
    _assert_same_logp(model, ref, np.random.default_rng(2))


def test_model_is_mirror_symmetric_in_the_intercept():
    """The SBC model's log density is unchanged when the data and the intercept change sign,
    (y, beta) -> (-y, -beta): the Gaussian likelihood depends on y - F beta only through a
    quadratic form and the Normal(0, s) prior of beta is symmetric (elementary properties of the
    normal density; checked against scipy.stats.norm for the prior part). With the simulation
    also symmetric (e ~ N(0, I)), SBC ranks of the intercept have a distribution symmetric about
    L / 2 (Talts et al. 2018, Theorem 1 applied to the mirrored pairs), so a lean of the
    intercept's ranks to one side can only be chance (docs/validation.md, "Intercept ranks"). Checked
    with the coefficients sampled (as the nn likelihood does); integrated out, the likelihood depends
    on y through a quadratic form alone and the conditional draws are mirrored with it."""
    from pytensor.compile.sharedvalue import SharedVariable
    from pytensor.graph.traversal import ancestors

    ds = generated_layout(12, seed=8)
    model, blocks, spec = sbc_model(ds, SBCConfig(covariance="matern32", trend="sampled"))
    var = next(v for v in ancestors(model.potentials) if isinstance(v, SharedVariable) and v.name == "sbc_y_0")
    rng = np.random.default_rng(3)
    y = rng.normal(size=12)
    ip = model.initial_point()
    logp = _logp(model)
    for _ in range(4):
        point = {k: v + rng.normal(0, 0.7, np.shape(v)) for k, v in ip.items()}
        mirror = {**point, "beta_z": -point["beta_z"]}
        var.set_value(y)
        a = logp(point)
        var.set_value(-y)
        b = logp(mirror)
        assert a == pytest.approx(b, rel=1e-12, abs=1e-9)
        # the prior part alone is symmetric too (scipy.stats.norm, sd = the spec's beta_sd)
        assert stats.norm(0, spec.priors.beta_sd).logpdf(point["beta_z"]).sum() == pytest.approx(
            stats.norm(0, spec.priors.beta_sd).logpdf(mirror["beta_z"]).sum())
    var.set_value(np.asarray(blocks[0]["y"], dtype=float))


def test_nn_model_with_all_neighbours_equals_dense():
    """With m = n - 1 neighbours the Vecchia product is the exact chain rule (Vecchia 1988), so the
    nn SBC model has the dense model's log density."""
    ds = generated_layout(10, seed=5)
    dense, _, _ = sbc_model(ds, SBCConfig(covariance="exponential", trend="sampled"))
    nn, _, _ = sbc_model(ds, SBCConfig(kind="nn", covariance="exponential", neighbours=9))
    nn3, _, _ = sbc_model(ds, SBCConfig(kind="nn", covariance="exponential", neighbours=2))
    ip = dense.initial_point()
    assert _logp(nn)(ip) == pytest.approx(_logp(dense)(ip), rel=1e-10)
    assert _logp(nn3)(ip) != pytest.approx(_logp(dense)(ip), rel=1e-10)  # the approximation is in use


@pytest.mark.filterwarnings("ignore:The effect of Potentials")
def test_prior_draws_are_the_model_prior():
    """Prior draws of the SBC model follow the PC priors of bayesgeo.fitting.priors: the practical range
    InverseGamma(1, lambda1) and the field sd Exponential(lambda2) (Fuglstad et al. 2019), checked
    with scipy.stats.kstest against scipy's distributions with the spec's rates."""
    import pymc as pm

    ds = generated_layout(12, seed=3)
    model, _, spec = sbc_model(ds, SBCConfig(covariance="exponential", nugget=False))
    prior = pm.sample_prior_predictive(draws=1500, model=model, random_seed=2)["prior"]
    r = prior["practical_range_z"].values.ravel()
    s = prior["sd_z"].values.ravel()
    assert "nugget_sd_z" not in prior
    assert stats.kstest(r, stats.invgamma(1.0, scale=spec.rates["range"]).cdf).pvalue > 0.001
    assert stats.kstest(s, stats.expon(scale=1 / spec.rates["sd"]).cdf).pvalue > 0.001


def test_summary_flags_coverage_outside_binomial_bounds():
    """sbc_summary fails a quantity whose 90% intervals cover in too few replicates (outside the
    scipy.stats.binom bounds), and lists unconverged replicates (kept and flagged)."""
    import xarray as xr

    n = 30
    cov = np.ones((n, 1, 2), dtype=bool)
    cov[:20, 0, 1] = False  # 10/30 at 90%: far below the lower bound
    res = xr.Dataset(
        {"rank": (("replicate", "quantity"), (np.arange(n) % 20)[:, None]),
         "covered": (("replicate", "quantity", "level"), cov),
         "verdict": ("replicate", np.array(["pass"] * (n - 2) + ["fail"] * 2))},
        coords={"quantity": ["practical_range"], "level": [0.5, 0.9]},
        attrs={"ranks_of": 19, "model": "test"},
    )
    s = sbc_summary(res)
    assert s["failed_fits"] == [28, 29]
    assert s["quantities"]["practical_range"]["coverage"]["0.9"]["ok"] is False
    assert s["quantities"]["practical_range"]["coverage_converged"]["0.9"]["of"] == 28
    assert s["ok"] is False


@pytest.mark.filterwarnings("ignore:The effect of Potentials")
def test_intercept_ranks_uniform_under_the_exact_conditional_posterior():
    """The SBC chain without the sampler: truths from the SBC model's own prior draws, data from
    simulate_data, and the intercept drawn from its exact posterior given the true covariance
    parameters, the Bayesian linear model with known covariance K and prior beta ~ N(0, b^2 I):
    beta | y ~ N(V F^T K^-1 y, V), V = (F^T K^-1 F + I / b^2)^-1 (Gelman et al., Bayesian Data
    Analysis, 3rd ed., sec. 14.2; Rasmussen and Williams 2006, sec. 2.7). Ranks must then be
    uniform (Talts et al. 2018, Theorem 1): this checks that the prior of beta_z, the simulation
    and the standardisation agree, independently of MCMC. Negative control: the same draws with a
    wrong prior sd (1 instead of the model's 2.5) give ranks the chi-square test rejects. The
    package's model integrates beta out, so its prior draws come from prior_draws, tested here too."""
    from scipy.linalg import cho_factor, cho_solve

    from bayesgeo.calibration.simulation import _truth_items, prior_draws

    ds = generated_layout(12, seed=7)
    model, blocks, spec = sbc_model(ds, SBCConfig(covariance="matern32"))
    assert "beta_z" not in model.named_vars
    reps, L = 1500, 99
    prior = prior_draws(model, spec, reps, 4)
    rng = np.random.default_rng(5)
    cov = get_covariance("matern32")
    F = blocks[0]["design"]
    good, bad = [], []
    for r in range(reps):
        _, (t,) = _truth_items(prior, r, spec, "single")
        y = simulate_data(t, blocks[0], spec, rng)
        k = covariance_matrix(blocks[0]["dist"], cov, t["practical_range_z"] / spec.range_factor, t["sd_z"] ** 2,
                              t["nugget_sd_z"] ** 2)
        cf = cho_factor(k, lower=True)
        kif, kiy = cho_solve(cf, F), cho_solve(cf, y)
        for b, out in ((spec.priors.beta_sd, good), (1.0, bad)):
            v = np.linalg.inv(F.T @ kif + np.eye(F.shape[1]) / b**2)
            m = v @ (F.T @ kiy)
            out.append(rank_of(t["beta_z"][0], m[0] + np.sqrt(v[0, 0]) * rng.standard_normal((1, L)), L))
    assert spec.priors.beta_sd == 2.5  # the documented default (bayesgeo.fitting.priors.DEFAULT_BETA_SD)
    assert rank_uniformity(good, L, bins=10)["pvalue"] > 0.001
    assert rank_uniformity(bad, L, bins=10)["pvalue"] < 1e-6


def test_too_few_draws_for_the_ranks_refused():
    """Each SBC rank is taken among L thinned draws (Talts et al. 2018, Algorithm 1), so chains x draws
    below L is bad input named by option, not an error deep inside the run."""
    from bayesgeo.common.validate import InputError

    with pytest.raises(InputError, match=r"^draws: 20 draws per chain x 2 chains is fewer than the 49 .* --draws 25"):
        with_settings(QUICK, draws=20)
    assert with_settings(QUICK, draws=25).draws == 25
    with pytest.raises(InputError, match=r"--max-draws: expected at least --draws \(200\), got 100"):
        with_settings(QUICK, max_draws=100)
    assert with_settings(QUICK, max_draws=200).max_draws == 200


def test_censoring_limit_is_the_typical_sets_quantile():
    """The reporting limit of a censored SBC configuration is the median over pilot data sets of each set's
    quantile: for standard normal sets it is the normal quantile (scipy.stats.norm.ppf) within sampling error."""
    from scipy.stats import norm

    from bayesgeo.calibration.censoring import censor, censoring_limit

    rng = np.random.default_rng(0)
    assert censoring_limit(lambda i: rng.normal(size=2000), 0.3) == pytest.approx(norm.ppf(0.3), abs=0.01)
    y, mask = censor(np.array([-1.0, 0.5, -0.2, 2.0]), 0.0)
    np.testing.assert_array_equal(mask, [True, False, True, False])
    np.testing.assert_array_equal(y, [0.0, 0.5, 0.0, 2.0])


def test_censored_replicate_model_keeps_the_prior_and_the_data():
    """Each replicate of a censored configuration builds its own model (its non-detects differ), with the
    template's standardisation and priors held: the same prior rates and constants, its values exactly the
    replicate's, its latent values at the non-detects (SBC needs one prior for all replicates; Talts et al.
    2018)."""
    from bayesgeo.calibration.censoring import censor, censored_template

    cfg = with_settings(QUICK, covariance="exponential", censored=0.3)
    tpl = generated_layout(20, seed=4)
    _, blocks, spec = sbc_model(tpl, cfg)
    y = simulate_data({"practical_range_z": 0.5, "sd_z": 1.3, "nugget_sd_z": 0.4, "beta_z": np.array([0.7])}, blocks[0],
                      spec, np.random.default_rng(1))
    ys, mask = censor(y, np.quantile(y, 0.3))
    model, rep_blocks, rep_spec = sbc_model(censored_template(tpl, ys, mask, spec.value_mean, spec.value_sd), cfg,
                                            fixed=spec)
    assert rep_spec.rates == spec.rates and rep_spec.priors == spec.priors
    assert (rep_spec.value_mean, rep_spec.value_sd) == (spec.value_mean, spec.value_sd)
    np.testing.assert_allclose(rep_blocks[0]["y"], ys, atol=1e-12)
    assert rep_spec.censored == mask.sum() == len(model.coords["censored"])
    assert "censored_gap_z" in model.named_vars and not any(v.name.startswith("sbc_y") for v in model.data_vars)


def test_censored_settings_are_checked():
    """A censored share outside (0, 0.6], or a censored several-site configuration, is refused in one line."""
    from bayesgeo.common.validate import InputError

    with pytest.raises(InputError, match="between 0 and 0.6"):
        with_settings(QUICK, censored=0.7)
    with pytest.raises(InputError, match="single-site models only"):
        with_settings(QUICK, kind="hierarchical", censored=0.3)


@pytest.mark.slow
def test_censored_configuration_runs_and_records_its_non_detects():
    """A small censored SBC run: each replicate fitted with its own non-detects (counted per replicate), ranks
    within 0..L, and the same seed gives the same ranks (reproducibility, the package's own contract)."""
    from bayesgeo.calibration.validation import simulation_based_calibration

    cfg = with_settings(QUICK, covariance="exponential", censored=0.3)
    tpl = generated_layout(20, seed=4)
    res = simulation_based_calibration(tpl, cfg, replicates=2, seed=5)
    assert res.attrs["model"] == "single/exponential/nugget/censored-30%"
    counts = res["non_detects"].values  # the share varies between replicates with the prior draw (0 is possible)
    assert counts.sum() > 0 and (counts <= 20).all()
    assert ((res["rank"].values >= 0) & (res["rank"].values <= cfg.ranks_of)).all()
    again = simulation_based_calibration(tpl, cfg, replicates=2, seed=5)
    np.testing.assert_array_equal(res["rank"].values, again["rank"].values)
