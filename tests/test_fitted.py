"""The fit object (bayesgeo.fitting.fitted.Fit): read once, the same numbers as the commands, the prediction gate.

These are checks of the package's own consistency (the Python path and the command line must give the
same numbers; the saved file must read back bit for bit); the statistics underneath are checked
against outside references in test_posterior, test_predict and test_diagnostics.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from bayesgeo.cli import main
from bayesgeo.data.points import points_dataset
from bayesgeo.data.demo import simulate_field
from bayesgeo.fitting.fitted import Fit, NotConvergedError
from bayesgeo.predict.maps import predict_map
from bayesgeo.common.validate import InputError


def _points(n=40, seed=3):
    rng = np.random.default_rng(seed)
    xy = np.round(rng.random((n, 2)) * 200.0, 2)
    v = simulate_field(xy, covariance="matern32", practical_range=80.0, partial_sill=1.0, nugget=0.2, mean=3.0,
                       rng=rng)
    return points_dataset(xy[:, 0], xy[:, 1], v, attrs={"distance_units": "m", "value_units": "mg/kg",
                                                        "source": "simulated.csv"})


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    """One single-site fit through Fit.sample (n = 40, 2 chains x 150 draws, no continued chains), saved."""
    fit = Fit.sample(_points(), covariance="matern32", chains=2, draws=150, tune=150, max_draws=150, seed=4)
    folder = tmp_path_factory.mktemp("fitted") / "fit"
    fit.save(folder)
    return fit, folder


def test_sample_checks_saves_and_reads_back(saved):
    """Fit.sample attaches the convergence check (the stored verdict is the check's); save then Fit.read
    gives the same draws bit for bit and the same decoded settings (NetCDF round trip)."""
    fit, folder = saved
    assert not fit.several and fit.sites == () and fit.extracted_site is None
    assert fit.stored_verdict == fit.convergence.verdict
    assert fit.diagnostics["n_draws"] == 150 and fit.cautions
    back = Fit.read(folder)
    assert back.source == folder / "posterior.nc"
    assert back.settings == fit.settings
    for name in ("practical_range_z", "sd_z", "nugget_sd_z", "partial_sill", "beta"):
        np.testing.assert_array_equal(back.posterior[name].values, fit.posterior[name].values)
    assert back.spec == fit.spec
    assert "matern32" in repr(back) and f"check: {fit.stored_verdict}" in repr(back)


def test_summary_is_the_summary_table(saved):
    """fit.summary() is posterior.summary_table as a pandas DataFrame (one row per parameter)."""
    from bayesgeo.fitting.posterior import summary_table

    fit, _ = saved
    df = fit.summary()
    rows = summary_table(fit.tree)
    assert list(df["parameter"]) == [r["parameter"] for r in rows]
    np.testing.assert_allclose(df["q50"].to_numpy(), [r["q50"] for r in rows])
    assert "<table" in fit._repr_html_() and "practical_range" in fit._repr_html_()


def test_predict_equals_the_map_command(saved, tmp_path, capsys):
    """Fit.read(folder).predict gives the numbers `bayesgeo map` writes to predictions.nc for the same cell,
    threshold and draws (one code path behind both)."""
    import shutil

    import xarray as xr

    fit, folder = saved
    work = tmp_path / "fit"
    shutil.copytree(folder, work)
    code = main(["map", str(work), "--cell", "25", "--threshold", "25", "--draws", "40", "--no-figures",
                 "--allow-unconverged", "--json"])
    capsys.readouterr()
    assert code == 0
    with xr.open_dataset(work / "predictions.nc") as ds:
        cli = ds.load()
    api = predict_map(Fit.read(work), cell=25.0, thresholds=[25.0], draws=40, allow_unconverged=True)
    for name in ("mean", "sd", "q05", "q95", "p_exceed"):
        np.testing.assert_allclose(api[name].values, cli[name].values, rtol=1e-12, equal_nan=True)
    assert api.attrs["convergence_verdict"] == cli.attrs["convergence_verdict"]
    assert json.loads(api.attrs["cautions"]) == json.loads(cli.attrs["cautions"])


def test_predict_refuses_a_failed_fit_unless_allowed(saved):
    """A fit whose stored check failed is not mapped (NotConvergedError) unless allow_unconverged, and then
    every output says NOT CONVERGED (the map gate: an unconverged fit is not a result)."""
    fit, _ = saved
    tree = fit.tree.copy()
    diag = dict(fit.diagnostics, verdict="fail")
    tree.attrs["diagnostics"] = json.dumps(diag)
    failed = Fit(tree)
    assert failed.gate_verdict() == "fail"
    with pytest.raises(NotConvergedError, match="allow_unconverged=True"):
        predict_map(failed, cell=50.0, draws=10)
    pred = predict_map(failed, cell=50.0, draws=10, allow_unconverged=True)
    assert pred.attrs["convergence_status"] == "NOT CONVERGED"
    assert json.loads(pred.attrs["cautions"])[0].startswith("NOT CONVERGED")


def test_site_of_a_single_site_fit(saved):
    """A single-site fit is its own view; naming a site is an error that names the argument."""
    fit, _ = saved
    assert fit.site(None) is fit
    with pytest.raises(InputError, match=r"^site: .*single-site fit"):
        fit.site("north")


def test_convergence_display(saved):
    """Convergence.table() has one row per checked parameter with R-hat and ESS; the HTML display shows
    the verdict and every parameter (notebook display)."""
    fit, _ = saved
    conv = fit.convergence
    table = conv.table()
    assert len(table) == conv.parameters.sizes["parameter"]
    assert {"rhat", "ess_bulk", "ess_tail"} <= set(table.columns)
    html = conv._repr_html_()
    assert f"convergence: {conv.verdict.upper()}" in html
    for p in conv.parameters["parameter"].values:
        assert str(p) in html
    assert repr(conv).startswith(f"<Convergence {conv.verdict.upper()}")


def test_read_refuses_what_is_not_a_fit(tmp_path):
    """Fit.read of a folder without a fit: one InputError line naming the file (fitfile.read_fit)."""
    with pytest.raises(InputError, match=r"posterior\.nc: no fit found"):
        Fit.read(tmp_path)
    with pytest.raises(InputError, match="pooling: the points hold one site"):
        Fit.sample(_points(12), pooling="hierarchical")
