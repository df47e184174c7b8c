"""Tests of bayesgeo.fitting.posterior: recovery of known parameters, derived quantities, summary table,
saving and loading a fit. One fit to simulated data is shared by the whole module."""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr

from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.fitting.fitted import Fit
from bayesgeo.fitting.posterior import fit, fit_report, fit_spec, summary_table, with_diagnostics
from bayesgeo.fitting.fitfile import save_fit
from bayesgeo.common.validate import InputError

#: Exponential field whose practical range (900 m) is three times the side of the sampled square
#: (300 m): the regime of fixed-domain asymptotics, where Zhang (2004) applies.
TRUTH = {"practical_range": 900.0, "partial_sill": 1.0, "nugget": 0.05}


@pytest.fixture(scope="module")
def simulated():
    """n = 80 points in a 300 m square, exponential field plus nugget (bayesgeo.data.demo.simulate_field)."""
    rng = np.random.default_rng(2026)
    xy = np.column_stack([431_000 + 300 * rng.random(80), 5_622_000 + 300 * rng.random(80)])
    z = simulate_field(xy, covariance="exponential", rng=rng, mean=5.0, **TRUTH)
    return points_dataset(xy[:, 0], xy[:, 1], z, attrs={"source": "sim.csv", "distance_units": "m",
                                                         "value_units": "mg/kg", "coords": "xy",
                                                         "value_column": "conc"})


@pytest.fixture(scope="module")
def tree(simulated):
    return fit(simulated, covariance="exponential", chains=2, draws=300, tune=300, seed=11)


def test_90pct_intervals_cover_the_true_parameters(tree):
    """A fit to data simulated from known parameters covers the true practical range, partial sill
    and nugget with its 90% equal-tailed intervals (calibration of Bayesian intervals; one fixed
    data set and seed, so this is a check of gross errors, not of exact coverage)."""
    post = tree["posterior"]
    for name, true in TRUTH.items():
        lo, hi = np.quantile(post[name].values, [0.05, 0.95])
        assert lo < true < hi, (name, lo, hi, true)


def test_microergodic_parameter_is_pinned_down_tightest(tree):
    """Zhang (2004, JASA 99; from memory, FACTS.md): with nu known, the data identify
    sigma^2 / phi^(2 nu) rather than sigma^2 and phi separately, so its posterior (on the log
    scale) is narrower than those of the partial sill and the scale; and it covers its true value.
    The result is asymptotic (fixed domain): in a trial with a Matérn 3/2 field at this n (80) the
    ordering did not hold yet, so the check uses the exponential (nu = 1/2) with a long range."""
    post = tree["posterior"]
    sd = {k: float(np.log(post[k]).std()) for k in ("microergodic", "partial_sill", "scale")}
    assert sd["microergodic"] < sd["partial_sill"] and sd["microergodic"] < sd["scale"]
    true_phi = TRUTH["practical_range"] / 2.996  # exponential practical-range factor (FACTS.md)
    true_me = TRUTH["partial_sill"] / true_phi
    lo, hi = np.quantile(post["microergodic"].values, [0.05, 0.95])
    assert lo < true_me < hi


def test_derived_variables_in_data_units(tree, simulated):
    """Derived variables follow their definitions: practical range = -ln(0.05) phi = 2.996 phi for
    the exponential (FACTS.md, published factor), total sill = partial sill + nugget, nugget ratio = nugget / total
    sill, beta['1'] = m + s beta_z['1']; units in attrs."""
    post = tree["posterior"]
    spec = fit_spec(tree)
    np.testing.assert_allclose(post["practical_range"] / post["scale"], -np.log(0.05), rtol=1e-9)
    np.testing.assert_allclose(post["total_sill"], post["partial_sill"] + post["nugget"])
    np.testing.assert_allclose(post["nugget_ratio"], post["nugget"] / post["total_sill"])
    np.testing.assert_allclose(post["beta"].sel(term="1"), spec.value_mean + spec.value_sd * post["beta_z"].sel(term="1"))
    np.testing.assert_allclose(post["practical_range"], post["practical_range_z"] * spec.distance_scale)
    assert post["practical_range"].attrs["units"] == "m"
    assert post["partial_sill"].attrs["units"] == "(mg/kg)^2"


def test_trend_coefficients_are_exact_conditional_draws(tree, simulated):
    """The default fit integrates the trend out of the dense likelihood and draws beta_z afterwards,
    one draw per posterior draw, from N(m, V), V = (F' K^-1 F + I / b^2)^-1, m = V F' K^-1 y
    (Rasmussen and Williams 2006, sec. 2.7; published formula). Recomputed here independently for 200
    draws (K from the exponential correlation exp(-d / phi) written out, numpy.linalg.inv), the
    standardised deviations (beta_z - m) / sqrt(V) must look like N(0, 1): mean within 4.5 / sqrt(200)
    and variance within 0.6-1.5 (chi-square(199) / 199 lies in 0.71-1.32 with probability > 0.999;
    scipy.stats.chi2). A refit with the same seed gives identical coefficients."""
    from scipy import stats
    from scipy.spatial.distance import cdist

    spec = fit_spec(tree)
    post = tree["posterior"]
    assert post["beta_z"].dims == ("chain", "draw", "term") and "drawn" in post["beta_z"].attrs
    xy = np.column_stack([simulated["x"].values, simulated["y"].values])
    d = cdist(xy, xy) / spec.distance_scale
    y = (simulated["value"].values - spec.value_mean) / spec.value_sd
    f = np.ones((len(y), 1))
    flat = {k: post[k].values.ravel() for k in ("practical_range_z", "sd_z", "nugget_sd_z", "beta_z")}
    zs = []
    for i in np.linspace(0, len(flat["sd_z"]) - 1, 200).astype(int):
        s2, t2 = flat["sd_z"][i] ** 2, flat["nugget_sd_z"][i] ** 2
        k = s2 * np.exp(-d * spec.range_factor / flat["practical_range_z"][i]) + (t2 + 1e-6 * s2) * np.eye(len(y))
        ki = np.linalg.inv(k)
        v = 1.0 / (f.T @ ki @ f + 1.0 / spec.priors.beta_sd**2)
        m = v @ f.T @ ki @ y
        zs.append((flat["beta_z"][i] - m[0]) / np.sqrt(v[0, 0]))
    zs = np.asarray(zs)
    assert abs(zs.mean()) < 4.5 / np.sqrt(len(zs))
    assert stats.chi2(len(zs) - 1).ppf(0.0005) / (len(zs) - 1) > 0.6
    assert 0.6 < zs.var(ddof=1) < 1.5
    again = fit(simulated, covariance="exponential", chains=2, draws=300, tune=300, seed=11)
    np.testing.assert_array_equal(again["posterior"]["beta_z"].values, post["beta_z"].values)


def test_summary_table_matches_numpy_and_arviz(tree):
    """Summary rows: mean, sd (ddof 1, as ArviZ), quantiles equal numpy over all draws, and the 90%
    HDI equals arviz.hdi (reference library)."""
    import arviz as az

    rows = {r["parameter"]: r for r in summary_table(tree)}
    x = tree["posterior"]["nugget"].values.ravel()
    r = rows["nugget"]
    assert r["mean"] == pytest.approx(x.mean()) and r["sd"] == pytest.approx(x.std(ddof=1), rel=1e-9)
    np.testing.assert_allclose([r["q05"], r["q50"], r["q95"]], np.quantile(x, [0.05, 0.5, 0.95]))
    hdi = az.hdi(tree["posterior"].to_dataset()[["nugget"]], prob=0.9)["nugget"].values
    np.testing.assert_allclose([r["hdi90_low"], r["hdi90_high"]], hdi)
    assert {"beta[1]", "practical_range", "partial_sill", "total_sill", "scale", "microergodic"} <= set(rows)


def test_settings_describe_the_fit(tree):
    """Root attrs hold JSON settings sufficient to rebuild the model (spec, sampler, versions) and the cautions."""
    settings = json.loads(tree.attrs["settings"])
    assert settings["model"]["covariance"] == "exponential" and settings["sampler"]["seed"] == 11
    assert settings["model"]["priors"]["range_rate"] > 0 and "pymc" in settings["versions"]
    cautions = json.loads(tree.attrs["cautions"])
    assert any("licensed professional" in c for c in cautions) and any("regulator" in c for c in cautions)
    assert tree["constant_data"]["design"].shape == (80, 1)
    assert tree["observed_data"]["value"].attrs["units"] == "mg/kg"


def test_save_and_load_round_trip(tree, tmp_path):
    """save_fit writes posterior.nc readable by xarray.open_datatree (netCDF4) with every group and
    attribute, summary.csv with the stated columns, fit.json and summary.txt; Fit.read reads it back."""
    out = save_fit(tree, tmp_path / "fit1")
    assert sorted(p.name for p in out.iterdir()) == [".bayesgeo-output.json", "fit.json", "posterior.nc", "prior_check.png",
                                                     "summary.csv", "summary.txt"]
    back = Fit.read(out).tree
    xr.testing.assert_identical(back["posterior"].to_dataset(), tree["posterior"].to_dataset())
    assert back.attrs["settings"] == tree.attrs["settings"]
    header = (out / "summary.csv").read_text().splitlines()[0].split(",")
    assert header[:8] == ["parameter", "mean", "sd", "q05", "q50", "q95", "hdi90_low", "hdi90_high"]
    assert json.loads((out / "fit.json").read_text())["sampler"]["seed"] == 11


def test_save_refuses_existing_and_is_atomic(tree, tmp_path, monkeypatch):
    """An existing folder is refused without overwrite; a crash while writing leaves no folder and no
    temporary debris (atomic rename, bayesgeo.common.outputs.new_folder)."""
    import bayesgeo.fitting.posterior as post_mod

    save_fit(tree, tmp_path / "a")
    with pytest.raises(InputError, match="already exists"):
        save_fit(tree, tmp_path / "a")
    save_fit(tree, tmp_path / "a", overwrite=True)

    def boom(report):
        raise RuntimeError("disk full")

    monkeypatch.setattr(post_mod, "summary_text", boom)
    with pytest.raises(RuntimeError):
        save_fit(tree, tmp_path / "b")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a"]


def test_not_converged_is_marked(tree, tmp_path):
    """A failed convergence verdict marks the summary NOT CONVERGED (summary.txt, summary.csv, cautions)."""
    bad = with_diagnostics(tree, {"verdict": "fail", "problems": []})
    out = save_fit(bad, tmp_path / "bad")
    assert (out / "summary.txt").read_text().startswith("*** NOT CONVERGED")
    assert "NOT CONVERGED" in (out / "summary.csv").read_text()
    rep = fit_report(bad)
    assert rep["converged"] is False and rep["cautions"][0].startswith("NOT CONVERGED")


def test_load_refuses_a_missing_fit(tmp_path):
    """Fit.read on a folder without posterior.nc: one-line InputError."""
    with pytest.raises(InputError, match="no fit found"):
        Fit.read(tmp_path).tree


@pytest.mark.parametrize("settings, pattern", [
    (None, r"^f.nc: no 'settings' attribute: not a bayesgeo fit"),
    ('{"model": {"covariance": "exp', r"^f.nc: the 'settings' attribute is not valid JSON \(Unterminated string"),
    ('"a string"', r"^f.nc: the 'settings' attribute holds no 'model' table"),
    ('{"format": "other", "model": {}}', r"^f.nc: settings of format 'other'"),
    ('{"model": {"covariance": "exponential"}}', r"^f.nc: the model settings cannot be decoded \(missing "),
])
def test_settings_decoded_in_one_place(settings, pattern):
    """fit_settings is the one place the settings attribute is parsed; fit_spec builds on it, and every
    failure is one InputError line naming the source (JSON syntax per RFC 8259: a cut string is invalid)."""
    from bayesgeo.fitting.posterior import fit_settings

    tree = xr.DataTree()
    if settings is not None:
        tree.attrs["settings"] = settings
    with pytest.raises(InputError, match=pattern):
        fit_spec(tree, "f.nc")
    if "cannot be decoded" in pattern:  # valid JSON with a model table: decoding the settings succeeds
        assert fit_settings(tree, "f.nc")["model"] == {"covariance": "exponential"}
    else:
        with pytest.raises(InputError, match=pattern):
            fit_settings(tree, "f.nc")
