"""Tests of ``bayesgeo map`` on small fit folders.

The fit folders are built here without sampling: posterior draws are generated around the true
parameters of a demo parcel (bayesgeo.data.demo, an invented scenario) in the layout a fit stores
(``posterior``, ``observed_data``, ``constant_data``, ``sample_stats`` groups, settings as JSON
in the root attributes, as bayesgeo.fitting.posterior.fit writes them), so the command is tested in seconds. Independent draws in every chain pass the
convergence check; chains centred apart fail it.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr

from bayesgeo.cli import main
from conftest import write_fit_folder
from bayesgeo.data.demo import demo_data
from bayesgeo.predict.figures import map_figure
from bayesgeo.fitting.model import model_inputs
from bayesgeo.fitting.posterior import derive


def _fit_folder(path, *, transform="log", spread_chains=False, chains=4, draws=250, seed=1, data=None, spread=0.1):
    ds = demo_data()
    ds = ds.isel(obs=np.flatnonzero(ds["site"].values == "mill-pond"))
    ds = ds.drop_vars("site")
    truth = json.loads(ds.attrs["truth"])["sites"]["mill-pond"]
    spec, y, design, dist = model_inputs(ds, covariance="matern32", nugget=True, transform=transform)
    rng = np.random.default_rng(seed)
    shape = (chains, draws)
    shift = np.arange(chains)[:, None] * (3.0 if spread_chains else 0.0)
    if transform == "log":
        r0, s0, t0, b0 = (truth["practical_range"], np.sqrt(truth["partial_sill"]), np.sqrt(truth["nugget"]),
                          truth["log_mean"])
    else:  # rough values on the raw scale of mg/kg
        r0, s0, t0, b0 = 150.0, float(np.std(ds["value"].values)), 0.3 * float(np.std(ds["value"].values)), \
            float(np.mean(ds["value"].values))
    post = xr.Dataset({
        "practical_range_z": (("chain", "draw"),
                              r0 / spec.distance_scale * np.exp(spread * rng.standard_normal(shape) + shift)),
        "sd_z": (("chain", "draw"), s0 / spec.value_sd * np.exp(spread * rng.standard_normal(shape))),
        "nugget_sd_z": (("chain", "draw"), t0 / spec.value_sd * np.exp(spread * rng.standard_normal(shape))),
        "beta_z": (("chain", "draw", "term"),
                   ((b0 - spec.value_mean) / spec.value_sd + spread / 2 * rng.standard_normal(shape))[..., None]),
    }, coords={"chain": np.arange(chains), "draw": np.arange(draws), "term": list(spec.terms)})
    stats = xr.Dataset({"diverging": (("chain", "draw"), np.zeros(shape, bool)),
                        "energy": (("chain", "draw"), rng.standard_normal(shape)),
                        "depth": (("chain", "draw"), np.full(shape, 3)),
                        "maxdepth_reached": (("chain", "draw"), np.zeros(shape, bool))},
                       coords={"chain": np.arange(chains), "draw": np.arange(draws)})
    obs = xr.Dataset({"value": ("obs", ds["value"].values)})
    const = xr.Dataset({"x": ("obs", ds["x"].values), "y": ("obs", ds["y"].values),
                        "design": (("obs", "term"), design.values)}, coords={"term": list(spec.terms)})
    tree = xr.DataTree.from_dict({"posterior": derive(post, spec), "sample_stats": stats, "observed_data": obs,
                                  "constant_data": const})
    tree.attrs["settings"] = json.dumps({"model": spec.to_dict(), **({"data": data} if data else {})})
    write_fit_folder(tree, path)
    return path, ds


def _run_json(capsys, argv):
    code = main(argv)
    out = capsys.readouterr().out
    lines = [ln for ln in out.splitlines() if ln.strip()]
    assert len(lines) == 1, out
    return code, json.loads(lines[0])


def test_map_json_grid_and_area(tmp_path, capsys):
    """--json prints exactly one object with cells, draws, threshold, area and cautions; the NetCDF
    holds CF-style attributes and the maps are written. Under the log transform the area mean must
    exceed exp(area mean of the log-scale median map)... checked loosely: exp is convex, so the
    mean of a log-normal exceeds its median (Jensen's inequality)."""
    folder, ds = _fit_folder(tmp_path / "fit")
    code, out = _run_json(capsys, ["map", str(folder), "--cell", "20", "--threshold", "40", "--threshold", "20",
                                   "--area", "431350,5622350,431450,5622450", "--draws", "30", "--json"])
    assert code == 0
    for key in ("cells", "draws", "threshold", "area", "cautions"):
        assert key in out
    assert out["draws"] == 30 and out["threshold"] == [40.0, 20.0] and out["cells"] > 100
    assert set(out["area"]) >= {"mean", "sd", "q05", "q95", "p_exceed"}
    assert out["area"]["q05"] < out["area"]["mean"] < out["area"]["q95"]
    assert any("licensed professional" in c for c in out["cautions"])
    pred = xr.open_dataset(folder / "predictions.nc")
    assert pred["mean"].dims == ("y", "x") and pred["p_exceed"].dims == ("threshold", "y", "x")
    assert pred["mean"].attrs["units"] == "mg/kg" and "long_name" in pred["sd"].attrs
    assert np.all(pred["mean"].values > pred["q50"].values)  # log-normal: mean > median
    pe = pred["p_exceed"].values
    assert np.all(pe[0] <= pe[1] + 1e-12)  # P(> 40) <= P(> 20)
    pred.close()
    assert sorted(p.name for p in (folder / "maps").iterdir()) == [
        "map.gpkg", "mean.png", "mean.tif", "p_exceed_20.png", "p_exceed_20.tif", "p_exceed_40.png", "p_exceed_40.tif",
        "q05.tif", "q50.tif", "q95.tif", "sd.png", "sd.tif"]
    # existing outputs are refused without --overwrite (exit 2, input error)
    assert main(["map", str(folder), "--draws", "5", "--json"]) == 2
    assert "--overwrite" in capsys.readouterr().err


def test_map_points_keep_input_order(tmp_path, capsys):
    """--points predicts at the listed points in file order along 'target' (and --simulate stores
    joint simulations per draw there); without nugget and a
    raw-scale fit the prediction at a far-away point reverts towards the trend mean (kriging fact:
    beyond the range the weights vanish; common practice)."""
    folder, ds = _fit_folder(tmp_path / "fit", transform=None)
    pts = tmp_path / "targets.csv"
    pts.write_text("x,y\n431400,5622400\n431300.5,5622301\n440000,5630000\n")
    code, out = _run_json(capsys, ["map", str(folder), "--points", str(pts), "--threshold", "30", "--nugget",
                                   "exclude", "--no-figures", "--draws", "40", "--simulate", "5", "--json"])
    assert code == 0 and out["cells"] == 3 and out["targets"] == "points" and out["simulations_per_draw"] == 5
    pred = xr.open_dataset(folder / "predictions.nc")
    np.testing.assert_allclose(pred["x"].values, [431400, 431300.5, 440000])
    assert pred["simulation"].dims == ("sample", "sim", "target") and pred["simulation"].shape == (40, 5, 3)
    far = float(pred["mean"].values[2])
    post = xr.open_datatree(folder / "posterior.nc")
    spec = json.loads(post.attrs["settings"])["model"]
    beta = post["posterior"]["beta_z"].values.mean() * spec["value_sd"] + spec["value_mean"]
    assert abs(far - beta) < 0.05 * abs(beta)
    pred.close()
    post.close()


def test_bad_points_file_names_row_and_column(tmp_path, capsys):
    """Bad input gives one line naming the file, row and column, and exit status 2 (project rule)."""
    folder, _ = _fit_folder(tmp_path / "fit")
    pts = tmp_path / "targets.csv"
    pts.write_text("x,y\n431400,5622400\n431300,abc\n")
    assert main(["map", str(folder), "--points", str(pts), "--json"]) == 2
    err = capsys.readouterr().err.strip()
    assert "row 3" in err and "'y'" in err and str(pts) in err and len(err.splitlines()) == 1


def test_unconverged_posterior_is_refused_then_marked(tmp_path, capsys):
    """Chains centred apart fail the R-hat check (Vehtari et al. 2021 threshold 1.01, via
    bayesgeo.convergence.diagnostics): map exits 3 (the status of a failed check) unless --allow-unconverged,
    which marks the file attributes and titles NOT CONVERGED."""
    folder, _ = _fit_folder(tmp_path / "fit", spread_chains=True)
    code, out = _run_json(capsys, ["map", str(folder), "--draws", "10", "--json"])
    assert code == 3 and out["convergence"] == "fail"
    assert not (folder / "predictions.nc").exists()
    code, out = _run_json(capsys, ["map", str(folder), "--draws", "10", "--cell", "40", "--allow-unconverged",
                                   "--no-figures", "--json"])
    assert code == 0 and out["cautions"][0].startswith("NOT CONVERGED")
    pred = xr.open_dataset(folder / "predictions.nc")
    assert pred.attrs["convergence_status"] == "NOT CONVERGED" and pred.attrs["title"].startswith("NOT CONVERGED")
    fig = map_figure(pred, "mean", samples_xy=np.zeros((1, 2)), caution="c", not_converged=True)
    assert fig.axes[0].get_title().startswith("NOT CONVERGED")
    pred.close()


@pytest.mark.parametrize("bad", [["--draws", "0"], ["--area", "5,5,1,1"], ["--cell", "-3"]])
def test_bad_options_exit_2(tmp_path, capsys, bad):
    """Invalid option values are input errors: one line on stderr, exit 2 (project rule)."""
    folder, _ = _fit_folder(tmp_path / "fit")
    assert main(["map", str(folder), "--no-figures", *bad]) == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


@pytest.mark.slow
def test_real_fit_then_map_covers_held_out_samples(tmp_path, capsys):
    """End to end with a real fit (bayesgeo.fitting.posterior.fit, nutpie): fit 50 of the 60 'mill-pond'
    samples of the invented demo (log transform, Matérn 3/2 with nugget, the true model of the demo),
    then map the 10 held-out sample locations. Their 90% predictive intervals (new measurement,
    nugget included) should cover most of them: with 10 points, 7 or more covered has probability
    0.99 under nominal coverage (scipy.stats.binom.sf(6, 10, 0.9) = 0.987)."""
    from bayesgeo.fitting.posterior import fit
    from bayesgeo.fitting.fitfile import save_fit

    ds = demo_data()
    ds = ds.isel(obs=np.flatnonzero(ds["site"].values == "mill-pond")).drop_vars("site")
    train, test = ds.isel(obs=slice(0, 50)), ds.isel(obs=slice(50, 60))
    tree = fit(train, covariance="matern32", transform="log", chains=2, draws=400, tune=400, seed=5)
    folder = save_fit(tree, tmp_path / "fit")
    pts = tmp_path / "held_out.csv"
    pts.write_text("x,y\n" + "".join(f"{x},{y}\n" for x, y in zip(test["x"].values, test["y"].values)))
    code, out = _run_json(capsys, ["map", str(folder), "--points", str(pts), "--draws", "200", "--no-figures",
                                   "--allow-unconverged", "--json"])
    assert code == 0 and out["cells"] == 10
    pred = xr.open_dataset(folder / "predictions.nc")
    obs = test["value"].values
    covered = int(np.sum((obs > pred["q05"].values) & (obs < pred["q95"].values)))
    pred.close()
    assert covered >= 7, covered


@pytest.mark.parametrize("option, value, pattern", [
    ("--cell", "nan", r"argument --cell: expected a finite number > 0, got 'nan'"),
    ("--margin", "-1", r"argument --margin: expected a finite number >= 0, got '-1'"),
    ("--threshold", "inf", r"argument --threshold: expected a finite number, got 'inf'"),
    ("--chunk-cells", "0", r"argument --chunk-cells: expected an integer from 1 to 10000000, got 0"),
    ("--simulate", "99999999999999999999", r"argument --simulate: expected an integer from 0 to 10000"),
    ("--seed", str(2**64), r"argument --seed: expected an integer from 0 to 9223372036854775807"),
    ("--draws", "99999999999999999999", r"--draws: expected an integer from 1 to 64000000 or 'all'"),
])
def test_option_values_bounded(tmp_path, capsys, option, value, pattern):
    """Numeric options are checked before the fit is read (bayesgeo.common.validate): exit 2, one line
    naming the option; the fit folder is untouched and no predictions appear."""
    from _cli_helpers import assert_refused

    folder, _ = _fit_folder(tmp_path / "fit", draws=20)
    assert_refused(capsys, ["map", folder, option, value], "map", pattern, inputs=[folder],
                   absent=[folder / "predictions.nc", folder / "maps"])


def test_non_finite_prediction_stops_the_map(tmp_path, capsys, monkeypatch):
    """A NaN predictive sd at a predicted cell (a numerically singular kriging system, simulated here by
    patching the prediction) stops map with exit 2 and a line naming the fit folder and the variable,
    instead of maps with all-NaN bands and exit 0; no predictions.nc or maps/ are written."""
    import bayesgeo.predict.prediction as pr
    from _cli_helpers import assert_refused

    real = pr.predict_targets

    def nan_sd(*a, **kw):
        pred = real(*a, **kw)
        v = pred["sd"].values.copy()
        v.flat[v.size // 2] = np.nan
        return pred.assign(sd=(pred["sd"].dims, v))

    monkeypatch.setattr(pr, "predict_targets", nan_sd)
    folder, _ = _fit_folder(tmp_path / "fit")
    assert_refused(capsys, ["map", folder, "--cell", "40", "--draws", "20"], "map",
                   rf"{folder}: the prediction sd is NaN or infinite at 1 target\(s\)", inputs=[folder],
                   absent=[folder / "predictions.nc", folder / "maps"])


@pytest.mark.parametrize("value", ["nonsense", "tcp://", "threads please"])
def test_bad_scheduler_refused_before_work(tmp_path, capsys, value):
    """A --scheduler that is neither threads, synchronous nor an address (the
    form dask.distributed takes: scheme://...) is refused before the fit is read, with one line (it raised a
    ValueError from dask.distributed inside the prediction before)."""
    from _cli_helpers import assert_refused

    folder, _ = _fit_folder(tmp_path / "fit", draws=20)
    assert_refused(capsys, ["map", folder, "--scheduler", value], "map",
                   r"--scheduler: expected threads, synchronous or an address such as tcp://host:8786",
                   inputs=[folder], absent=[folder / "predictions.nc"])


@pytest.mark.parametrize("extra, pattern", [
    (["--area", "40000,40000,40100,40100"], r"--area: the area lies outside the data"),
    (["--area", "0,0,inf,5"], r"--area: xmin,ymin,xmax,ymax must be four finite numbers"),
    (["--simulate", "5", "--cell", "1"], r"--simulate: \d+ targets; joint simulation is for at most"),
])
def test_bad_area_or_simulation_refused_before_predicting(tmp_path, capsys, monkeypatch, extra, pattern):
    """An area far from the data, a non-finite rectangle and a too-large joint simulation are refused
    before the grid is predicted (the prediction is replaced by a function that fails if called),
    with one line and nothing written (behaviour check)."""
    import bayesgeo.predict.prediction as pr
    from _cli_helpers import assert_refused

    def never(*a, **kw):
        raise AssertionError("predicted before refusing")

    monkeypatch.setattr(pr, "predict_targets", never)
    folder, _ = _fit_folder(tmp_path / "fit")
    assert_refused(capsys, ["map", folder, "--draws", "20", *extra], "map", pattern, inputs=[folder],
                   absent=[folder / "predictions.nc", folder / "maps"])
