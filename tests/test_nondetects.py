"""Non-detects (values below a reporting limit): intake and the left-censored model.

Sources: the laboratory notation ``<X`` for a result below the reporting limit X and the ``U``
qualifier for an undetected analyte (common practice); the censored likelihood of a Gaussian vector,
density of the observed part times the normal (or multivariate normal) CDF of the censored part given
it (Helsel 2012, *Statistics for Censored Environmental Data*, 2nd ed., ch. 6; De Oliveira 2005, JCGS
14, from memory), computed with scipy.stats and scipy.integrate.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.spatial.distance import cdist

from bayesgeo.common.defaults import JITTER
from bayesgeo.common.validate import InputError
from bayesgeo.data.nondetects import count_line
from bayesgeo.data.points import apply_transform, points_dataset, read_points
from bayesgeo.fitting.model import build_model, censored_index


def _write(path, rows, header="x,y,conc"):
    path.write_text(header + "\n" + "\n".join(",".join(map(str, r)) for r in rows) + "\n", encoding="utf-8")
    return path


def _grid(values):
    return [(100 * (i % 4), 100 * (i // 4), v) for i, v in enumerate(values)]


VALUES = ["1.2", "<0.5", "< 0.5", "3.1", "2.2", "<1", "0.9", "1.7", "2.5", "4.0", "1.1", "2.8"]


def test_less_than_cells_are_non_detects_at_their_limits(tmp_path):
    """``<X`` (with or without a space) is a non-detect with reporting limit X (laboratory notation, common
    practice): the value holds the limit, ``censored`` marks it, limits may differ by row, and the count
    line names the share and the limits."""
    ds = read_points(_write(tmp_path / "a.csv", _grid(VALUES)), value="conc", coords="xy", units="mg/kg")
    np.testing.assert_array_equal(ds["censored"].values, [v.startswith("<") for v in VALUES])
    np.testing.assert_allclose(ds["value"].values, [float(v.lstrip("< ")) for v in VALUES])
    assert ds.attrs["non_detects"] == 3
    assert count_line(ds) == "3 of 12 values are non-detects (reporting limits 0.5 to 1 mg/kg)"
    logs = apply_transform(ds, "log")
    np.testing.assert_allclose(logs["value"].values, np.log([float(v.lstrip("< ")) for v in VALUES]))
    plain = read_points(_write(tmp_path / "b.csv", _grid([v.lstrip("< ") for v in VALUES])), value="conc", coords="xy")
    assert "censored" not in plain and count_line(plain) is None


def test_flag_and_limit_columns(tmp_path):
    """A detected/not-detected flag column with a limit column gives the same data as ``<X`` cells; the
    laboratory qualifier ``U`` and ``ND`` mean not detected (common practice)."""
    flags = ["", "U", "ND", "=", "", "<", "", "", "", "", "", ""]
    rows = [(x, y, "" if f in ("U", "ND", "<") else v.lstrip("< "), v.lstrip("< ") if f in ("U", "ND", "<") else "", f)
            for (x, y, v), f in zip(_grid(VALUES), flags)]
    ds = read_points(_write(tmp_path / "f.csv", rows, "x,y,conc,rl,q"), value="conc", limit="rl", detected="q",
                     coords="xy")
    ref = read_points(_write(tmp_path / "a.csv", _grid(VALUES)), value="conc", coords="xy")
    np.testing.assert_array_equal(ds["censored"].values, ref["censored"].values)
    np.testing.assert_allclose(ds["value"].values, ref["value"].values)


@pytest.mark.parametrize("cells, kwargs, pattern", [
    (["<abc"], {}, r"row 2, column 'conc': the reporting limit 'abc' of a non-detect is not a finite number"),
    (["<"], {}, r"row 2, column 'conc': '<' is a censored value \(a non-detect\)"),
    ([">5"], {}, r"row 2, column 'conc': '>5' is a censored value \(above a limit\)"),
    (["<1"] * 10, {}, r"10 of 12 values \(83%\) are non-detects .* above 80%"),
])
def test_bad_non_detects_are_refused_by_row(tmp_path, cells, kwargs, pattern):
    """A limit that is not a number, a bare ``<``, a value above a limit, and a share of non-detects above
    80% (Helsel 2012, ch. 1: beyond it only the share of detects can be estimated; from memory) are refused
    with one line naming the file and rows (input-check rule of this project)."""
    values = cells + VALUES[len(cells):]
    with pytest.raises(InputError, match=pattern):
        read_points(_write(tmp_path / "bad.csv", _grid(values)), value="conc", coords="xy", **kwargs)


def test_log_needs_positive_limits_and_duplicates_are_not_averaged(tmp_path):
    """Under the log transform a zero limit is refused as a zero value would be; a non-detect is never
    averaged with another result at the same location (a mean of a limit and a value means nothing)."""
    ds = read_points(_write(tmp_path / "z.csv", _grid(["<0"] + VALUES[1:])), value="conc", coords="xy")
    with pytest.raises(InputError, match=r"zero or negative values \(reporting limits of non-detects included\) at rows 2"):
        apply_transform(ds, "log")
    rows = _grid(VALUES) + [(0, 0, "<0.3")]
    with pytest.raises(InputError, match="duplicate locations with non-detects at rows 2, 14"):
        read_points(_write(tmp_path / "d.csv", rows), value="conc", coords="xy", duplicates="mean")
    with pytest.raises(InputError, match=r"^limit: the limit column and the detected flag column are given together"):
        read_points(_write(tmp_path / "a.csv", _grid(VALUES)), value="conc", coords="xy", detected="conc")


# --- the left-censored likelihood ---------------------------------------------------------------


def _censored_model(n_cens: int):
    """A small exponential model with ``n_cens`` non-detects and its pieces: the PyMC model, its spec, the
    compiled log-likelihood term as a function of the gaps, and the reference covariance matrix."""
    rng = np.random.default_rng(7)
    xy = rng.uniform(0, 100, (8, 2))
    z = rng.normal(2.0, 1.0, 8)
    cens = np.zeros(8, bool)
    cens[:n_cens] = True
    ds = points_dataset(xy[:, 0], xy[:, 1], z, censored=cens, attrs={"coords": "xy"})
    model, spec = build_model(ds, covariance="exponential", _trend="sampled")
    point = model.initial_point()
    point["beta_z"] = np.zeros_like(point["beta_z"])
    term = model.replace_rvs_by_values([model.potentials[0]])[0]  # the Gaussian-process term, in value variables
    loglik = model.compile_fn(term, inputs=model.value_vars, on_unused_input="ignore")
    log_v, logit_s = point["variance_coords_z"]  # (log total variance, logit spatial share), docs/model.md
    s2, t2 = np.exp(log_v) / (1 + np.exp(-logit_s)), np.exp(log_v) / (1 + np.exp(logit_s))
    phi = float(np.exp(point["practical_range_z_log__"])) * spec.distance_scale / spec.range_factor
    k = s2 * np.exp(-cdist(xy, xy) / phi) + (t2 + JITTER * s2) * np.eye(8)  # standardised units
    y = (z - spec.value_mean) / spec.value_sd

    def at(gaps):
        return float(loglik({**point, "censored_gap_z_log__": np.log(np.asarray(gaps, dtype=float))}))

    return at, y, k, cens


def test_one_non_detect_integrates_to_the_normal_cdf():
    """With one non-detect, integrating the model's Gaussian-process density over its latent value
    below the limit gives the censored likelihood: the density of the detected values times the normal
    CDF of the non-detect given them (Gaussian conditioning; scipy.stats.multivariate_normal and
    scipy.stats.norm, integral by scipy.integrate.quad)."""
    at, y, k, cens = _censored_model(1)
    o, c = ~cens, cens
    value, _ = integrate.quad(lambda g: np.exp(at([g])), 0.0, np.inf, epsabs=0, epsrel=1e-10, limit=200)
    koo_inv_koc = np.linalg.solve(k[np.ix_(o, o)], k[np.ix_(o, c)])
    mean = (koo_inv_koc.T @ y[o]).item()
    sd = np.sqrt(k[np.ix_(c, c)] - k[np.ix_(c, o)] @ koo_inv_koc).item()
    ref = stats.multivariate_normal(np.zeros(o.sum()), k[np.ix_(o, o)]).logpdf(y[o]) + stats.norm.logcdf(y[c][0], mean, sd)
    assert np.log(value) == pytest.approx(ref, abs=1e-7)


def test_two_non_detects_integrate_to_the_bivariate_normal_cdf():
    """Two correlated non-detects: the integral over both latent values below their limits is the density of
    the detected values times the bivariate normal CDF of the pair given them (scipy.stats.multivariate_normal
    .cdf; integral by scipy.integrate.dblquad)."""
    at, y, k, cens = _censored_model(2)
    o, c = ~cens, cens
    value, _ = integrate.dblquad(lambda g2, g1: np.exp(at([g1, g2])), 0.0, 12.0, 0.0, 12.0, epsabs=0, epsrel=1e-9)
    a = np.linalg.solve(k[np.ix_(o, o)], k[np.ix_(o, c)])
    mean = a.T @ y[o]
    cov = k[np.ix_(c, c)] - k[np.ix_(c, o)] @ a
    cdf = stats.multivariate_normal.cdf(y[c], mean, cov, abseps=1e-10, releps=1e-10)
    ref = stats.multivariate_normal(np.zeros(o.sum()), k[np.ix_(o, o)]).logpdf(y[o]) + np.log(cdf)
    assert np.log(value) == pytest.approx(ref, abs=1e-5)


def _simulated(n=40, seed=4):
    """Points of an exponential field (practical range 40 in a 100 x 100 square, nugget 0.2 of a unit sill,
    mean 5) with two reporting limits, the 30% and 20% quantiles, alternating between samples."""
    from bayesgeo.data.demo import simulate_field

    xy = np.random.default_rng(3).uniform(0, 100, (n, 2))
    z = simulate_field(xy, covariance="exponential", practical_range=40.0, partial_sill=1.0, nugget=0.2, mean=5.0,
                       rng=np.random.default_rng(seed))
    limit = np.where(np.arange(n) % 2 == 0, np.quantile(z, 0.3), np.quantile(z, 0.2))
    cens = z < limit
    return xy, z, limit, cens


@pytest.fixture(scope="module")
def censored_fit():
    from bayesgeo import Fit

    xy, z, limit, cens = _simulated()
    ds = points_dataset(xy[:, 0], xy[:, 1], np.where(cens, limit, z), censored=cens, attrs={"coords": "xy"})
    return Fit.sample(ds, covariance="exponential", chains=2, draws=200, tune=300, seed=2), ds, limit, cens


def test_censored_fit_keeps_every_latent_value_below_its_limit(censored_fit):
    """A small fit with a quarter of the values censored at two limits converges, and every imputed value of
    every draw lies below its own reporting limit (the support of the left-censored model, exact); the spec
    counts the non-detects and the cautions say how they were treated."""
    fit, ds, limit, cens = censored_fit
    assert fit.spec.censored == int(cens.sum()) == censored_index(ds).size
    imputed = fit.posterior["censored_value"].values  # (chain, draw, censored)
    assert np.all(imputed < limit[cens][None, None, :])
    assert any("non-detects, modelled as left-censored" in c for c in fit.cautions)
    assert fit.convergence.verdict in ("pass", "warn")


def test_prediction_conditions_on_each_draws_imputed_values(censored_fit):
    """With one posterior draw, the kriging mean at new points is simple kriging (Cressie 1993, sec. 3.4.5)
    from the data with the non-detects at that draw's imputed values: m + k_*^T K^-1 (z - m), computed with
    numpy.linalg.solve on an exponential covariance built with scipy's cdist."""
    from bayesgeo.predict.prediction import basis_from_fit, predict_targets
    from bayesgeo.data.targets import grid_targets

    fit, ds, limit, cens = censored_fit
    basis, spec, params = basis_from_fit(fit, draws=1)
    z = ds["value"].values.copy()
    z[cens] = params["censored_value"].values[0]
    np.testing.assert_allclose(basis.values[0], z)
    targets = grid_targets(basis.xy, cell=25.0)
    pred = predict_targets(basis, targets, design_attrs=spec.design_attrs, scheduler="synchronous")
    xx, yy = np.meshgrid(targets["x"].values, targets["y"].values)  # the grid's (y, x) layout
    flat = np.column_stack([xx.ravel(), yy.ravel()])
    keep = np.asarray(targets["inside"].values, bool).ravel()
    phi, s2, t2 = (float(params[k].values[0]) for k in ("scale", "partial_sill", "nugget"))
    xy = basis.xy
    k = s2 * np.exp(-cdist(xy, xy) / phi) + (t2 + JITTER * s2) * np.eye(len(xy))
    mu = float(params["beta"].values[0][0])  # intercept only
    ref = mu + (s2 * np.exp(-cdist(flat[keep], xy) / phi)) @ np.linalg.solve(k, z - mu)
    np.testing.assert_allclose(pred["mean"].values.ravel()[keep], ref, rtol=1e-8)


def test_leave_one_out_of_a_non_detect_is_the_probability_below_its_limit(censored_fit):
    """For a non-detect the leave-one-out term is log P(y_i < L_i | rest) = log Phi((L_i - m_-i) / s_-i), the
    rest at the draw's imputed values (Gaussian conditioning: scipy.stats.norm.logcdf, conditional moments by
    numpy.linalg.solve); a detected point keeps its density, in data units (change of variables)."""
    from bayesgeo.checks.loo import loo_predictive
    from bayesgeo.fitting.arrays import fit_arrays

    fit, ds, limit, cens = censored_fit
    pred = loo_predictive(fit.tree)
    fa = fit_arrays(fit.tree)
    spec = fit.spec
    post = fit.posterior.isel(chain=0, draw=0)
    y = fa.y.copy()
    y[cens] = post["censored_z"].values
    phi = float(post["practical_range_z"]) * spec.distance_scale / spec.range_factor
    s2, t2 = float(post["sd_z"]) ** 2, float(post["nugget_sd_z"]) ** 2
    k = s2 * np.exp(-cdist(fa.xy, fa.xy) / phi) + (t2 + JITTER * s2) * np.eye(fa.n)
    mu = fa.design @ post["beta_z"].values
    for i in (int(np.flatnonzero(cens)[0]), int(np.flatnonzero(~cens)[0])):
        o = np.arange(fa.n) != i
        w = np.linalg.solve(k[np.ix_(o, o)], k[o, i])
        m = mu[i] + w @ (y[o] - mu[o])
        s = np.sqrt(k[i, i] - k[i, o] @ w)
        got = float(pred["log_lik"].isel(chain=0, draw=0, obs=i))
        if cens[i]:
            assert got == pytest.approx(stats.norm.logcdf(fa.y[i], m, s), abs=1e-8)
        else:
            assert got == pytest.approx(stats.norm.logpdf(fa.y[i], m, s) - np.log(spec.value_sd), abs=1e-8)


def test_variogram_check_records_replicates_as_the_data_were(censored_fit):
    """The posterior predictive check compares like with like (Gelman, Meng and Stern 1996): replicate values
    below a point's reporting limit are recorded at the limit, as the data's non-detects are, so no
    replicate lies below the floor; the check says so."""
    from bayesgeo.checks.ppcheck import _censor_like_data, variogram_check
    from bayesgeo.fitting.arrays import fit_arrays

    fit, ds, limit, cens = censored_fit
    fa = fit_arrays(fit.tree)
    reps = np.random.default_rng(0).normal(5.0, 2.0, (fa.n, 30))
    out = _censor_like_data(fa, reps)
    floor = np.where(cens, limit, np.minimum(ds["value"].values, limit[cens].min()))
    np.testing.assert_array_equal(out, np.maximum(reps, floor[:, None]))
    vc = variogram_check(fit.tree, replicates=20, bins=6, seed=1)
    assert vc.attrs["non_detects"] == int(cens.sum())
    assert any("non-detects" in c for c in vc.attrs["cautions"])


def test_command_line_end_to_end_with_less_than_values(tmp_path):
    """``<X`` values go through explore, fit, check, map, variogram-check and compare on the command line
    (exit 0, one JSON object each; our documented CLI contract, docs/cli.md); explore leaves the non-detects
    out of the empirical statistics and says so, and draws them apart in non_detects.png."""
    import json

    from bayesgeo.cli import main

    xy, z, limit, cens = _simulated(n=36, seed=9)
    value = np.exp(z - 4.0)
    cells = [f"<{np.exp(lim - 4.0):.4f}" if c else f"{v:.5f}" for v, lim, c in zip(value, limit, cens)]
    data = tmp_path / "nd.csv"
    data.write_text("easting,northing,arsenic\n" + "".join(f"{a:.3f},{b:.3f},{c}\n" for (a, b), c in zip(xy, cells)))
    common = ["--value", "arsenic", "--transform", "log", "--coords", "xy"]

    def run(*argv):
        import contextlib
        import io

        buf = io.StringIO()
        with contextlib.redirect_stdout(buf):
            code = main(list(argv))
        assert code == 0, argv
        return json.loads(buf.getvalue())

    ex = run("explore", str(data), *common[:2], "--coords", "xy", "--permutations", "0", "--out", str(tmp_path / "ex"),
             "--json")
    assert ex["non_detects"] == int(cens.sum()) and any("left out of the semivariograms" in n for n in ex["notes"])
    assert (tmp_path / "ex" / "non_detects.png").is_file()
    for fam in ("exponential", "matern32"):
        run("fit", str(data), *common, "--covariance", fam, "--chains", "2", "--draws", "150", "--tune", "250",
            "--seed", "3", "--out", str(tmp_path / fam), "--json")
    run("check", str(tmp_path / "exponential"), "--json")
    mp = run("map", str(tmp_path / "exponential"), "--cell", "20", "--draws", "20", "--allow-unconverged", "--json")
    assert mp["cells"] > 0
    run("variogram-check", str(tmp_path / "exponential"), "--replicates", "20", "--json")
    cmp = run("compare", str(tmp_path / "exponential"), str(tmp_path / "matern32"), "--json")
    assert {r["fit"] for r in cmp["ranking"]} == {"exponential", "matern32"}


def test_several_site_block_with_a_non_detect_integrates_to_the_normal_cdf():
    """Several sites: the Gaussian-process term of a site with one non-detect, integrated over its latent
    value below the limit, is the site's censored likelihood, the density of its detected values times the
    normal CDF of the non-detect given them (scipy.stats; integral by scipy.integrate.quad), with that site's
    own parameters; a site without non-detects is untouched."""
    from bayesgeo.fitting.hierarchical import build_site_model

    rng = np.random.default_rng(11)
    xy = rng.uniform(0, 100, (20, 2))
    z = rng.normal(2.0, 1.0, 20)
    site = np.repeat(["north", "south"], 10)
    cens = np.zeros(20, bool)
    cens[12] = True  # one non-detect at the second site
    ds = points_dataset(xy[:, 0], xy[:, 1], z, site=site, censored=cens, attrs={"coords": "xy"})
    model, spec = build_site_model(ds, covariance="exponential", small_sites="keep")
    assert spec.site_censored == (0, 1)
    point = model.initial_point()
    outs = model.replace_rvs_by_values([model[v] for v in ("practical_range_z", "sd_z", "nugget_sd_z", "beta_z")])
    values = model.compile_fn(outs, inputs=model.value_vars, on_unused_input="ignore")(point)
    prange, sd, tau, beta = (np.asarray(v) for v in values)
    term = model.replace_rvs_by_values([model.potentials[1]])[0]
    loglik = model.compile_fn(term, inputs=model.value_vars, on_unused_input="ignore")

    def at(g):
        return float(loglik({**point, "censored_gap_z_log__": np.log(np.array([g]))}))

    s = site == "south"
    phi = prange[1] * spec.distance_scale / spec.range_factor
    k = sd[1] ** 2 * np.exp(-cdist(xy[s], xy[s]) / phi) + (tau[1] ** 2 + JITTER * sd[1] ** 2) * np.eye(10)
    from bayesgeo.explore.trend import design_matrix

    mean = design_matrix(ds.isel(obs=np.flatnonzero(s)), 0, ()).values @ beta[1]
    y = (z[s] - spec.value_mean) / spec.value_sd - mean
    c = np.zeros(10, bool)
    c[2] = True
    o = ~c
    a = np.linalg.solve(k[np.ix_(o, o)], k[np.ix_(o, c)])
    ref = (stats.multivariate_normal(np.zeros(9), k[np.ix_(o, o)]).logpdf(y[o])
           + stats.norm.logcdf(y[c][0], (a.T @ y[o]).item(), np.sqrt(k[np.ix_(c, c)] - k[np.ix_(c, o)] @ a).item()))
    value, _ = integrate.quad(lambda g: np.exp(at(g)), 0.0, np.inf, epsabs=0, epsrel=1e-10, limit=200)
    assert np.log(value) == pytest.approx(ref, abs=1e-7)
    first = model.compile_fn(model.replace_rvs_by_values([model.potentials[0]])[0], inputs=model.value_vars,
                             on_unused_input="ignore")
    assert float(first({**point, "censored_gap_z_log__": np.log(np.array([0.3]))})) == pytest.approx(
        float(first({**point, "censored_gap_z_log__": np.log(np.array([3.0]))})), abs=0)


@pytest.mark.parametrize("approx", ["dense", "nn"])
def test_pure_nugget_model_samples_the_tobit_posterior(approx):
    """With a pure-nugget covariance (no partial sill) the values are independent and the censored model is
    Tobit's censored normal regression (Tobin 1958, Econometrica 26; Helsel 2012, ch. 6). Sampled with flat
    priors on (mean, log sd), the data-augmented model must give the posterior whose mode is the censored
    maximum-likelihood fit (scipy.optimize on scipy.stats.norm.logpdf + logcdf) and whose moments are computed
    here by quadrature on a grid; means within 4 Monte Carlo standard errors (ArviZ mcse), sds within 10%."""
    import arviz as az
    import pymc as pm
    import pytensor.tensor as pt
    from scipy import optimize

    from bayesgeo.fitting.model import censored_latent
    from bayesgeo.fitting.sampling import sample
    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.gp.engines import engine

    rng = np.random.default_rng(5)
    n = 60
    xy = rng.uniform(0, 100, (n, 2))
    raw = rng.normal(1.0, 0.8, n)
    limit = np.where(np.arange(n) % 2 == 0, 0.9, 0.6)  # two reporting limits
    cens = raw < limit
    y = np.where(cens, limit, raw)
    assert 0.3 <= cens.mean() <= 0.6

    def loglik(mu, log_sd):
        sd = np.exp(log_sd)
        return stats.norm.logpdf(y[~cens][:, None], mu, sd).sum(0) + stats.norm.logcdf(y[cens][:, None], mu, sd).sum(0)

    ml = optimize.minimize(lambda p: -loglik(p[0], p[1])[0], [y.mean(), np.log(y.std())], method="Nelder-Mead",
                           options={"xatol": 1e-10, "fatol": 1e-12}).x
    mus, lsds = np.meshgrid(np.linspace(ml[0] - 1.2, ml[0] + 1.2, 241), np.linspace(ml[1] - 1.2, ml[1] + 1.2, 241))
    lp = loglik(mus.ravel(), lsds.ravel())
    assert np.unravel_index(lp.argmax(), mus.shape) == (120, 120)  # the grid's mode is the ML fit (its centre)
    w = np.exp(lp - lp.max()) / np.exp(lp - lp.max()).sum()
    ref = {k: (w @ g.ravel(), np.sqrt(w @ g.ravel() ** 2 - (w @ g.ravel()) ** 2)) for k, g in
           (("mu", mus), ("log_sd", lsds))}

    with pm.Model(coords={"censored": np.flatnonzero(cens).tolist()}) as model:
        mu, log_sd = pm.Flat("mu"), pm.Flat("log_sd")
        values = pt.set_subtensor(pt.as_tensor_variable(y)[np.flatnonzero(cens)], censored_latent(y[cens]))
        pm.Potential("loglik", engine(approx).loglik(
            values - mu, xy=xy, dist=cdist(xy, xy) / 100.0, covariance=get_covariance("exponential"),
            scale=pt.as_tensor_variable(0.1), partial_sill=0.0, nugget=pt.exp(2.0 * log_sd), neighbours=5,
            metric="euclidean", distance_scale=100.0))
    post = sample(model, chains=2, draws=1000, tune=600, seed=3)["posterior"].to_dataset()
    for k, (mean, sd) in ref.items():
        assert abs(float(post[k].mean()) - mean) < 4 * float(az.mcse(post[k])), k
        assert float(post[k].std()) == pytest.approx(sd, rel=0.1), k
