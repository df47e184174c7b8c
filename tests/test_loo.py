"""Tests of bayesgeo.checks.loo: exact Gaussian-process leave-one-out densities.

Fits are built here from chosen parameter draws in the layout of bayesgeo.fitting.posterior.fit (no
sampling), so every check runs in well under a second; the references are brute-force Gaussian
conditioning with numpy, scipy.stats densities and published formulas.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import xarray as xr
from scipy import stats

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.gp.dense import covariance_matrix
from bayesgeo.checks.loo import add_log_likelihood, loo_predictive, pointwise_loo_loglik
from bayesgeo.fitting.arrays import fit_arrays
from bayesgeo.gp.dense_loo import gp_loo
from bayesgeo.fitting.model import model_inputs
from bayesgeo.common.validate import InputError


def make_fit(ds, *, covariance="matern32", transform=None, nugget=True, trend=0, draws=None, chains=2,
             ndraw=100, seed=0, spread=0.1, truth=None):
    """A fit tree in the layout of bayesgeo.fitting.posterior.fit, with draws scattered around ``truth``.

    ``truth`` (data units): practical_range, partial_sill, nugget, mean. ``draws`` overrides
    the standardised draws (dict of arrays shaped (chains, ndraw[, term])).
    """
    spec, y, design, _ = model_inputs(ds, covariance=covariance, nugget=nugget, trend=trend, transform=transform)
    rng = np.random.default_rng(seed)
    shape = (chains, ndraw)
    if draws is None:
        t = truth or {"practical_range": 0.3 * spec.distance_scale, "partial_sill": spec.value_sd**2,
                      "nugget": 0.1 * spec.value_sd**2, "mean": spec.value_mean}
        centre = {"practical_range_z": t["practical_range"] / spec.distance_scale,
                  "sd_z": math.sqrt(t["partial_sill"]) / spec.value_sd,
                  "nugget_sd_z": math.sqrt(t["nugget"]) / spec.value_sd}
        draws = {k: v * np.exp(spread * rng.standard_normal(shape)) for k, v in centre.items()}
        beta = np.zeros(shape + (len(spec.terms),))
        beta[..., 0] = (t["mean"] - spec.value_mean) / spec.value_sd
        draws["beta_z"] = beta + 0.05 * spread * rng.standard_normal(beta.shape)
    if not nugget:
        draws = {k: v for k, v in draws.items() if k != "nugget_sd_z"}
    coords = {"chain": np.arange(chains), "draw": np.arange(ndraw), "term": list(spec.terms)}
    post = xr.Dataset({k: (("chain", "draw", "term") if k == "beta_z" else ("chain", "draw"), v)
                       for k, v in draws.items()}, coords=coords)
    rows = {"row": ("obs", ds["row"].values)}
    observed = xr.Dataset({"value": ("obs", ds["value"].values)}, coords=rows)
    constant = xr.Dataset({"x": ("obs", ds["x"].values), "y": ("obs", ds["y"].values),
                           "design": (("obs", "term"), design.values)}, coords={**rows, "term": list(spec.terms)})
    tree = xr.DataTree.from_dict({"/posterior": post, "/observed_data": observed, "/constant_data": constant})
    settings = {"model": spec.to_dict(), "data": {"source_sha256": ds.attrs.get("source_sha256", "")}}
    tree.attrs = {"settings": json.dumps(settings)}
    return tree


def simulated(n=40, *, seed=3, covariance="matern32", practical_range=40.0, partial_sill=1.0, nugget=0.2,
              mean=2.0, log=False, side=100.0):
    """Points in a square of side ``side`` with a simulated Gaussian field (exp of it when ``log``)."""
    rng = np.random.default_rng(seed)
    xy = np.round(rng.random((n, 2)) * side, 3)
    z = simulate_field(xy, covariance=covariance, practical_range=practical_range, partial_sill=partial_sill,
                       nugget=nugget, mean=mean, rng=rng)
    v = np.exp(z) if log else z
    return points_dataset(xy[:, 0], xy[:, 1], v, attrs={"value_units": "mg/kg", "distance_units": "m",
                                                          "source_sha256": f"sha-{seed}"})


def _brute(fa, c, d, i):
    """Leave point i out and condition on the rest (numpy solve), on the standardised scale."""
    draws = fa.draws
    cov = get_covariance(fa.spec.covariance)
    k = covariance_matrix(fa.dist, cov, draws["practical_range_z"][c, d] / fa.spec.range_factor,
                          draws["sd_z"][c, d] ** 2, draws["nugget_sd_z"][c, d] ** 2)
    mu = fa.design @ draws["beta_z"][c, d]
    keep = np.arange(fa.n) != i
    w = np.linalg.solve(k[np.ix_(keep, keep)], k[keep, i])
    mean = mu[i] + w @ (fa.y[keep] - mu[keep])
    var = k[i, i] - k[i, keep] @ w
    return mean, var


def test_kernel_equals_conditioning_and_mvn_ratio():
    """gp_loo against brute force: p(y_i | y_-i) = N_n(y) / N_{n-1}(y_-i) with
    scipy.stats.multivariate_normal (definition of a conditional density), and the mean and
    variance against the explicit Gaussian conditional K_i,-i K_-i^-1 (Rasmussen and Williams 2006,
    eq. A.6)."""
    rng = np.random.default_rng(0)
    n = 12
    a = rng.standard_normal((n, n))
    k = a @ a.T + n * np.eye(n)
    r = rng.standard_normal(n)
    mean, var, logp = gp_loo(r, k)
    full = stats.multivariate_normal(np.zeros(n), k).logpdf(r)
    for i in range(n):
        keep = np.arange(n) != i
        rest = stats.multivariate_normal(np.zeros(n - 1), k[np.ix_(keep, keep)]).logpdf(r[keep])
        assert logp[i] == pytest.approx(full - rest, abs=1e-10)
        w = np.linalg.solve(k[np.ix_(keep, keep)], k[keep, i])
        assert mean[i] == pytest.approx(w @ r[keep], abs=1e-10)
        assert var[i] == pytest.approx(k[i, i] - k[i, keep] @ w, rel=1e-10)
        assert logp[i] == pytest.approx(stats.norm.logpdf(r[i], mean[i], math.sqrt(var[i])), abs=1e-10)


def test_kernel_batches_and_flags_non_positive_definite():
    """Leading draw dimensions are looped over; a covariance that is not positive definite (a
    negative eigenvalue, so no Cholesky factor exists) gives -inf densities for that draw."""
    rng = np.random.default_rng(1)
    n = 6
    a = rng.standard_normal((2, n, n))
    k = a @ np.swapaxes(a, 1, 2) + n * np.eye(n)
    r = rng.standard_normal((2, n))
    m, v, lp = gp_loo(r, k)
    for b in range(2):
        mb, vb, lb = gp_loo(r[b], k[b])
        np.testing.assert_allclose(lp[b], lb)
    bad = np.eye(n)
    bad[0, 0] = -1.0
    _, _, lp_bad = gp_loo(r[0], bad)
    assert np.all(lp_bad == -np.inf)
    with pytest.raises(ValueError, match="shape"):
        gp_loo(r, k[0])


def test_pointwise_equals_refits_in_data_units():
    """Every draw and point of pointwise_loo_loglik equals leaving the point out and conditioning
    the Gaussian on the other n - 1 points with the draw's parameters fixed, moved to data units by
    the change of variables z = m + s y (density divided by s): the reference density is
    scipy.stats.norm.logpdf of the measured value."""
    ds = simulated(30)
    tree = make_fit(ds, ndraw=8)
    fa = fit_arrays(tree)
    ll = pointwise_loo_loglik(tree)
    assert ll.dims == ("chain", "draw", "obs") and ll.name == "value"
    s, m0 = fa.spec.value_sd, fa.spec.value_mean
    for c, d, i in [(0, 0, 0), (0, 3, 7), (1, 5, 29), (1, 7, 13)]:
        mean, var = _brute(fa, c, d, i)
        ref = stats.norm.logpdf(ds["value"].values[i], m0 + s * mean, s * math.sqrt(var))
        assert float(ll[c, d, i]) == pytest.approx(ref, abs=1e-9)


def test_log_transform_jacobian_matches_lognormal():
    """Under transform="log" the density of the measured value is log-normal: the reference is
    scipy.stats.lognorm.logpdf(v, s=sd, scale=exp(mean)) of the leave-one-out normal on the log
    scale (log p(v) = log p(log v) - log v)."""
    ds = simulated(30, log=True, seed=8)
    tree = make_fit(ds, transform="log", ndraw=5)
    fa = fit_arrays(tree)
    ll = pointwise_loo_loglik(tree)
    s, m0 = fa.spec.value_sd, fa.spec.value_mean
    for c, d, i in [(0, 1, 2), (1, 4, 17)]:
        mean, var = _brute(fa, c, d, i)
        ref = stats.lognorm.logpdf(ds["value"].values[i], s=s * math.sqrt(var), scale=math.exp(m0 + s * mean))
        assert float(ll[c, d, i]) == pytest.approx(ref, abs=1e-9)


def test_change_of_units_shifts_density_by_log_factor():
    """Measuring in units ten times smaller multiplies every value by 10 and divides each density
    by 10 (change of variables): the same standardised draws give log densities lower by log(10)."""
    ds = simulated(25, seed=4)
    scaled = ds.copy()
    scaled["value"] = ds["value"] * 10.0
    base = make_fit(ds, ndraw=4, seed=1)
    draws = {k: base["posterior"][k].values for k in ("practical_range_z", "sd_z", "nugget_sd_z", "beta_z")}
    other = make_fit(scaled, ndraw=4, draws=draws)
    diff = pointwise_loo_loglik(other) - pointwise_loo_loglik(base)
    np.testing.assert_allclose(diff.values, -math.log(10.0), atol=1e-9)


def test_predictive_mean_and_sd_in_model_units():
    """loo_mean and loo_sd equal the brute-force conditional moments rescaled by z = m + s y."""
    ds = simulated(20, seed=5)
    tree = make_fit(ds, ndraw=3)
    fa = fit_arrays(tree)
    pred = loo_predictive(tree)
    mean, var = _brute(fa, 1, 2, 4)
    assert float(pred["loo_mean"][1, 2, 4]) == pytest.approx(fa.spec.value_mean + fa.spec.value_sd * mean, rel=1e-10)
    assert float(pred["loo_sd"][1, 2, 4]) == pytest.approx(fa.spec.value_sd * math.sqrt(var), rel=1e-10)
    assert list(pred["row"].values) == list(ds["row"].values)


def test_no_nugget_fit():
    """A fit without nugget: the covariance is sigma^2 R + jitter I (bayesgeo.gp.dense.JITTER),
    checked against scipy.stats.multivariate_normal's conditional density ratio."""
    ds = simulated(20, seed=6, nugget=0.0)
    tree = make_fit(ds, nugget=False, ndraw=2)
    fa = fit_arrays(tree)
    assert "nugget_sd_z" not in tree["posterior"]
    ll = pointwise_loo_loglik(tree)
    cov = get_covariance("matern32")
    k = covariance_matrix(fa.dist, cov, fa.draws["practical_range_z"][0, 1] / fa.spec.range_factor,
                          fa.draws["sd_z"][0, 1] ** 2, 0.0)
    r = fa.y - fa.design @ fa.draws["beta_z"][0, 1]
    keep = np.arange(fa.n) != 3
    ref = (stats.multivariate_normal(np.zeros(fa.n), k).logpdf(r)
           - stats.multivariate_normal(np.zeros(fa.n - 1), k[np.ix_(keep, keep)]).logpdf(r[keep])
           - math.log(fa.spec.value_sd))
    assert float(ll[0, 1, 3]) == pytest.approx(ref, abs=1e-7)


def test_add_log_likelihood_group_and_psis_loo():
    """add_log_likelihood returns a new tree whose log_likelihood group arviz.loo reads. With every
    draw equal to 1e-7 (nearly a point-mass posterior) the importance weights are uniform and PSIS-LOO's elpd is
    exactly the sum of the pointwise exact LOO densities (Vehtari, Gelman and Gabry 2017, eq. 10).
    With varied draws it agrees with the plain importance-sampling estimate
    sum_i -log mean_s exp(-log p_is) (Gelfand 1996; Vehtari et al. 2017, eq. 9) when all Pareto k
    are small."""
    import arviz as az

    ds = simulated(40, seed=2)
    fixed = make_fit(ds, ndraw=60, spread=1e-7)
    out = add_log_likelihood(fixed)
    assert "log_likelihood" not in fixed.children  # input untouched
    assert list(out["log_likelihood"].data_vars) == ["value"]
    res = az.loo(out, pointwise=True)
    exact = float(pointwise_loo_loglik(fixed)[0, 0].sum())
    assert res.elpd == pytest.approx(exact, abs=1e-4)

    varied = add_log_likelihood(make_fit(ds, ndraw=300, spread=0.1, seed=9))
    res = az.loo(varied, pointwise=True)
    ll = varied["log_likelihood"]["value"].values.reshape(-1, ds.sizes["obs"])
    raw_is = float(np.sum(-(np.logaddexp.reduce(-ll, axis=0) - math.log(ll.shape[0]))))
    assert float(res.pareto_k.max()) < 0.5
    assert res.elpd == pytest.approx(raw_is, abs=0.05)


def test_missing_pieces_are_input_errors():
    """A tree without settings, or without the sampled variables, is refused with InputError."""
    ds = simulated(15, seed=7)
    tree = make_fit(ds, ndraw=2)
    bare = tree.copy()
    bare.attrs = {}
    with pytest.raises(InputError, match="not a bayesgeo fit"):
        fit_arrays(bare)
    nopost = tree.copy()
    nopost["posterior"] = xr.DataTree(tree["posterior"].to_dataset().drop_vars("sd_z"))
    with pytest.raises(InputError, match="sd_z"):
        fit_arrays(nopost)


# --- several-site fits --------------------------------------------------------------------------


def simulated_sites(sizes=(12, 14, 10), *, seed=11, log=False, offsets=(0.0, 1.0, -0.5)):
    """Several sites (labels s0, s1, ...), each a square of side 100 m placed apart, with its own field."""
    rng = np.random.default_rng(seed)
    xs, ys, vals, labels = [], [], [], []
    for k, n in enumerate(sizes):
        xy = np.round(rng.random((n, 2)) * 100.0, 3) + [1000.0 * k, 0.0]
        z = simulate_field(xy, covariance="matern32", practical_range=40.0 + 10 * k, partial_sill=1.0,
                           nugget=0.2, mean=2.0 + offsets[k % len(offsets)], rng=rng)
        xs.append(xy[:, 0])
        ys.append(xy[:, 1])
        vals.append(np.exp(z) if log else z)
        labels += [f"s{k}"] * n
    return points_dataset(np.concatenate(xs), np.concatenate(ys), np.concatenate(vals), site=np.array(labels),
                          attrs={"value_units": "mg/kg", "distance_units": "m", "source_sha256": f"sites-{seed}"})


def make_site_fit(ds, *, pooling="hierarchical", covariance="matern32", transform=None, nugget=True, chains=2,
                  ndraw=50, seed=0, spread=0.1, beta_draws=None):
    """A several-site fit tree in the layout of bayesgeo.fitting.hierarchical.fit_sites, from chosen draws.

    Per-site draws scatter (log-normally, ``spread``) around a practical range of 0.4 D, a
    partial sill of 1 and a nugget of 0.2 (standardised scale); ``beta_draws`` (chain, draw, site,
    term) overrides the trend coefficients. Population variables are drawn around the same values
    so that bayesgeo.fitting.hier_outputs.add_derived and new_site_draws run as after sampling.
    """
    from bayesgeo.fitting.hier_outputs import add_derived, new_site_draws
    from bayesgeo.fitting.site_inputs import site_inputs

    spec, data = site_inputs(ds, covariance=covariance, nugget=nugget, transform=transform, pooling=pooling)
    rng = np.random.default_rng(seed)
    ns, nt = len(spec.sites), len(spec.terms)
    shape = (chains, ndraw)

    def jitter(centre, extra=()):
        return centre * np.exp(spread * rng.standard_normal(shape + tuple(extra)))

    post = {"practical_range_z": jitter(0.4, (ns,)), "sd_z": jitter(1.0, (ns,))}
    if pooling == "complete":
        post = {k: np.repeat(v[..., :1], ns, axis=-1) for k, v in post.items()}
    if nugget:
        post["nugget_sd_z"] = jitter(math.sqrt(0.2), (ns,))
    if beta_draws is None:
        means = np.array([[np.mean(d.y)] + [0.0] * (nt - 1) for d in data])
        beta_draws = means + 0.05 * rng.standard_normal(shape + (ns, nt))
    post["beta_z"] = beta_draws
    dims = {"beta_z": ("chain", "draw", "site", "term")}
    if pooling == "hierarchical":
        post.update(population_range_z=jitter(0.4), range_site_sd=jitter(0.2), population_sd_z=jitter(1.0),
                    sill_site_sd=jitter(0.2), nugget_logit_mu=np.log(0.2) + 0.1 * rng.standard_normal(shape),
                    nugget_site_sd=jitter(0.2), beta_mu_z=jitter(0.1, (nt,)))
        dims["beta_mu_z"] = ("chain", "draw", "term")
    coords = {"chain": np.arange(chains), "draw": np.arange(ndraw), "site": list(spec.sites),
              "term": list(spec.terms)}
    posterior = xr.Dataset({k: (dims.get(k, ("chain", "draw", "site") if np.ndim(v) == 3 else ("chain", "draw")), v)
                            for k, v in post.items()}, coords=coords)
    posterior = add_derived(posterior, spec)
    site_of = np.asarray(ds["site"].values).astype(str)
    rows = np.asarray(ds["row"].values)
    obs_coords = {"row": ("obs", rows), "site": ("obs", site_of)}
    observed = xr.Dataset({"value": ("obs", np.asarray(ds["value"].values, float))}, coords=obs_coords)
    design = np.zeros((ds.sizes["obs"], nt))
    for one in data:
        design[np.isin(rows, one.rows) & (site_of == one.label)] = one.design
    constant = xr.Dataset({"x": ("obs", ds["x"].values), "y": ("obs", ds["y"].values),
                           "design": (("obs", "term"), design)}, coords={**obs_coords, "term": list(spec.terms)})
    groups = {"/posterior": posterior, "/observed_data": observed, "/constant_data": constant}
    if pooling != "independent":
        groups["/new_site"] = new_site_draws(posterior, spec, seed=seed)
    tree = xr.DataTree.from_dict(groups)
    settings = {"format": "bayesgeo several-site fit", "format_version": 1, "model": spec.to_dict(),
                "sampler": {"seed": seed, "chains": chains, "draws": ndraw},
                "data": {"source_sha256": ds.attrs.get("source_sha256", "")}}
    tree.attrs = {"settings": json.dumps(settings), "pooling": pooling}
    return tree


def _matern32_block(xy, practical_range_z, sd_z, nugget_sd_z, distance_scale, range_factor):
    """One site's covariance from scikit-learn's Matern kernel (nu = 1.5), standardised scale.

    bayesgeo writes Matérn 3/2 as (1 + d/phi) exp(-d/phi); scikit-learn as
    (1 + sqrt(3) d/l) exp(-sqrt(3) d/l), so l = sqrt(3) phi, with phi = practical range / range_factor.
    The diagonal carries the nugget and bayesgeo.gp.dense.JITTER (1e-6 of the partial sill).
    """
    from sklearn.gaussian_process.kernels import Matern

    from bayesgeo.gp.dense import JITTER

    phi = practical_range_z / range_factor
    k = sd_z**2 * Matern(length_scale=math.sqrt(3.0) * phi, nu=1.5)(xy / distance_scale)
    return k + (nugget_sd_z**2 + JITTER * sd_z**2) * np.eye(len(xy))


def test_site_loo_equals_block_diagonal_conditioning():
    """Several sites: every draw's leave-one-out density of a point equals brute-force Gaussian
    conditioning on ALL other points (every site) under the block-diagonal covariance of the whole
    data set: log N_n(y) - log N_{n-1}(y_-i) with scipy.stats.multivariate_normal, covariance
    blocks from scikit-learn's Matern kernel (nu = 1.5), moved to data units under the log
    transform (log p(v) = log p(z) - log s - log v, change of variables). Also the Matérn 3/2
    practical-range factor 4.744 (published check value, /work FACTS: Matérn 3/2 in the d/phi
    form reaches correlation 0.05 at 4.744 phi)."""
    from scipy.linalg import block_diag

    from bayesgeo.fitting.arrays import site_fit_arrays

    ds = simulated_sites((11, 13, 10), log=True, seed=21)
    tree = make_site_fit(ds, pooling="hierarchical", transform="log", ndraw=4, spread=0.3)
    sfa = site_fit_arrays(tree)
    spec = sfa.spec
    assert spec.range_factor == pytest.approx(4.744, abs=1e-3)
    ll = pointwise_loo_loglik(tree)
    assert ll.dims == ("chain", "draw", "obs") and ll.shape[-1] == ds.sizes["obs"]
    post = tree["posterior"]
    z = np.log(ds["value"].values)
    y = (z - spec.value_mean) / spec.value_sd
    order = np.concatenate([sfa.index[s] for s in spec.sites])
    for c, d in [(0, 0), (1, 3)]:
        blocks, mu = [], np.empty(ds.sizes["obs"])
        for k, s in enumerate(spec.sites):
            idx = sfa.index[s]
            blocks.append(_matern32_block(sfa.xy[idx], float(post["practical_range_z"][c, d, k]),
                                          float(post["sd_z"][c, d, k]), float(post["nugget_sd_z"][c, d, k]),
                                          spec.distance_scale, spec.range_factor))
            mu[idx] = sfa.blocks[s].design @ post["beta_z"].values[c, d, k]
        cov = np.empty((ds.sizes["obs"],) * 2)
        cov[np.ix_(order, order)] = block_diag(*blocks)
        r = y - mu
        full = stats.multivariate_normal(np.zeros(len(r)), cov).logpdf(r)
        for i in (0, 12, 20, 33):
            keep = np.arange(len(r)) != i
            rest = stats.multivariate_normal(np.zeros(len(r) - 1), cov[np.ix_(keep, keep)]).logpdf(r[keep])
            ref = full - rest - math.log(spec.value_sd) - z[i]
            assert float(ll[c, d, i]) == pytest.approx(ref, abs=1e-7)


def test_site_psis_loo_equals_exact_refits():
    """PSIS-LOO of a several-site fit against exact refits without each point. Covariance
    parameters are held fixed and each site's level has a N(0, b^2) prior, so the posterior of the
    levels is Gaussian (conjugate; Rasmussen and Williams 2006, sec. 2.7) and is sampled exactly
    here (no MCMC). Refitting without point i and predicting it has a closed form: with the level
    integrated out, y_s ~ N(0, C_s + b^2 1 1^T), so log p(y_i | y_-i) is the scipy.stats
    multivariate-normal ratio over the site's points alone. The PSIS estimate (arviz.loo through
    bayesgeo.checks.modelcheck.fit_loo; Vehtari, Gelman and Gabry 2017) must agree with the sum of the
    refits within Monte Carlo error, in total and per site (over seeds 3-7 of the level draws the
    total differed by -0.035 to +0.019 and each site by at most 0.018: tolerances 0.08 and 0.05)."""
    from bayesgeo.fitting.arrays import site_fit_arrays
    from bayesgeo.checks.modelcheck import fit_loo

    ds = simulated_sites((12, 10, 14), seed=5)
    base = make_site_fit(ds, pooling="independent", ndraw=2, spread=0.0)
    sfa = site_fit_arrays(base)
    spec = sfa.spec
    b = 1.0
    rng = np.random.default_rng(3)
    chains, ndraw = 2, 1000
    beta = np.empty((chains, ndraw, len(spec.sites), 1))
    refit = np.empty(ds.sizes["obs"])
    post = base["posterior"]
    for k, s in enumerate(spec.sites):
        fa = sfa.blocks[s]
        c = _matern32_block(fa.xy, float(post["practical_range_z"][0, 0, k]), float(post["sd_z"][0, 0, k]),
                            float(post["nugget_sd_z"][0, 0, k]), spec.distance_scale, spec.range_factor)
        one = np.ones(fa.n)
        cinv_1, cinv_y = np.linalg.solve(c, one), np.linalg.solve(c, fa.y)
        prec = one @ cinv_1 + 1.0 / b**2
        beta[:, :, k, 0] = (one @ cinv_y) / prec + rng.standard_normal((chains, ndraw)) / math.sqrt(prec)
        marg = c + b**2 * np.outer(one, one)
        full = stats.multivariate_normal(np.zeros(fa.n), marg).logpdf(fa.y)
        for j in range(fa.n):
            keep = np.arange(fa.n) != j
            rest = stats.multivariate_normal(np.zeros(fa.n - 1), marg[np.ix_(keep, keep)]).logpdf(fa.y[keep])
            refit[sfa.index[s][j]] = full - rest - math.log(spec.value_sd)
    tree = make_site_fit(ds, pooling="independent", chains=chains, ndraw=ndraw, spread=0.0, beta_draws=beta)
    res = fit_loo(tree)
    assert float(np.max(res.pareto_k)) < 0.7
    assert res.elpd == pytest.approx(refit.sum(), abs=0.08)
    elpd_i = np.asarray(res.elpd_i)
    for s in spec.sites:
        assert elpd_i[sfa.index[s]].sum() == pytest.approx(refit[sfa.index[s]].sum(), abs=0.05)


def test_site_fit_arrays_refuses_what_is_not_a_site_fit():
    """A single-site fit is not a several-site fit; a several-site fit whose observed data lost
    the site labels is refused with a one-line InputError."""
    from bayesgeo.fitting.arrays import any_fit_arrays, is_site_fit, site_fit_arrays

    single = make_fit(simulated(15, seed=7), ndraw=2)
    assert not is_site_fit(single)
    assert any_fit_arrays(single).n == 15
    with pytest.raises(InputError, match="several-site"):
        site_fit_arrays(single)
    tree = make_site_fit(simulated_sites(), ndraw=4)
    assert is_site_fit(tree)
    bare = tree.copy()
    bare["observed_data"] = xr.DataTree(tree["observed_data"].to_dataset().drop_vars("site"))
    with pytest.raises(InputError, match="site labels"):
        site_fit_arrays(bare)
