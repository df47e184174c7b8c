"""Tests of the several-site model (bayesgeo.fitting.hierarchical, bayesgeo.fitting.hier_outputs, bayesgeo.cli._sites).

The sampled fits are small (3 sites, 40 + 40 + 12 points, 2 chains x 300 draws) and shared by the
tests through a module-scoped fixture; larger runs are marked slow.
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
from bayesgeo.common.validate import InputError
from bayesgeo.predict.maps import predict_map

#: Known population (log scale of the values; practical range in m) the test sites are drawn from.
TRUTH = {"range_median": 60.0, "range_sd": 0.3, "sill_median": 1.0, "sill_sd": 0.25, "nugget_ratio": 0.15,
         "mean": 5.0, "mean_sd": 0.5}


def _sites(sizes, seed=11, side=100.0, covariance="matern32"):
    """Points of several sites, each a square of ``side`` m, parameters drawn from TRUTH."""
    rng = np.random.default_rng(seed)
    xs, ys, vs, ss, truth = [], [], [], [], {}
    for k, n in enumerate(sizes):
        xy = np.round(rng.random((n, 2)) * side + [2000.0 * k, 0.0], 2)
        prange = TRUTH["range_median"] * math.exp(TRUTH["range_sd"] * rng.standard_normal())
        psill = TRUTH["sill_median"] * math.exp(TRUTH["sill_sd"] * rng.standard_normal())
        nug = TRUTH["nugget_ratio"] / (1 - TRUTH["nugget_ratio"]) * psill
        mu = TRUTH["mean"] + TRUTH["mean_sd"] * rng.standard_normal()
        v = simulate_field(xy, covariance=covariance, practical_range=prange, partial_sill=psill, nugget=nug,
                           mean=mu, rng=rng)
        xs.append(xy[:, 0]), ys.append(xy[:, 1]), vs.append(v)
        ss += [f"P{k + 1}"] * n
        truth[f"P{k + 1}"] = {"practical_range": prange, "partial_sill": psill, "nugget": nug}
    ds = points_dataset(np.concatenate(xs), np.concatenate(ys), np.concatenate(vs), site=np.array(ss),
                        attrs={"distance_units": "m", "value_units": "log(mg/kg)", "source": "simulated.csv"})
    return ds, truth


SAMPLE = dict(chains=2, draws=300, tune=300, seed=5)


@pytest.fixture(scope="module")
def fits():
    from bayesgeo.fitting.hierarchical import fit_sites

    ds, truth = _sites([40, 40, 12])
    hier = fit_sites(ds, pooling="hierarchical", **SAMPLE)
    indep = fit_sites(ds, pooling="independent", **SAMPLE)
    return ds, truth, hier, indep


# --- no sampling ---------------------------------------------------------------------------------


def _simple_kriging_mean(data, new, params):
    """Simple-kriging mean of the first draw at ``new`` from one site's ``data`` (Matérn 3/2), written
    out with numpy (Cressie 1993, eq. 3.4.57): b0 + c0' K^-1 (z - b0)."""
    cov = get_covariance("matern32")
    xy = np.column_stack([data["x"].values, data["y"].values])
    scale, s2, t2 = (float(np.ravel(params[k].values)[0]) for k in ("scale", "partial_sill", "nugget"))
    b0 = float(np.ravel(params["beta"].values)[0])
    d = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
    k = s2 * cov.correlation(d, scale) + (t2 + 1e-6 * s2) * np.eye(len(xy))
    c0 = s2 * cov.correlation(np.hypot(*(new[:, None, :] - xy[None, :, :]).transpose(2, 0, 1)), scale)
    return b0 + c0 @ np.linalg.solve(k, data["value"].values - b0)


def test_small_site_is_an_error_naming_site_and_rows():
    """A site with fewer than MIN_POINTS = 10 points: InputError naming the site and its rows (the
    input-check rule of this project); with small_sites="keep" it is kept with a warning."""
    from bayesgeo.fitting.hierarchical import build_site_model
    from bayesgeo.fitting.site_inputs import site_inputs

    ds, _ = _sites([20, 6], seed=3)
    with pytest.raises(InputError, match=r"site 'P2' has only 6 points \(rows 22, 23, 24, 25, 26, 27\).*--small-sites keep"):
        build_site_model(ds)
    with pytest.warns(UserWarning, match="site 'P2' has only 6 points.*borrows strength"):
        spec, data = site_inputs(ds, small_sites="keep")
    assert spec.small_sites == ("P2",) and spec.n == (20, 6)
    assert any("P2" in w for w in spec.warnings)
    tiny, _ = _sites([20, 2], seed=3)
    with pytest.raises(InputError, match="site 'P2' has only 2 points.*at least 3"):
        site_inputs(tiny, small_sites="keep")
    with pytest.raises(InputError, match="^pooling"):
        site_inputs(ds, pooling="partial")


def test_common_standardisation():
    """Common scale (docs/hierarchical.md): m = mean of all values, s^2 = pooled within-site residual
    variance sum RSS_s / sum (n_s - p), D = median of the per-site largest distances (checked with
    numpy and scipy.spatial.distance.pdist); with one site these are the single-site constants of
    bayesgeo.fitting.model.model_inputs."""
    from scipy.spatial.distance import pdist

    from bayesgeo.fitting.site_inputs import site_inputs
    from bayesgeo.fitting.model import model_inputs

    ds, _ = _sites([30, 25, 15], seed=4)
    spec, data = site_inputs(ds)
    z = ds["value"].values
    groups = [z[ds["site"].values == s] for s in ("P1", "P2", "P3")]
    pooled = sum(((g - g.mean()) ** 2).sum() for g in groups) / sum(len(g) - 1 for g in groups)
    assert spec.value_mean == pytest.approx(z.mean())
    assert spec.value_sd == pytest.approx(math.sqrt(pooled))
    ext = [pdist(np.column_stack([ds["x"].values, ds["y"].values])[ds["site"].values == s]).max()
           for s in ("P1", "P2", "P3")]
    assert spec.distance_scale == pytest.approx(np.median(ext))
    np.testing.assert_allclose(data[1].y, (groups[1] - z.mean()) / math.sqrt(pooled))
    one = ds.isel(obs=np.flatnonzero(ds["site"].values == "P1"))
    s1, _ = site_inputs(one)
    single, *_ = model_inputs(one.drop_vars("site"))
    assert (s1.value_mean, s1.value_sd, s1.distance_scale) == pytest.approx(
        (single.value_mean, single.value_sd, single.distance_scale))
    assert s1.rates == pytest.approx({k: single.rates[k] for k in ("range", "sd")})


@pytest.mark.parametrize("pooling", ["hierarchical", "independent", "complete"])
def test_likelihood_is_sum_of_site_blocks(pooling):
    """The model's log-likelihood is the sum over sites of one multivariate normal each, with that
    site's own parameters and distances (sites independent given the parameters), checked against
    scipy.stats.multivariate_normal.logpdf with K = sigma2 R + (tau2 + 1e-6 sigma2) I (likelihood.py
    jitter policy). Under complete pooling the covariance parameters are equal across sites."""
    import pymc as pm

    from bayesgeo.fitting.hierarchical import build_site_model
    from bayesgeo.fitting.site_inputs import site_inputs

    ds, _ = _sites([15, 12, 11], seed=8)
    model, spec = build_site_model(ds, pooling=pooling, trend=1)
    _, data = site_inputs(ds, pooling=pooling, trend=1)
    rng = np.random.default_rng(0)
    point = {k: v + 0.3 * rng.standard_normal(np.shape(v)) for k, v in model.initial_point().items()}
    pots = [model[f"loglik_{i}"] for i in range(3)]
    outs = [model["practical_range_z"], model["sd_z"], model["nugget_sd_z"], model["beta_z"], *pots]
    fn = model.compile_fn(model.replace_rvs_by_values(outs), inputs=model.value_vars, mode="FAST_COMPILE",
                          on_unused_input="ignore")
    r, sd, tau, beta, *ll = fn(point)
    cov = get_covariance("matern32")
    for i, d in enumerate(data):
        k = sd[i] ** 2 * cov.correlation(d.dist, r[i] / cov.range_factor)
        k[np.diag_indices_from(k)] += tau[i] ** 2 + 1e-6 * sd[i] ** 2
        ref = stats.multivariate_normal(mean=d.design @ beta[i], cov=k).logpdf(d.y)
        assert ll[i] == pytest.approx(ref, rel=1e-8, abs=1e-8)
    if pooling == "complete":
        assert np.ptp(r) == 0 and np.ptp(sd) == 0 and np.ptp(tau) == 0
    else:
        assert np.ptp(r) > 0
    assert isinstance(model, pm.Model)


def test_spec_round_trip():
    """SiteSpec.to_dict/from_dict invert each other through JSON (internal consistency)."""
    from bayesgeo.fitting.site_inputs import SiteSpec, site_inputs

    ds, _ = _sites([15, 12], seed=2)
    spec, _ = site_inputs(ds, trend=1)
    again = SiteSpec.from_dict(json.loads(spec.to_json()))
    assert again.to_dict() == spec.to_dict()
    assert again.fit_spec("P2").n == 12


# --- sampled fits --------------------------------------------------------------------------------


def test_population_intervals_cover_truth(fits):
    """Sites simulated from a known population (bayesgeo.data.demo.simulate_field): the 98% posterior
    intervals of the population median practical range, median partial sill and median nugget ratio
    cover the true values (a calibrated posterior covers the truth with the stated probability; with
    three checks at 98% a correct model fails about 6% of seeds; the seed here is fixed)."""
    _, _, hier, _ = fits
    post = hier["posterior"].to_dataset()
    for name, true in (("population_practical_range_median", TRUTH["range_median"]),
                       ("population_partial_sill_median", TRUTH["sill_median"]),
                       ("population_nugget_ratio_median", TRUTH["nugget_ratio"])):
        lo, hi = np.quantile(post[name].values, [0.01, 0.99])
        assert lo < true < hi, (name, lo, true, hi)
    assert post["practical_range"].attrs["units"] == "m"
    assert post["partial_sill"].attrs["units"] == "(log(mg/kg))^2"


def test_small_site_borrows_strength(fits):
    """Partial pooling narrows the interval of a data-poor group (Gelman et al. 2013, Bayesian Data
    Analysis, 3rd ed., ch. 5): the 12-point site's 90% interval of the practical range and of the
    partial sill is narrower in the hierarchical fit than in the independent one."""
    from bayesgeo.fitting.shrinkage import shrinkage_table

    _, _, hier, indep = fits
    tab = shrinkage_table(hier, indep)
    assert tab["n"].sel(site="P3") == 12
    ratio = tab["width_ratio"].sel(site="P3")
    assert float(ratio.sel(parameter="practical_range")) < 1.0
    assert float(ratio.sel(parameter="partial_sill")) < 1.0
    ind = indep["posterior"]["practical_range"].sel(site="P3").quantile([0.05, 0.95]).values
    np.testing.assert_allclose(tab["independent_low"].sel(site="P3", parameter="practical_range"), ind[0])


def test_convergence_check_covers_every_site_parameter(fits):
    """bayesgeo.convergence.diagnostics.check_convergence reports R-hat and ESS (Vehtari et al. 2021) for every
    element of every site-level variable and every hyperparameter of the hierarchical fit."""
    from bayesgeo.convergence.diagnostics import check_convergence

    _, _, hier, _ = fits
    conv = check_convergence(hier)
    labels = {str(p) for p in conv.parameters["parameter"].values}
    for site in ("P1", "P2", "P3"):
        for v in ("practical_range", "partial_sill", "nugget", "range_u", "sill_u", "nugget_u"):
            assert f"{v}[{site}]" in labels
    for v in ("population_range_z", "range_site_sd", "population_sd_z", "sill_site_sd", "nugget_logit_mu",
              "nugget_site_sd", "population_practical_range_median"):
        assert v in labels
    assert np.all(np.isfinite(conv.parameters["rhat"].values))
    assert conv.verdict in ("pass", "warn", "fail")


def test_derived_and_population_algebra(fits):
    """Derived variables in data units equal the standardised draws rescaled (practical range = D r,
    partial sill = s^2 sd_z^2, nugget ratio = tau2 / (sigma2 + tau2)); the population mean of a
    log-normal is median exp(s^2 / 2) (standard result, checked here by Monte Carlo per draw); the
    new-site draws are reproducible from the seed and their mean matches the population mean (law of
    total expectation, Monte Carlo tolerance 15%)."""
    from bayesgeo.fitting.hier_outputs import new_site_draws
    from bayesgeo.fitting.site_inputs import site_spec

    _, _, hier, _ = fits
    spec = site_spec(hier)
    post = hier["posterior"].to_dataset()
    np.testing.assert_allclose(post["practical_range"], post["practical_range_z"] * spec.distance_scale)
    np.testing.assert_allclose(post["partial_sill"], post["sd_z"] ** 2 * spec.value_sd**2)
    np.testing.assert_allclose(post["nugget_ratio"], post["nugget"] / (post["nugget"] + post["partial_sill"]))
    rng = np.random.default_rng(1)
    med = post["population_practical_range_median"].values.ravel()[:50]
    sr = post["range_site_sd"].values.ravel()[:50]
    mc = (med[:, None] * np.exp(sr[:, None] * rng.standard_normal((50, 20000)))).mean(axis=1)
    np.testing.assert_allclose(post["population_practical_range_mean"].values.ravel()[:50], mc, rtol=0.03)
    new = hier["new_site"].to_dataset()
    again = new_site_draws(post, spec, seed=SAMPLE["seed"])
    xr.testing.assert_allclose(new["practical_range"], again["practical_range"])
    assert float(new["practical_range"].mean()) == pytest.approx(
        float(post["population_practical_range_mean"].mean()), rel=0.15)


def test_site_fit_has_single_site_layout(fits):
    """site_fit gives one site's draws in the layout of bayesgeo.fitting.posterior (same variable names, no
    site dim, single-site settings readable by bayesgeo.fitting.posterior.fit_spec) (internal contract)."""
    from bayesgeo.fitting.hierarchical import site_fit
    from bayesgeo.fitting.posterior import fit_spec

    _, _, hier, _ = fits
    one = site_fit(hier, "P3")
    post = one["posterior"].to_dataset()
    assert "site" not in post.dims
    for v in ("practical_range_z", "sd_z", "nugget_sd_z", "beta_z", "practical_range", "partial_sill", "nugget"):
        assert v in post
    np.testing.assert_array_equal(post["practical_range"].values,
                                  hier["posterior"]["practical_range"].sel(site="P3").values)
    spec = fit_spec(one)
    assert spec.n == 12 and spec.terms == ("1",)
    assert one["constant_data"]["x"].size == 12 and one["observed_data"]["value"].size == 12
    with pytest.raises(InputError, match="site 'P9' is not in this fit"):
        site_fit(hier, "P9")


def test_fit_object_gives_a_view_per_site(fits):
    """bayesgeo.Fit over a several-site fit: several, its sites, and .site(name) is the single-site view of
    site_fit (same draws), marked with the site it came from; without a name, with an unknown one, or
    predicting the whole fit, one InputError naming the argument and the sites (internal contract)."""
    from bayesgeo.fitting.fitted import Fit
    from bayesgeo.fitting.hierarchical import site_fit

    _, _, hier, _ = fits
    fit = Fit(hier)
    assert fit.several and fit.sites == ("P1", "P2", "P3") and fit.spec.pooling == "hierarchical"
    one = fit.site("P3")
    assert not one.several and one.extracted_site == "P3" and one.spec.n == 12
    np.testing.assert_array_equal(one.posterior["partial_sill"].values,
                                  site_fit(hier, "P3")["posterior"]["partial_sill"].values)
    assert one.site("P3") is one
    with pytest.raises(InputError, match=r"^site: a several-site fit; choose a site \(P1, P2, P3\)"):
        fit.site(None)
    with pytest.raises(InputError, match="site 'P9' is not in this fit"):
        fit.site("P9")
    with pytest.raises(InputError, match=r"^fit: a several-site fit"):
        predict_map(fit, cell=50.0)
    assert set(fit.summary()["site"]) >= {"P1", "P2", "P3"}


def test_save_report_and_load(fits, tmp_path):
    """Outputs: posterior.nc, summary.csv, summary.txt, fit.json, shrinkage.csv/png, design.csv/png
    written atomically, refused when present (project rule), loaded back unchanged; the report carries
    sites, population, new_site and cautions that defer to local regulation."""
    from bayesgeo.data.design import design_table
    from bayesgeo.fitting.fitted import Fit
    from bayesgeo.fitting.fitfile import save_fit
    from bayesgeo.fitting.shrinkage import shrinkage_table
    from bayesgeo.fitting.hier_outputs import site_report

    _, _, hier, indep = fits
    shrink = shrinkage_table(hier, indep)
    design = design_table(hier["new_site"].to_dataset(), max_draws=60, distance_units="m")
    out = tmp_path / "fit"
    save_fit(hier, out, shrinkage=shrink, design=design)
    for f in ("posterior.nc", "summary.csv", "summary.txt", "fit.json", "shrinkage.csv", "shrinkage.png",
              "design.csv", "design.png"):
        assert (out / f).stat().st_size > 0, f
    with pytest.raises(InputError, match="already exists"):
        save_fit(hier, out)
    back = Fit.read(out).tree
    np.testing.assert_array_equal(back["posterior"]["practical_range"].values, hier["posterior"]["practical_range"].values)
    rep = json.loads((out / "fit.json").read_text())
    assert set(rep["sites"]) == {"P1", "P2", "P3"}
    assert {"practical_range", "partial_sill", "nugget", "total_sill"} <= set(rep["sites"]["P1"]["parameters"])
    assert {"q05", "q50", "q95", "mean", "sd"} <= set(rep["parameters"]["practical_range"])
    assert "population_practical_range_median" in rep["population"]
    assert "practical_range" in rep["new_site"]
    assert any("regulat" in c for c in rep["cautions"]) and any("professional" in c for c in rep["cautions"])
    assert len(rep["shrinkage"]) == 6 and len(rep["design"]["rows"]) == 16
    assert site_report(hier)["model"]["n"] == 92
    lines = (out / "summary.csv").read_text().splitlines()
    assert lines[0].startswith("site,parameter,mean,sd,q05,q50,q95")
    assert len(lines) > 3 * 6


# --- slow: single-site reduction and the command line ---------------------------------------------


@pytest.mark.slow
def test_single_site_reduces_to_single_site_fit():
    """With one site the hierarchical model's population-location priors are the single-site PC priors
    (Fuglstad et al. 2019) and only the between-site spreads (HalfNormal(0.5) on log scales) and the
    nugget parametrisation differ, so on 120 points its practical range and partial sill quantiles
    (5%, 50%, 95%) agree with bayesgeo.fitting.posterior.fit within 25% (Monte Carlo error of ~1,000 draws plus
    that small prior difference; tolerance chosen, not published)."""
    from bayesgeo.fitting.hierarchical import fit_sites
    from bayesgeo.fitting.posterior import fit

    ds, _ = _sites([120], seed=21)
    kw = dict(chains=2, draws=600, tune=600, seed=3)
    one = fit(ds.drop_vars("site"), **kw)
    hier = fit_sites(ds, pooling="hierarchical", **kw)
    for name in ("practical_range", "partial_sill"):
        a = np.quantile(one["posterior"][name].values, [0.05, 0.5, 0.95])
        b = np.quantile(hier["posterior"][name].sel(site="P1").values, [0.05, 0.5, 0.95])
        np.testing.assert_allclose(b, a, rtol=0.25, err_msg=name)


@pytest.mark.slow
def test_cli_run_sites_json(tmp_path, capsys):
    """`bayesgeo fit DATA --site COL` (the several-site branch of bayesgeo.stages.fit.fit_folder): exactly one
    JSON object on stdout with the single-site keys plus sites, population, new_site, shrinkage, design and
    cautions; the folder holds the promised files (project contract with cli/fit.py)."""
    from bayesgeo.cli import main

    ds, _ = _sites([25, 20], seed=6)
    csv = tmp_path / "pts.csv"
    with csv.open("w") as fh:
        fh.write("parcel,x,y,arsenic\n")
        for s, x, y, v in zip(ds["site"].values, ds["x"].values, ds["y"].values, ds["value"].values):
            fh.write(f"{s},{x},{y},{v}\n")
    status = main(["fit", str(csv), "--site", "parcel", "--value", "arsenic", "--covariance", "matern32",
                   "--draws", "150", "--tune", "150", "--chains", "2", "--seed", "4", "--out", str(tmp_path / "out"),
                   "--json"])
    out = capsys.readouterr().out.strip().splitlines()
    assert len(out) == 1
    rep = json.loads(out[0])
    assert status in (0, 3)
    for key in ("parameters", "sampler", "diagnostics", "cautions", "sites", "population", "new_site",
                "shrinkage", "design"):
        assert key in rep
    for f in ("shrinkage.csv", "shrinkage.png", "design.csv", "design.png", "posterior.nc", "fit.json"):
        assert (tmp_path / "out" / f).exists()


def test_site_fit_runs_through_prediction(fits, tmp_path):
    """Per-site maps go through the single-site prediction stage unchanged: with one posterior draw of
    site P3 the predictive mean of the field at new points is the simple-kriging predictor
    beta0 + c0^T K^-1 (z - beta0) (Cressie 1993, Statistics for Spatial Data, eq. 3.4.57), computed here
    with numpy (jitter 1e-6 x partial sill as in likelihood.py; tolerance 1e-4)."""
    from bayesgeo.fitting.hierarchical import site_fit
    from bayesgeo.predict.prediction import basis_from_fit, predict_targets
    from bayesgeo.data.targets import read_target_points

    ds, _, hier, _ = fits
    basis, spec, params = basis_from_fit(site_fit(hier, "P3"), draws=1)
    new = np.array([[4010.0, 20.0], [4050.0, 55.0], [4090.0, 90.0]])
    pts = tmp_path / "targets.csv"
    pts.write_text("x,y\n" + "".join(f"{a},{b}\n" for a, b in new))
    out = predict_targets(basis, read_target_points(pts), design_attrs=spec.design_attrs, scheduler="synchronous",
                          include_nugget=False)
    data = ds.isel(obs=np.flatnonzero(ds["site"].values == "P3"))
    ref = _simple_kriging_mean(data, new, params)
    np.testing.assert_allclose(np.asarray(out["mean"].values).ravel(), ref, rtol=1e-4)


def test_complete_pooling_outputs_from_synthetic_draws():
    """Under complete pooling the population and the new site are the shared parameters themselves
    (definition of complete pooling, Gelman et al. 2013, BDA3 sec. 5.5), in data units: practical range
    = D r, partial sill = s^2 sd_z^2, nugget ratio = tau2 / (sigma2 + tau2). Synthetic draws, no sampling."""
    from bayesgeo.fitting.hier_outputs import add_derived, new_site_draws
    from bayesgeo.fitting.site_inputs import site_inputs

    ds, _ = _sites([15, 12], seed=9)
    spec, _ = site_inputs(ds, pooling="complete")
    rng = np.random.default_rng(2)
    shared = {k: rng.uniform(0.2, 1.0, (2, 50)) for k in ("practical_range_z", "sd_z", "nugget_sd_z")}
    post = xr.Dataset(
        {**{k: (("chain", "draw", "site"), np.repeat(v[..., None], 2, axis=2)) for k, v in shared.items()},
         "beta_z": (("chain", "draw", "site", "term"), rng.normal(size=(2, 50, 2, 1)))},
        coords={"chain": [0, 1], "draw": np.arange(50), "site": list(spec.sites), "term": ["1"]})
    out = add_derived(post, spec)
    np.testing.assert_allclose(out["population_practical_range_median"], shared["practical_range_z"] * spec.distance_scale)
    np.testing.assert_allclose(out["population_partial_sill_mean"], shared["sd_z"] ** 2 * spec.value_sd**2)
    ratio = shared["nugget_sd_z"] ** 2 / (shared["nugget_sd_z"] ** 2 + shared["sd_z"] ** 2)
    np.testing.assert_allclose(out["population_nugget_ratio_median"], ratio)
    new = new_site_draws(out, spec, seed=1)
    np.testing.assert_allclose(new["practical_range"], out["practical_range"].isel(site=0))
    np.testing.assert_allclose(new["nugget_ratio"], ratio)
    np.testing.assert_allclose(out["beta"].sel(term="1"), post["beta_z"].sel(term="1") * spec.value_sd + spec.value_mean)


def test_map_one_site_of_a_several_site_fit(fits, tmp_path, capsys):
    """`bayesgeo map DIR --site NAME` maps one site of a saved several-site fit: its predictions
    equal the prediction stage run on `site_fit(tree, NAME)` directly (the CLI is a thin shell);
    without --site the command says which sites there are (exit 2, one line)."""
    from bayesgeo.cli import main
    from bayesgeo.fitting.fitfile import save_fit
    from bayesgeo.fitting.hierarchical import site_fit
    from bayesgeo.predict.prediction import basis_from_fit, predict_targets
    from bayesgeo.data.targets import read_target_points

    _, _, hier, _ = fits
    out = tmp_path / "fit"
    save_fit(hier, out)
    pts = tmp_path / "pts.csv"
    xy = hier["constant_data"]["x"].values[:3], hier["constant_data"]["y"].values[:3]
    pts.write_text("x,y\n" + "".join(f"{a + 1.5},{b - 2.5}\n" for a, b in zip(*xy)))
    assert main(["map", str(out), "--points", str(pts), "--json"]) == 2
    assert "holds a several-site fit; choose one site (sites: P1, P2, P3)" in capsys.readouterr().err
    code = main(["map", str(out), "--site", "P2", "--points", str(pts), "--draws", "40", "--no-figures",
                 "--allow-unconverged", "--json"])
    assert code == 0
    capsys.readouterr()
    got = xr.load_dataset(out / "predictions_P2.nc")
    assert got.attrs["site"] == "P2"  # the label is recorded inside the per-site file
    basis, spec, _ = basis_from_fit(site_fit(hier, "P2"), draws=40)
    want = predict_targets(basis, read_target_points(pts), design_attrs=spec.design_attrs, scheduler="synchronous")
    np.testing.assert_allclose(got["mean"].values, want["mean"].values, rtol=1e-10)


# --- parametrisation of the site effects ---------------------------------------------------------


def _logp_and_effects(model, point):
    """Model log density and the per-site parameters at ``point`` (value-variable dict)."""
    outs = [model["practical_range_z"], model["sd_z"], model["nugget_sd_z"], model["beta_z"]]
    fn = model.compile_fn(model.replace_rvs_by_values(outs), inputs=model.value_vars, mode="FAST_COMPILE",
                          on_unused_input="ignore")
    logp = model.compile_logp(jacobian=True, mode="FAST_COMPILE")
    return float(logp(point)), [np.asarray(v) for v in fn(point)]


def test_centred_and_noncentred_are_one_model(monkeypatch):
    """Centred and non-centred forms are one model written in two coordinate systems (Papaspiliopoulos,
    Roberts and Sköld 2007, Statistical Science 22): at the same site parameters x = mu + s eta the
    log densities differ by the Jacobian of u = x -> u = eta, i.e. each centred site lowers the log
    density by the sum over its effects of log s (change of variables, N(x | mu, s) = N(eta | 0, 1) / s;
    exact to rounding). "auto" centres exactly the sites with at least CENTRED_MIN_POINTS points
    (lowered to 13 here, so that the mixed model of centred and non-centred sites is checked too)."""
    import bayesgeo.fitting.site_inputs as site_inputs_module
    from bayesgeo.fitting.hierarchical import build_site_model
    from bayesgeo.fitting.site_inputs import site_inputs

    ds, _ = _sites([15, 12, 11], seed=8)
    nc, spec_nc = build_site_model(ds, trend=1)
    ce, spec_ce = build_site_model(ds, trend=1, parametrisation="centred")
    assert spec_nc.parametrisation == "noncentred"
    assert spec_nc.site_centred == (False,) * 3 and spec_ce.site_centred == (True,) * 3
    rng = np.random.default_rng(3)
    point = {k: v + 0.4 * rng.standard_normal(np.shape(v)) for k, v in nc.initial_point().items()}
    lp_nc, (r, sd, tau, beta) = _logp_and_effects(nc, point)
    s_r, s_v, s_f = (math.exp(point[f"{k}_site_sd_log__"]) for k in ("range", "sill", "nugget"))
    s_b = np.exp(point["beta_site_sd_z_log__"])
    jac_site = math.log(s_r) + math.log(s_v) + math.log(s_f) + float(np.sum(np.log(s_b)))
    centred_u = {"range_u": np.log(r), "sill_u": np.log(sd**2), "nugget_u": 2.0 * np.log(tau / sd), "beta_u": beta}
    lp_ce, effects = _logp_and_effects(ce, {**point, **centred_u})
    for a, b in zip((r, sd, tau, beta), effects):
        np.testing.assert_allclose(b, a, rtol=1e-10)
    assert lp_ce == pytest.approx(lp_nc - 3 * jac_site, abs=1e-8)
    monkeypatch.setattr(site_inputs_module, "CENTRED_MIN_POINTS", 13)
    mixed, spec_mx = build_site_model(ds, trend=1, parametrisation="auto")
    assert spec_mx.site_centred == (True, False, False)
    keep = {k: np.where(np.reshape([1.0, 0.0, 0.0], (3,) + (1,) * (np.ndim(v) - 1)) > 0, v, point[k])
            for k, v in centred_u.items()}
    lp_mx, effects = _logp_and_effects(mixed, {**point, **keep})
    for a, b in zip((r, sd, tau, beta), effects):
        np.testing.assert_allclose(b, a, rtol=1e-10)
    assert lp_mx == pytest.approx(lp_nc - jac_site, abs=1e-8)
    with pytest.raises(InputError, match="^parametrisation"):
        site_inputs(ds, parametrisation="partial")


def test_total_sill_population_arm_splits_the_total_variance():
    """The private ``_variance="total"`` arm of build_site_model (bench/bench_hier_coordinates.py)
    puts the population on the log total variance v = sigma2 + tau2 and keeps the nugget fraction
    f = tau2 / v: at any point, sd_z^2 + nugget_sd_z^2 = exp(log v) and nugget_sd_z^2 / v = expit(logit f)
    with log v = 2 log S + s_v u and logit f = mu_f + s_f u_f (non-centred; algebra of the definitions).
    Its log density is the model's prior in those coordinates (the likelihood blocks equal
    scipy's multivariate normal, test_likelihood_is_sum_of_site_blocks); an unknown arm is an error."""
    from scipy.special import expit

    from bayesgeo.fitting.hierarchical import build_site_model

    ds, _ = _sites([15, 12, 11], seed=8)
    model, _ = build_site_model(ds, _variance="total")
    rng = np.random.default_rng(5)
    point = {k: v + 0.4 * rng.standard_normal(np.shape(v)) for k, v in model.initial_point().items()}
    _, (r, sd, tau, beta) = _logp_and_effects(model, point)
    log_v = 2.0 * point["population_total_sd_z_log__"] + math.exp(point["total_site_sd_log__"]) * point["total_u"]
    logit_f = point["nugget_logit_mu"] + math.exp(point["nugget_site_sd_log__"]) * point["nugget_u"]
    np.testing.assert_allclose(sd**2 + tau**2, np.exp(log_v), rtol=1e-12)
    np.testing.assert_allclose(tau**2 / np.exp(log_v), expit(logit_f), rtol=1e-12)
    assert "sill_u" not in model.named_vars and "population_sd_z" not in model.named_vars
    with pytest.raises(ValueError, match="_variance"):
        build_site_model(ds, _variance="share")


# --- nearest-neighbour likelihood in the site blocks ---------------------------------------------


def test_nn_site_blocks_equal_dense_with_all_neighbours(monkeypatch):
    """Each site block may use the Vecchia likelihood (bayesgeo.gp.nn): with m = n_s - 1 neighbours
    the product of conditionals is the chain rule, hence exactly the dense Gaussian density (Vecchia
    1988; Katzfuss and Guinness 2021, sec. 2), so the several-site model's log density equals the
    dense model's to rounding at the same point; with m = 3 it differs (the approximation is in
    use). Under approx="auto" only a site above DENSE_LIMIT points gets the nn block."""
    import bayesgeo.gp.engines as engines
    from bayesgeo.fitting.hierarchical import build_site_model
    from bayesgeo.fitting.site_inputs import site_inputs

    ds, _ = _sites([25, 18, 14], seed=12)
    dense, spec_d = build_site_model(ds, trend=1, approx="dense")
    nn, spec_n = build_site_model(ds, trend=1, approx="nn", neighbours=500)
    few, _ = build_site_model(ds, trend=1, approx="nn", neighbours=3)
    assert spec_d.site_approx == ("dense",) * 3
    assert spec_n.site_approx == ("nn",) * 3 and spec_n.site_neighbours == (24, 17, 13)
    assert spec_n.fit_spec("P2").approx == "nn" and spec_n.fit_spec("P2").neighbours == 17
    rng = np.random.default_rng(1)
    point = {k: v + 0.3 * rng.standard_normal(np.shape(v)) for k, v in dense.initial_point().items()}
    lp_d = float(dense.compile_logp(mode="FAST_COMPILE")(point))
    assert float(nn.compile_logp(mode="FAST_COMPILE")(point)) == pytest.approx(lp_d, rel=1e-9, abs=1e-8)
    assert abs(float(few.compile_logp(mode="FAST_COMPILE")(point)) - lp_d) > 1e-6
    monkeypatch.setattr(engines, "DENSE_LIMIT", 20)
    spec, data = site_inputs(ds, approx="auto")
    assert spec.site_approx == ("nn", "dense", "dense") and spec.site_neighbours[0] == 20
    assert data[0].dist is None and data[1].dist.shape == (18, 18)
    with pytest.raises(InputError, match="approx: the general 'matern' family"):
        site_inputs(ds, covariance="matern", nu=1.0, approx="nn")


def test_nn_several_site_fit_maps_a_site(tmp_path, capsys):
    """A small several-site fit with the nn likelihood runs; its saved settings record approx and
    neighbours per site, so `bayesgeo map DIR --site NAME` predicts by nearest-neighbour kriging
    (bayesgeo.predict.prediction.basis_from_fit through site_fit). With 25 data points and 30 prediction
    neighbours that is simple kriging on all the site's data: for one draw the mean equals
    beta0 + c0^T K^-1 (z - beta0) (Cressie 1993, Statistics for Spatial Data, eq. 3.4.57), computed
    with numpy (jitter 1e-6 x partial sill as in likelihood.py); the CLI's file equals the prediction
    stage run directly (thin shell)."""
    from bayesgeo.cli import main
    from bayesgeo.fitting.fitted import Fit
    from bayesgeo.fitting.fitfile import save_fit
    from bayesgeo.fitting.hierarchical import fit_sites, site_fit
    from bayesgeo.fitting.site_inputs import site_spec
    from bayesgeo.fitting.posterior import fit_spec
    from bayesgeo.predict.prediction import basis_from_fit, predict_targets
    from bayesgeo.data.targets import read_target_points

    ds, _ = _sites([25, 22], seed=14)
    tree = fit_sites(ds, approx="nn", neighbours=10, chains=2, draws=120, tune=150, seed=2)
    out = tmp_path / "fit"
    save_fit(tree, out)
    back = Fit.read(out).tree
    assert site_spec(back).site_approx == ("nn", "nn") and site_spec(back).site_neighbours == (10, 10)
    one = site_fit(back, "P1")
    assert fit_spec(one).approx == "nn" and fit_spec(one).neighbours == 10
    # each nn site carries its approximation check at that site's posterior medians (bayesgeo.gp.nn_accuracy)
    checks = json.loads(back.attrs["approximation"])
    assert set(checks) == {"P1", "P2"} and checks["P1"]["window_points"] == 25
    assert checks["P2"]["at"]["scale"] == pytest.approx(float(np.median(back["posterior"]["scale"].sel(site="P2").values)))
    assert json.loads(one.attrs["approximation"]) == checks["P1"]
    assert any(c.startswith("Site P2: Nearest-neighbour likelihood") for c in json.loads(back.attrs["cautions"]))
    new = np.array([[10.0, 20.0], [50.0, 55.0], [90.0, 90.0]])
    pts = tmp_path / "pts.csv"
    pts.write_text("x,y\n" + "".join(f"{a},{b}\n" for a, b in new))
    basis, spec, params = basis_from_fit(one, draws=1)
    assert basis.neighbours == 30 and len(basis.chol) == 0
    got = predict_targets(basis, read_target_points(pts), design_attrs=spec.design_attrs, scheduler="synchronous",
                          include_nugget=False)
    data = ds.isel(obs=np.flatnonzero(ds["site"].values == "P1"))
    ref = _simple_kriging_mean(data, new, params)
    np.testing.assert_allclose(np.asarray(got["mean"].values).ravel(), ref, rtol=1e-6)
    code = main(["map", str(out), "--site", "P1", "--points", str(pts), "--draws", "30", "--no-figures",
                 "--allow-unconverged", "--json"])
    assert code == 0
    rep = json.loads(capsys.readouterr().out)
    assert isinstance(rep, dict)
    written = xr.load_dataset(out / "predictions_P1.nc")
    basis, spec, _ = basis_from_fit(one, draws=30)
    want = predict_targets(basis, read_target_points(pts), design_attrs=spec.design_attrs, scheduler="synchronous")
    np.testing.assert_allclose(written["mean"].values, want["mean"].values, rtol=1e-10)


def test_site_spec_names_the_source():
    """site_spec decodes through bayesgeo.fitting.posterior.fit_settings: a single-site settings attribute or a
    cut one is one InputError line naming the source, not a JSONDecodeError."""
    import json as _json

    import xarray as _xr

    from bayesgeo.fitting.site_inputs import site_spec
    from bayesgeo.common.validate import InputError

    tree = _xr.DataTree()
    tree.attrs["settings"] = _json.dumps({"format": "bayesgeo single-site fit", "model": {}})
    with pytest.raises(InputError, match=r"^f.nc: not a bayesgeo several-site fit \(settings format "):
        site_spec(tree, "f.nc")
    tree.attrs["settings"] = '{"format": "bayesgeo several-site fit", "model": {"sites": ["a"'
    with pytest.raises(InputError, match=r"^f.nc: the 'settings' attribute is not valid JSON"):
        site_spec(tree, "f.nc")


def test_chains_continue_in_the_several_site_model(fits):
    """fit_sites looks at the convergence check of every site and the population while sampling
    (bayesgeo.fitting.looks): looks at 300, 600, 1200 draws per chain (4 x draws by default); the draws kept
    are those of the last look, which is the first without an R-hat or ESS problem (Vehtari et al.
    2021: R-hat < 1.01, ESS >= 400) or the longest chain."""
    import json

    for tree in fits[2:]:
        smp = json.loads(tree.attrs["settings"])["sampler"]
        looks = smp["looks"]
        assert smp["max_draws"] == 1200 and [lk["draws"] for lk in looks] == [300, 600, 1200][:len(looks)]
        assert smp["draws"] == looks[-1]["draws"] == tree["posterior"].sizes["draw"]
        assert all(lk["extend"] for lk in looks[:-1])
        assert (not looks[-1]["extend"]) or looks[-1]["draws"] == 1200


def test_site_report_carries_the_looks(fits):
    """The several-site fit.json report and summary.txt carry the looks like the single-site ones."""
    import json

    from bayesgeo.fitting.hier_outputs import site_report, summary_text_sites

    tree = fits[2]
    smp = json.loads(tree.attrs["settings"])["sampler"]
    report = site_report(tree)
    assert report["sampler"]["looks"] == smp["looks"] and report["sampler"]["max_draws"] == smp["max_draws"]
    text = summary_text_sites(report)
    assert ("chains continued while R-hat or ESS was too poor" in text) == (len(smp["looks"]) > 1)


def test_default_several_site_fit_is_rerun_at_0_95_when_divergent(monkeypatch):
    """fit_sites without a target acceptance samples at 0.9 and hands its run to
    bayesgeo.fitting.looks.rerun_if_divergent with 0.95 (the rule itself is tested in tests/test_looks.py);
    a rerun is recorded in the settings; a target acceptance the user gives is used as it is, with no
    rerun asked. A stand-in for the rule forces the rerun so that the wiring is tested on a real fit."""
    import bayesgeo.fitting.looks as looks
    from bayesgeo.fitting.hierarchical import SITES_RERUN_ACCEPT, fit_sites

    asked = []

    def force(raw, run, *, accept):
        asked.append((float(raw.attrs["target_accept"]), accept))
        again = run(accept)
        again.attrs["rerun"] = {"target_accept": float(raw.attrs["target_accept"]), "divergences": 1,
                                "draws": int(raw["posterior"].sizes["draw"]), "seconds": 0.0}
        return again

    monkeypatch.setattr(looks, "rerun_if_divergent", force)
    ds, _ = _sites([20, 20, 20], seed=3)
    kw = dict(pooling="independent", chains=2, draws=100, tune=100, seed=4, max_draws=100)
    tree = fit_sites(ds, **kw)
    smp = json.loads(tree.attrs["settings"])["sampler"]
    assert asked == [(0.9, SITES_RERUN_ACCEPT)] and SITES_RERUN_ACCEPT == 0.95
    assert smp["target_accept"] == 0.95 and smp["rerun"]["target_accept"] == 0.9
    asked.clear()
    assert json.loads(fit_sites(ds, target_accept=0.85, **kw).attrs["settings"])["sampler"]["target_accept"] == 0.85
    assert asked == []
