"""Categorical covariates in the trend (bayesgeo.data.categories, bayesgeo.explore.trend): treatment coding,
the baseline, the refusals, the trend coefficients against generalised least squares, and prediction with
categories at target points and on a grid from a zone polygon layer.

The data are an invented scenario: an allotment on made-up ground of three types ("fill", "native",
"peat"), with a simulated field on top. Section numbers of the books cited are from memory.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
import xarray as xr
from _cli_helpers import assert_refused
from scipy import linalg
from scipy.spatial.distance import cdist

from bayesgeo.cli import main
from bayesgeo.common.validate import InputError
from bayesgeo.data.categories import MIN_LEVEL_POINTS, zone_categories
from bayesgeo.data.demo import simulate_field
from bayesgeo.data.points import points_dataset, read_points
from bayesgeo.data.targets import grid_targets, read_target_points, zone_grid
from bayesgeo.explore.trend import (
    design_at,
    design_categories,
    design_matrix,
    fit_trend,
)
from bayesgeo.fitting.model import FitSpec, model_inputs
from bayesgeo.gp.trend_posterior import draw_trend

EFFECT = {"fill": 1.5, "native": 0.0, "peat": -0.8}


def _ground(x, y):
    """Ground type by position: fill in the west, peat in the north-east, native elsewhere."""
    return np.where(x < 120.0, "fill", np.where(y > 250.0, "peat", "native"))


def _data(n=60, seed=3):
    rng = np.random.default_rng(seed)
    xy = rng.random((n, 2)) * 400.0
    ground = _ground(xy[:, 0], xy[:, 1])
    z = simulate_field(xy, covariance="exponential", practical_range=120.0, partial_sill=1.0, nugget=0.25,
                       mean=3.0, rng=rng) + 0.002 * xy[:, 0] + np.vectorize(EFFECT.get)(ground)
    return xy, ground, z


def _csv(path, xy, z, extra: dict):
    names = list(extra)
    lines = [",".join(["x", "y", "value", *names])]
    for i in range(len(z)):
        cells = [f"{xy[i, 0]:.3f}", f"{xy[i, 1]:.3f}", f"{z[i]:.5f}", *(str(extra[c][i]) for c in names)]
        lines.append(",".join(cells))
    path.write_text("\n".join(lines) + "\n")
    return path


def test_treatment_coding_matches_sklearn_one_hot_with_the_baseline_dropped(tmp_path):
    """The category's columns equal an explicit dummy matrix: scikit-learn's OneHotEncoder with the baseline
    dropped (reference library), levels in sorted order, 0/1 (not centred or scaled); the intercept and
    polynomial columns are those of the trend without the category (treatment coding, Chambers and Hastie
    1992, sec. 2.3.2)."""
    from sklearn.preprocessing import OneHotEncoder

    xy, ground, z = _data()
    ds = read_points(_csv(tmp_path / "plot.csv", xy, z, {"ground": ground}), categories=["ground"],
                     baselines=["ground=native"])
    design = design_matrix(ds, 1, ["ground"])
    enc = OneHotEncoder(categories=[["fill", "native", "peat"]], drop=["native"], sparse_output=False)
    ref = enc.fit_transform(ground.reshape(-1, 1))
    assert design.attrs["terms"] == ["1", "x", "y", "ground=fill", "ground=peat"]
    np.testing.assert_array_equal(design.values[:, 3:], ref)
    np.testing.assert_allclose(design.values[:, :3], design_matrix(ds, 1).values)


def test_baseline_default_is_the_most_frequent_level_and_is_recorded(tmp_path):
    """Default baseline: the most frequent level (ties: first sorted; our documented choice); a named one
    wins; the baseline and levels are recorded on the variable, in the design attributes and in a fit's
    settings (JSON round trip of FitSpec), and survive a NetCDF round trip of the data."""
    xy, ground, z = _data()
    counts = {lv: int(np.sum(ground == lv)) for lv in EFFECT}
    most = max(sorted(counts), key=counts.get)
    path = _csv(tmp_path / "plot.csv", xy, z, {"ground": ground})
    ds = read_points(path, categories=["ground"])
    assert ds["ground"].attrs["baseline"] == most
    assert f"ground={most}" not in design_matrix(ds, 0, ["ground"]).attrs["terms"]
    ds = read_points(path, categories=["ground"], baselines=["ground=peat"])
    design = design_matrix(ds, 0, ["ground"])
    assert design_categories(design.attrs) == {"ground": {"levels": ["fill", "native", "peat"], "baseline": "peat"}}
    spec, *_ = model_inputs(ds, covariance="exponential", covariates=["ground"])
    back = FitSpec.from_dict(json.loads(spec.to_json()))
    assert design_categories(back.design_attrs)["ground"]["baseline"] == "peat"
    assert list(back.terms) == ["1", "ground=fill", "ground=native"]
    ds.to_netcdf(tmp_path / "plot.nc")
    again = read_points(tmp_path / "plot.nc")
    assert design_matrix(again, 0, ["ground"]).attrs["terms"] == design.attrs["terms"]
    np.testing.assert_array_equal(design_matrix(again, 0, ["ground"]).values, design.values)
    tied = points_dataset(np.arange(10.0), np.arange(10.0) ** 2, np.ones(10),
                          categories={"g": np.array(["b"] * 5 + ["a"] * 5)})
    assert tied["g"].attrs["baseline"] == "a"


def test_trend_coefficients_equal_statsmodels_gls_at_fixed_covariance():
    """With the covariance parameters fixed, the trend coefficients bayesgeo draws after sampling
    (bayesgeo.gp.trend_posterior.draw_trend, with a flat prior on them: beta_sd = 1e6) are centred on the
    generalised least squares estimate beta = (X' K^-1 X)^-1 X' K^-1 z, with covariance (X' K^-1 X)^-1
    (Aitken 1935; e.g. Cressie 1993, sec. 3.4.3). References: statsmodels GLS (params and
    normalized_cov_params) and the same formula with scipy's Cholesky solve. K is built here from the
    exponential correlation exp(-d / phi) (scipy cdist) plus the nugget on the diagonal; X uses raw
    coordinates and an explicit 0/1 dummy per non-baseline level, so only the category coefficients (which do
    not depend on how the other columns are scaled) are compared. The mean and the factor of the draws are
    recovered exactly by regressing the draws on the standard normals draw_trend documents it uses
    (numpy default_rng(seed), drawn up front in draw order). Tolerance 1e-5 relative: bayesgeo adds a jitter
    of 1e-6 x the partial sill to K's diagonal (bayesgeo.gp.dense, jitter policy), which the reference
    leaves out."""
    import statsmodels.api as sm

    xy, ground, z = _data()
    ds = points_dataset(xy[:, 0], xy[:, 1], z, categories={"ground": ground},
                        attrs={"source": "plot.csv", "distance_units": "m"})
    spec, y, design, dist = model_inputs(ds, covariance="exponential", trend=1, covariates=["ground"])
    prange, psill, nug = 120.0, 1.0, 0.25
    spec = dataclasses.replace(spec, priors=dataclasses.replace(spec.priors, beta_sd=1e6))
    p = design.shape[1]
    n_draws, seed = 3 * p, 11
    post = xr.Dataset({k: (("chain", "draw"), np.full((1, n_draws), v)) for k, v in
                       {"practical_range_z": prange / spec.distance_scale, "sd_z": np.sqrt(psill) / spec.value_sd,
                        "nugget_sd_z": np.sqrt(nug) / spec.value_sd}.items()},
                      coords={"chain": [0], "draw": np.arange(n_draws)})
    draws = draw_trend(post, spec, y, design.values, dist, seed=seed, workers=1).values.reshape(n_draws, p)
    normals = np.random.default_rng(seed).standard_normal((n_draws, p))
    coef, *_ = np.linalg.lstsq(np.column_stack([np.ones(n_draws), normals]), draws, rcond=None)
    mean_z, factor = coef[0], coef[1:].T
    np.testing.assert_allclose(np.column_stack([np.ones(n_draws), normals]) @ coef, draws, atol=1e-9)
    terms = list(spec.terms)
    cat = [terms.index("ground=fill"), terms.index("ground=peat")]
    got = mean_z[cat] * spec.value_sd  # data units
    got_cov = (factor @ factor.T)[np.ix_(cat, cat)] * spec.value_sd**2

    phi = prange / spec.range_factor
    k = psill * np.exp(-cdist(xy, xy) / phi) + nug * np.eye(len(z))
    base = ds["ground"].attrs["baseline"]
    assert base == "native"
    x = np.column_stack([np.ones(len(z)), xy, ground == "fill", ground == "peat"]).astype(float)
    res = sm.GLS(z, x, sigma=k).fit()
    np.testing.assert_allclose(got, res.params[3:], rtol=1e-5)
    np.testing.assert_allclose(got_cov, res.normalized_cov_params[3:, 3:], rtol=1e-5)
    lk = linalg.cho_factor(k)
    beta = np.linalg.solve(x.T @ linalg.cho_solve(lk, x), x.T @ linalg.cho_solve(lk, z))
    np.testing.assert_allclose(got, beta[3:], rtol=1e-5)


def test_too_few_points_in_a_level_is_refused_naming_file_and_column():
    """A level with fewer than MIN_LEVEL_POINTS (5, our documented threshold) points, or a single level, is
    refused in one line naming the file, the column and the rows."""
    xy, ground, z = _data()
    ground = ground.copy()
    peat = np.flatnonzero(ground == "peat")
    ground[peat[MIN_LEVEL_POINTS - 1:]] = "native"  # keep 4 peat points
    ds = points_dataset(xy[:, 0], xy[:, 1], z, categories={"ground": ground}, attrs={"source": "plot.csv"})
    with pytest.raises(InputError, match=r"^plot\.csv: category column 'ground': level 'peat' has 4 points \(rows "):
        design_matrix(ds, 0, ["ground"])
    one = points_dataset(xy[:, 0], xy[:, 1], z, categories={"ground": np.full(len(z), "fill")},
                         attrs={"source": "plot.csv"})
    with pytest.raises(InputError, match=r"plot\.csv: category column 'ground' has one level"):
        design_matrix(one, 0, ["ground"])


def test_collinear_categories_are_refused():
    """Rank-deficient designs (linear algebra: a column that is a combination of others) are refused naming
    the category: the same partition under two names, a category whose indicator repeats a numeric
    covariate, and a category that follows the polynomial trend (points on two vertical lines, the
    level set by the line, trend order 1)."""
    xy, ground, z = _data()
    twin = np.vectorize({"fill": "A", "native": "B", "peat": "C"}.get)(ground)
    ds = points_dataset(xy[:, 0], xy[:, 1], z, categories={"ground": ground, "unit": twin},
                        covariates={"fill_flag": (ground == "fill").astype(float)}, attrs={"source": "plot.csv"})
    with pytest.raises(InputError, match=r"plot\.csv: category column 'unit' is collinear with"):
        design_matrix(ds, 0, ["ground", "unit"])
    with pytest.raises(InputError, match=r"category column 'ground' is collinear .* ground=fill"):
        design_matrix(ds, 0, ["fill_flag", "ground"])
    x = np.repeat([0.0, 100.0], 10)
    lines = points_dataset(x, np.tile(np.arange(10.0), 2), np.arange(20.0),
                           categories={"side": np.where(x > 0, "east", "west")}, attrs={"source": "lines.csv"})
    design_matrix(lines, 0, ["side"])  # identifiable with a constant mean
    with pytest.raises(InputError, match=r"lines\.csv: category column 'side' is collinear"):
        fit_trend(lines, 1, ["side"])


def test_unknown_or_missing_level_at_target_points_is_refused(tmp_path):
    """Target points must carry a level the fit has seen: another level or an empty cell is refused in one
    line naming the file, the rows and the column; known levels are read as labels."""
    pts = tmp_path / "targets.csv"
    pts.write_text("x,y,ground\n1,2,fill\n3,4, peat \n5,6,gravel\n")
    with pytest.raises(InputError, match=r"targets\.csv: column 'ground': level 'gravel' at rows 4 is not one the "
                                         r"fit has seen \(levels: fill, native, peat\)"):
        read_target_points(pts, categories={"ground": ["fill", "native", "peat"]})
    pts.write_text("x,y,ground\n1,2,fill\n3,4,\n")
    with pytest.raises(InputError, match=r"empty cells in category column 'ground' at rows 3"):
        read_target_points(pts, categories={"ground": ["fill", "native", "peat"]})
    pts.write_text("x,y,ground\n1,2,fill\n3,4, peat \n")
    got = read_target_points(pts, categories={"ground": ["fill", "native", "peat"]})
    assert got["ground"].values.tolist() == ["fill", "peat"]
    attrs = design_matrix(points_dataset(*_data()[0].T, _data()[2], categories={"ground": _data()[1]}),
                          0, ["ground"]).attrs
    np.testing.assert_array_equal(design_at(np.zeros((2, 2)), attrs, {"ground": got["ground"].values}),
                                  [[1.0, 1.0, 0.0], [1.0, 0.0, 1.0]])


def _zones(path, *, extra=None, crs="EPSG:32633"):
    """Three polygons as a GeoPackage (pyogrio): fill x < 120, native and peat split at y = 250 east of it;
    the strip x > 372 is in no polygon."""
    import shapely
    from pyogrio.raw import write

    polys = [shapely.box(-50, -50, 120, 450), shapely.box(120, -50, 372, 250), shapely.box(120, 250, 372, 450)]
    labels = ["fill", "native", "peat"]
    if extra is not None:
        polys.append(extra[0])
        labels.append(extra[1])
    write(path, shapely.to_wkb(polys), field_data=[np.array(labels, dtype=object)], fields=["ground"],
          geometry_type="Polygon", crs=crs, driver="GPKG")
    return path, polys, labels


def test_grid_cells_take_the_category_of_the_polygon_holding_their_centre(tmp_path):
    """Each grid cell takes the level of the polygon that contains its centre, checked cell by cell against
    shapely's Polygon.contains (reference library; no centre lies on an edge here); cells in no polygon are
    masked out and counted; an unknown level on a polygon holding a cell and a CRS other than the fit's are
    refused in one line."""
    import shapely

    path, polys, labels = _zones(tmp_path / "zones.gpkg")
    grid = grid_targets(np.array([[0.0, 0.0], [400.0, 400.0]]), cell=15.0)
    levels = {"ground": ["fill", "native", "peat"]}
    got = zone_grid(grid, path, levels, crs="EPSG:32633")
    xx, yy = np.meshgrid(grid["x"].values, grid["y"].values)
    expect = np.full(xx.shape, "", dtype=object)
    for (i, j), _ in np.ndenumerate(xx):
        hold = [lb for poly, lb in zip(polys, labels) if poly.contains(shapely.Point(xx[i, j], yy[i, j]))]
        assert len(hold) <= 1
        expect[i, j] = hold[0] if hold else ""
    np.testing.assert_array_equal(got["ground"].values, expect.astype(str))
    np.testing.assert_array_equal(got["inside"].values, expect != "")
    assert got.attrs["cells_outside_zones"] == int(np.sum(expect == "")) > 0
    bad, *_ = _zones(tmp_path / "gravel.gpkg", extra=(shapely.box(372, 0, 450, 100), "gravel"))
    with pytest.raises(InputError, match=r"gravel\.gpkg: column 'ground': level 'gravel' at rows 5 is not one"):
        zone_categories(bad, np.column_stack([xx.ravel(), yy.ravel()]), levels)
    with pytest.raises(InputError, match=r"zones\.gpkg: the zone layer's CRS .* is not the fit's"):
        zone_grid(grid, path, levels, crs="EPSG:4326")


# --- the command line --------------------------------------------------------------------------------


def _fit_folder(folder, tmp_path, covariates=("ground",)):
    """A fit folder with a categorical trend, built without sampling (the layout bayesgeo.fitting.posterior.fit
    writes): parameter draws scattered around the simulation's values, coefficients from draw_trend. Returns
    the folder, the data file and the posterior mean of the fill coefficient (data units)."""
    from conftest import write_fit_folder

    from bayesgeo.fitting.posterior import derive

    xy, ground, z = _data()
    path = _csv(tmp_path / "plot.csv", xy, z, {"ground": ground})
    ds = read_points(path, categories=["ground"], distance_units="m", coords="xy")
    spec, y, design, dist = model_inputs(ds, covariance="exponential", trend=0, covariates=list(covariates))
    rng = np.random.default_rng(2)
    shape = (2, 100)
    post = xr.Dataset({
        "practical_range_z": (("chain", "draw"),
                              120.0 / spec.distance_scale * np.exp(0.1 * rng.standard_normal(shape))),
        "sd_z": (("chain", "draw"), 1.0 / spec.value_sd * np.exp(0.1 * rng.standard_normal(shape))),
        "nugget_sd_z": (("chain", "draw"), 0.5 / spec.value_sd * np.exp(0.1 * rng.standard_normal(shape))),
    }, coords={"chain": [0, 1], "draw": np.arange(100)})
    post["beta_z"] = draw_trend(post, spec, y, design.values, dist, seed=1)
    stats = xr.Dataset({"diverging": (("chain", "draw"), np.zeros(shape, bool)),
                        "energy": (("chain", "draw"), rng.standard_normal(shape))},
                       coords={"chain": [0, 1], "draw": np.arange(100)})
    tree = xr.DataTree.from_dict({
        "posterior": derive(post, spec), "sample_stats": stats,
        "observed_data": xr.Dataset({"value": ("obs", ds["value"].values)}),
        "constant_data": xr.Dataset({"x": ("obs", ds["x"].values), "y": ("obs", ds["y"].values),
                                     "design": (("obs", "term"), design.values)}, coords={"term": list(spec.terms)})})
    from pyproj import CRS

    crs = CRS.from_epsg(32633)
    tree.attrs["settings"] = json.dumps({"model": spec.to_dict(), "data": {"crs": crs.to_wkt(), "crs_name": crs.name}})
    write_fit_folder(tree, folder)
    fill = float(post["beta_z"].sel(term="ground=fill").mean()) * spec.value_sd if covariates else None
    return folder, path, fill


def test_map_at_points_and_on_a_zoned_grid(tmp_path, capsys):
    """bayesgeo map with a categorical trend: at target points carrying the level, and on a grid whose cells
    take their level from a zone layer (cells in no polygon left out, NaN in predictions.nc, and said so).
    At one location, the predictive mean with level fill minus that with the baseline equals the posterior
    mean of the fill coefficient: each draw's kriging mean is f' beta + k' K^-1 (z - F beta) (universal
    kriging with known beta, e.g. Cressie 1993, sec. 3.4.5), whose second term does not depend on the
    target's level, and the map averages the draws (all of them here)."""
    folder, _, fill = _fit_folder(tmp_path / "fit", tmp_path)
    pts = tmp_path / "targets.csv"
    pts.write_text("x,y,ground\n200,100,fill\n200,100,native\n")
    capsys.readouterr()
    assert main(["map", str(folder), "--points", str(pts), "--draws", "all", "--no-figures", "--json"]) == 0
    pred = xr.load_dataset(folder / "predictions.nc")
    np.testing.assert_allclose(pred["mean"].values[0] - pred["mean"].values[1], fill, rtol=1e-6)
    zones, *_ = _zones(tmp_path / "zones.gpkg")
    capsys.readouterr()
    assert main(["map", str(folder), "--zones", str(zones), "--cell", "20", "--draws", "20", "--no-figures",
                 "--overwrite", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    grid = xr.load_dataset(folder / "predictions.nc")
    outside = int(np.isnan(grid["mean"].values).sum())
    assert out["zones"]["cells_outside"] == outside > 0 and "left out of the map" in out["zones"]["note"]
    assert out["cells"] == grid["mean"].size - outside


def test_cli_refusals_exit_2_in_one_line(tmp_path, capsys):
    """Refusals through the command line: exit status 2, one line naming the file and column, no traceback,
    inputs untouched (house rule): too few points in a level (fit), collinear categories (explore), an unknown
    level at target points (map), a grid without zones for a categorical trend (map), and zones for a fit
    without categories."""
    folder, data, _ = _fit_folder(tmp_path / "fit", tmp_path)
    plain, *_ = _fit_folder(tmp_path / "plain", tmp_path, covariates=())
    xy, ground, z = _data()
    few = ground.copy()
    few[np.flatnonzero(few == "peat")[3:]] = "native"
    thin = _csv(tmp_path / "thin.csv", xy, z, {"ground": few})
    assert_refused(capsys, ["fit", thin, "--category", "ground", "--covariance", "exponential", "--out",
                            tmp_path / "f2"], "fit", r"thin\.csv: category column 'ground': level 'peat' has 3 points",
                   inputs=[thin])
    twin = _csv(tmp_path / "twin.csv", xy, z, {"ground": ground, "unit": np.char.upper(ground.astype(str))})
    assert_refused(capsys, ["explore", twin, "--category", "ground", "--category", "unit", "--out", tmp_path / "e"],
                   "explore", r"twin\.csv: category column 'unit' is collinear", inputs=[twin])
    pts = tmp_path / "targets.csv"
    pts.write_text("x,y,ground\n1,2,fill\n3,4,gravel\n")
    assert_refused(capsys, ["map", folder, "--points", pts, "--no-figures"], "map",
                   r"targets\.csv: column 'ground': level 'gravel' at rows 3 is not one the fit has seen",
                   inputs=[pts, data])
    assert_refused(capsys, ["map", folder, "--no-figures", "--draws", "5"], "map",
                   r"the trend uses categories \(ground\) that are not known on a grid; give --zones")
    zones, *_ = _zones(tmp_path / "zones.gpkg")
    assert_refused(capsys, ["map", plain, "--zones", zones, "--no-figures"], "map",
                   r"--zones: the fit's trend has no categorical covariate", inputs=[zones])
    assert_refused(capsys, ["fit", data, "--baseline", "ground=peat", "--covariance", "exponential", "--out",
                            tmp_path / "f3"], "fit", r"--baseline: 'ground' is not a category column")


def test_fit_records_the_baseline_and_maps_points(tmp_path, capsys):
    """End to end with a real (short) nutpie fit: bayesgeo fit with --category and --baseline records the
    levels and baseline in the saved fit and states them in the summary; the fitted difference of fill from
    native lies near the simulated +1.5 (within 4 posterior sds: the simulation's truth, one data set), and
    bayesgeo map --points predicts at target points carrying the level."""
    from bayesgeo.fitting.fitted import Fit

    xy, ground, z = _data(n=80, seed=4)
    data = _csv(tmp_path / "plot.csv", xy, z, {"ground": ground})
    capsys.readouterr()
    code = main(["fit", str(data), "--category", "ground", "--baseline", "ground=native", "--covariance",
                 "exponential", "--chains", "2", "--draws", "150", "--tune", "150", "--max-draws", "150",
                 "--seed", "3", "--out", str(tmp_path / "fit"), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code in (0, 3)
    assert report["model"]["categories"] == {"ground": {"levels": ["fill", "native", "peat"], "baseline": "native"}}
    fit = Fit.read(tmp_path / "fit")
    assert list(fit.spec.terms) == ["1", "ground=fill", "ground=peat"]
    assert design_categories(fit.spec.design_attrs)["ground"]["baseline"] == "native"
    beta = report["parameters"]["beta[ground=fill]"]
    assert abs(beta["mean"] - EFFECT["fill"]) < 4 * beta["sd"]
    assert "category ground: baseline 'native'" in (tmp_path / "fit" / "summary.txt").read_text()
    pts = tmp_path / "targets.csv"
    pts.write_text("x,y,ground\n50,50,fill\n300,300,peat\n")
    capsys.readouterr()
    assert main(["map", str(tmp_path / "fit"), "--points", str(pts), "--draws", "40", "--no-figures",
                 "--allow-unconverged", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["cells"] == 2


STUDY = """\
[data]
path = "plot.csv"
distance_units = "m"
coords = "xy"
categories = ["ground"]
baselines = ["ground=native"]

[model]
covariance = "exponential"
covariates = ["ground"]

[prediction]
points = "targets.csv"
"""


def test_study_file_categories_become_the_recorded_options(tmp_path):
    """A study file's [data] categories and baselines reach the fit and explore stages, and the command each
    stage records parses (argparse, the reference) to the same read settings; a baseline of a column that
    is not a category is refused naming the key."""
    from bayesgeo.cli import _build_parser
    from bayesgeo.cli._common import data_kwargs
    from bayesgeo.study.runner import stage_calls, stage_commands
    from bayesgeo.study.settings import read_study

    xy, ground, z = _data()
    _csv(tmp_path / "plot.csv", xy, z, {"ground": ground})
    (tmp_path / "targets.csv").write_text("x,y,ground\n1,2,fill\n")
    path = tmp_path / "study.toml"
    path.write_text(STUDY)
    study = read_study(path)
    calls, cmds = stage_calls(study, tmp_path / "run"), stage_commands(study, tmp_path / "run")
    parser = _build_parser()
    for name in ("explore", "fit:exponential"):
        kw = calls[name][1]
        assert kw["categories"] == ["ground"] and kw["baselines"] == ["ground=native"] and kw["covariates"] == []
        got = data_kwargs(parser.parse_args(cmds[name]))
        assert {k: got[k] for k in ("categories", "baselines", "covariates")} == {
            k: kw[k] for k in ("categories", "baselines", "covariates")}
    path.write_text(STUDY.replace('baselines = ["ground=native"]', 'baselines = ["soil=native"]'))
    with pytest.raises(InputError, match=r"baselines.*'soil=native': expected \"COL=LEVEL\" with COL in categories"):
        read_study(path)


def test_several_site_fit_with_a_category(tmp_path):
    """Two sites of one file share the category's levels and baseline (read once from the whole file); each
    site's trend gets its own level effects; the saved fit keeps the labels, and a site's view predicts at
    target points that carry the level (a short nutpie fit, a smoke check of the machinery)."""
    from bayesgeo.fitting.fitted import Fit
    from bayesgeo.fitting.hierarchical import fit_sites, site_fit
    from bayesgeo.predict.prediction import basis_from_fit, predict_targets

    xy1, g1, z1 = _data(seed=3)
    xy2, g2, z2 = _data(seed=4)
    xy = np.vstack([xy1, xy2 + [2000.0, 0.0]])
    path = _csv(tmp_path / "two.csv", xy, np.concatenate([z1, z2]),
                {"ground": np.concatenate([g1, g2]), "plot": ["a"] * 60 + ["b"] * 60})
    ds = read_points(path, categories=["ground"], site="plot", distance_units="m", coords="xy")
    tree = fit_sites(ds, covariance="exponential", covariates=["ground"], chains=2, draws=100, tune=100, seed=1,
                     max_draws=100)
    assert tree["posterior"]["beta_z"].sizes["site"] == 2
    assert "ground=fill" in list(tree["posterior"]["term"].values)
    assert tree["constant_data"]["ground"].dtype.kind in "USO"
    folder = tmp_path / "fit"
    from conftest import write_fit_folder

    write_fit_folder(tree, folder)
    view = site_fit(Fit.read(folder).tree, "b")
    basis, spec, _ = basis_from_fit(view, draws=10)
    targets = xr.Dataset(coords={"x": ("target", [2100.0, 2300.0]), "y": ("target", [100.0, 300.0])})
    targets["ground"] = ("target", np.array(["fill", "peat"], dtype=object))
    targets["inside"] = ("target", np.ones(2, bool))
    targets.attrs["kind"] = "points"
    pred = predict_targets(basis, targets, design_attrs=spec.design_attrs)
    assert np.all(np.isfinite(pred["mean"].values))
