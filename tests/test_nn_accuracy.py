"""Tests of bayesgeo.gp.nn_accuracy: pseudo-true values and information of the nearest-neighbour likelihood."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from sklearn.gaussian_process.kernels import Matern

from bayesgeo.gp.nn_accuracy import (approximation_check, expected_nn_loglik, nn_blocks, nn_information,
                                  nn_pseudo_true, window)
from bayesgeo.gp.nn import maximin_order, nearest_previous, nn_loglik_and_grad


def _points(n, seed):
    return np.random.default_rng(seed).uniform(0.0, 1.0, (n, 2))


def _sk_cov(xy, scale, psill, nugget, nu=1.5):
    """Covariance from scikit-learn's Matern kernel, plus the package's jitter. bayesgeo's Matérn
    scale phi is sklearn's length_scale / sqrt(2 nu) (the 3/2 kernel (1 + d/phi) exp(-d/phi))."""
    import math

    from bayesgeo.gp.dense import JITTER

    k = psill * Matern(length_scale=math.sqrt(2 * nu) * scale, nu=nu)(xy)
    k[np.diag_indices_from(k)] += nugget + JITTER * psill
    return k


def test_expected_loglik_with_all_previous_points_is_minus_the_gaussian_entropy():
    """With m = n - 1 the nn density is the exact one, so E log q(y) = E log p(y) = -H(p), the
    differential entropy of N(0, K): -0.5 (log det K + n + n log 2 pi) (Cover and Thomas 2006,
    thm. 8.4.1); K from scikit-learn's Matern kernel."""
    xy = _points(50, 1)
    k = _sk_cov(xy, 0.2, 1.3, 0.3)
    want = -0.5 * (np.linalg.slogdet(k)[1] + 50 + 50 * np.log(2 * np.pi))
    got = expected_nn_loglik(nn_blocks(xy, neighbours=49), "matern32", (0.2, 1.3, 0.3), (0.2, 1.3, 0.3))
    assert got == pytest.approx(want, rel=1e-10)


def test_expected_loglik_matches_the_monte_carlo_mean_of_the_nn_loglik():
    """The closed form E_{y ~ N(0, K0)} log q_eta(y) at eta != eta0 and m = 6 against the mean of the
    nn log-likelihood over 4,000 data sets drawn with scipy.stats.multivariate_normal (K0 from
    scikit-learn's Matern kernel): agreement within 4 Monte Carlo standard errors."""
    xy = _points(60, 2)
    true, other = (0.15, 1.0, 0.2), (0.25, 0.8, 0.3)
    y = stats.multivariate_normal(np.zeros(60), _sk_cov(xy, *true)).rvs(4000, random_state=3)
    nbr = nearest_previous(xy, maximin_order(xy), neighbours=6)
    vals = np.array([nn_loglik_and_grad(r, xy, "matern32", *other, nbr=nbr)[0] for r in y])
    got = expected_nn_loglik(nn_blocks(xy, neighbours=6, nbr=nbr), "matern32", other, true)
    assert abs(got - vals.mean()) < 4 * vals.std(ddof=1) / np.sqrt(len(vals))


@pytest.mark.parametrize("family,nugget", [("matern32", 0.25), ("exponential", 0.25), ("matern52", 0.0)])
def test_pseudo_true_value_is_the_truth(family, nugget):
    """The nn log-likelihood is a sum of conditional log densities whose expectations each peak at
    the true parameters (Gibbs' inequality), so its pseudo-true value (White 1982) is the truth
    even with m = 5 of 120 points (unbiased estimating equation; Stein, Chi and Welty 2004, from
    memory). Nelder-Mead must come back to the starting values within its tolerance."""
    xy = _points(120, 4)
    blocks = nn_blocks(xy, neighbours=5)
    r = nn_pseudo_true(blocks, family, 0.12, 1.0, nugget)
    assert r["converged"]
    assert max(abs(v) for v in r["log_shift"].values()) < 2e-3
    assert set(r["log_shift"]) == ({"scale", "partial_sill", "nugget"} if nugget else {"scale", "partial_sill"})


def test_information_with_all_previous_points_is_the_fisher_information():
    """With m = n - 1, H = J = I: the nn sd, its sampling sd and the exact sd (Fisher information
    0.5 tr(K^-1 K_j K^-1 K_k), Mardia and Marshall 1984) coincide, width ratio and efficiency 1."""
    xy = _points(70, 5)
    r = nn_information(xy, "matern32", 0.1, 1.0, 0.2, neighbours=69)
    for p in ("scale", "partial_sill", "nugget"):
        assert r[p]["nn_sd"] == pytest.approx(r[p]["exact_sd"], rel=1e-4)
        assert r[p]["nn_sampling_sd"] == pytest.approx(r[p]["exact_sd"], rel=1e-4)
        assert r[p]["width_ratio"] == pytest.approx(1.0, abs=1e-4)


def test_exact_sd_matches_a_finite_difference_fisher_information_from_scipy():
    """The exact sd of log(scale) equals sqrt(diag I^-1) with I = -E[Hessian of log N(y | 0, K)],
    computed here independently as 0.5 tr(K^-1 dK K^-1 dK) with dK by central
    differences of scikit-learn's Matern covariance (Mardia and Marshall 1984)."""
    xy = _points(60, 6)
    eta0 = np.log([0.12, 1.0, 0.2])
    h = 1e-4

    def kof(eta):
        e = np.exp(eta)
        return _sk_cov(xy, *e)

    k0inv = np.linalg.inv(kof(eta0))
    dk = [(kof(eta0 + h * np.eye(3)[j]) - kof(eta0 - h * np.eye(3)[j])) / (2 * h) for j in range(3)]
    fisher = np.array([[0.5 * np.trace(k0inv @ dk[i] @ k0inv @ dk[j]) for j in range(3)] for i in range(3)])
    want = np.sqrt(np.diag(np.linalg.inv(fisher)))
    r = nn_information(xy, "matern32", 0.12, 1.0, 0.2, neighbours=8)
    assert [r[p]["exact_sd"] for p in ("scale", "partial_sill", "nugget")] == pytest.approx(want, rel=1e-4)


def _nn_curvature(xy, nbr, m, params, step=1e-3):
    """H: minus the Hessian in (log scale, log partial sill, log nugget) of the closed-form expected
    Matérn 3/2 nn log-likelihood at the true ``params``, by central differences."""
    blocks = nn_blocks(xy, neighbours=m, nbr=nbr)
    eta0 = np.log(params)
    basis = np.eye(3) * step

    def g(eta):
        return expected_nn_loglik(blocks, "matern32", tuple(np.exp(eta)), tuple(params))

    return np.array([[-(g(eta0 + basis[i] + basis[j]) - g(eta0 + basis[i] - basis[j]) - g(eta0 - basis[i] + basis[j])
                       + g(eta0 - basis[i] - basis[j])) / (4 * step**2) for j in range(3)] for i in range(3)])


def test_sampling_sd_matches_the_monte_carlo_spread_of_the_nn_score():
    """J = Var[d log q / d eta] from the closed form 0.5 tr(Q_j K0 Q_k K0) (Mathai and Provost 1992)
    against the sample variance of the analytic nn gradient over 3,000 data sets drawn with
    scipy.stats.multivariate_normal: the implied sandwich sd of log(scale) within 8%
    (sampling error of a variance from 3,000 draws is about 2.6%, so 3 standard errors)."""
    xy = _points(80, 7)
    scale, psill, nug, m = 0.15, 1.0, 0.25, 4
    y = stats.multivariate_normal(np.zeros(80), _sk_cov(xy, scale, psill, nug)).rvs(3000, random_state=8)
    nbr = nearest_previous(xy, maximin_order(xy), neighbours=m)
    scores = []
    for r in y:
        _, _, g_phi, g_s2, g_t2 = nn_loglik_and_grad(r, xy, "matern32", scale, psill, nug, nbr=nbr)
        scores.append([g_phi * scale, g_s2 * psill, g_t2 * nug])  # chain rule to log parameters
    jmc = np.cov(np.array(scores).T)
    info = nn_information(xy, "matern32", scale, psill, nug, neighbours=m)
    # the same sandwich H^-1 J H^-1 with the Monte Carlo J and H by central differences of the
    # closed-form expected log-likelihood
    hinv = np.linalg.inv(_nn_curvature(xy, nbr, m, (scale, psill, nug)))
    mc_sd = np.sqrt(np.diag(hinv @ jmc @ hinv))
    assert info["scale"]["nn_sampling_sd"] == pytest.approx(mc_sd[0], rel=0.08)
    assert info["partial_sill"]["nn_sampling_sd"] == pytest.approx(mc_sd[1], rel=0.08)


def test_shift_sd_matches_the_monte_carlo_spread_of_nn_minus_exact_one_step_estimates():
    """shift_sd = sqrt(sampling^2 - exact^2) / exact (Hausman 1978: for a consistent and an efficient
    estimator the variance of their difference is the difference of their variances) against Monte
    Carlo: over 3,000 data sets from scipy.stats.multivariate_normal, the one-step estimates
    H^-1 s_nn (analytic nn gradient) and I^-1 s_exact (exact score 0.5 y'K^-1 K_j K^-1 y - 0.5 tr(K^-1 K_j)
    with K_j by central differences of scikit-learn's Matern kernel; Fisher information
    0.5 tr(K^-1 K_i K^-1 K_j), Mardia and Marshall 1984). The sd of their difference in log(scale),
    divided by the exact sd, must match shift_sd within 5% (the sampling error of an sd from 3,000
    draws is about 1.3%; measured 0.534 against 0.525 for log(scale), 0.226 against 0.230 for
    log(partial sill))."""
    xy = _points(80, 9)
    scale, psill, nug, m = 0.15, 1.0, 0.25, 4
    eta0 = np.log([scale, psill, nug])
    k0 = _sk_cov(xy, scale, psill, nug)
    y = stats.multivariate_normal(np.zeros(80), k0).rvs(3000, random_state=10)
    nbr = nearest_previous(xy, maximin_order(xy), neighbours=m)
    s_nn = []
    for r in y:
        _, _, g_phi, g_s2, g_t2 = nn_loglik_and_grad(r, xy, "matern32", scale, psill, nug, nbr=nbr)
        s_nn.append([g_phi * scale, g_s2 * psill, g_t2 * nug])
    s_nn = np.array(s_nn)
    step = 1e-4
    kj = [(_sk_cov(xy, *np.exp(eta0 + step * e)) - _sk_cov(xy, *np.exp(eta0 - step * e))) / (2 * step)
          for e in np.eye(3)]
    kinv = np.linalg.inv(k0)
    a = [kinv @ k @ kinv for k in kj]
    s_ex = np.column_stack([0.5 * np.einsum("ri,ij,rj->r", y, aj, y) - 0.5 * np.trace(kinv @ k) for aj, k in zip(a, kj)])
    fisher = np.array([[0.5 * np.trace(kinv @ ki @ kinv @ kk) for kk in kj] for ki in kj])
    hm = _nn_curvature(xy, nbr, m, (scale, psill, nug))  # as nn_information computes it
    diff = s_nn @ np.linalg.inv(hm).T - s_ex @ np.linalg.inv(fisher).T
    info = nn_information(xy, "matern32", scale, psill, nug, neighbours=m)
    assert info["scale"]["shift_sd"] > 0.2  # m = 4 loses real information here, so the check has teeth
    mc = diff.std(axis=0, ddof=1) / np.sqrt(np.diag(np.linalg.inv(fisher)))
    assert info["scale"]["shift_sd"] == pytest.approx(mc[0], rel=0.05)
    assert info["partial_sill"]["shift_sd"] == pytest.approx(mc[1], rel=0.05)


def test_window_keeps_nearby_points_and_all_of_a_small_data_set():
    """The window is the k points nearest the point closest to the centroid (checked by brute
    force with numpy distances); with n <= k it is every point."""
    xy = _points(500, 9)
    idx = window(xy, points=50)
    c = int(np.argmin(((xy - xy.mean(axis=0)) ** 2).sum(axis=1)))
    want = np.sort(np.argsort(((xy - xy[c]) ** 2).sum(axis=1), kind="stable")[:50])
    assert np.array_equal(idx, want)
    assert np.array_equal(window(xy[:40], points=50), np.arange(40))


def test_approximation_check_flags_too_narrow_intervals():
    """Dense data of a smooth family with a nugget and few neighbours make the nn intervals too
    narrow (width ratio above the 1.10 limit), while an exponential field with m = 20 passes: the
    pattern the exact computation predicts (docs/large_data.md; common practice to treat smooth
    fields with a nugget as the hard case of nn likelihoods, Katzfuss and Guinness 2021, from memory)."""
    import xarray as xr

    xy = _points(600, 10)
    post = xr.Dataset({"scale": ("draw", [0.1, 0.12, 0.11]), "partial_sill": ("draw", [1.0, 1.0, 1.0]),
                       "nugget": ("draw", [0.05, 0.05, 0.05])})
    bad = approximation_check(post, xy, covariance="matern52", neighbours=3)
    assert bad["status"] == "caution" and "narrower" in bad["message"]
    assert bad["at"]["scale"] == pytest.approx(0.11)
    good = approximation_check(post, xy, covariance="exponential", neighbours=20)
    assert good["status"] == "ok"
    assert max(good[p]["width_ratio"] for p in good["parameters"]) <= good["limit"]


def test_cli_fit_and_check_report_the_approximation_check(tmp_path, capsys):
    """`fit --approx nn --json` carries the approximation check (evaluated at the stored posterior
    medians) and `check --json` repeats it; a dense fit has none. The medians are recomputed here
    from posterior.nc with numpy (the check must describe the saved fit)."""
    import json

    import xarray as xr

    from bayesgeo.cli import main
    from bayesgeo.data.demo import simulate_field

    rng = np.random.default_rng(11)
    xy = 500.0 * rng.random((50, 2))
    z = simulate_field(xy, covariance="exponential", practical_range=150.0, partial_sill=1.0, nugget=0.2,
                       mean=2.0, rng=rng)
    data = tmp_path / "pts.csv"
    data.write_text("x,y,value\n" + "".join(f"{a:.2f},{b:.2f},{c:.4f}\n" for (a, b), c in zip(xy, z)))
    base = ["fit", str(data), "--covariance", "exponential", "--draws", "60", "--tune", "60", "--chains", "1",
            "--seed", "2", "--json"]
    main([*base, "--approx", "nn", "--neighbours", "6", "--out", str(tmp_path / "nn")])
    fit_json = json.loads(capsys.readouterr().out)
    appr = fit_json["approximation"]
    assert appr["neighbours"] == 6 and appr["window_points"] == 50 and appr["status"] in ("ok", "caution")
    post = xr.open_datatree(tmp_path / "nn" / "posterior.nc")["posterior"]
    assert appr["at"]["scale"] == pytest.approx(float(np.median(post["scale"].values)))
    assert any(c.startswith("Nearest-neighbour likelihood (m = 6)") for c in fit_json["cautions"])
    assert f"by about {appr['scale']['shift_sd']:.2f} posterior sd" in appr["message"]
    main(["check", str(tmp_path / "nn"), "--no-figures", "--json"])
    assert json.loads(capsys.readouterr().out)["approximation"] == appr
    main([*base, "--approx", "dense", "--out", str(tmp_path / "dense")])
    assert json.loads(capsys.readouterr().out)["approximation"] is None
