"""Prediction files as georeferenced rasters: what GDAL and rioxarray read from them.

Sources: GDAL's NetCDF driver (through rasterio) and rioxarray, the readers of QGIS and of Python GIS
work, read the files bayesgeo writes; the CF conventions 1.8 (sections 4 and 5.6: coordinate
``standard_name``/``axis``, grid-mapping variables with ``crs_wkt``); pyproj's EPSG database for the CRS;
north-up rows (first row northernmost) are common practice for rasters.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr

rasterio = pytest.importorskip("rasterio")
pyproj = pytest.importorskip("pyproj")

from bayesgeo.predict.cf import georeferenced  # noqa: E402


def _grid_predictions(x0=500_000.0, y0=4_100_000.0, cell=25.0, nx=6, ny=4):
    """A prediction-like grid in bayesgeo's in-memory layout (y ascending, as the map stage makes it)."""
    x = x0 + cell * (np.arange(nx) + 0.5)
    y = y0 + cell * (np.arange(ny) + 0.5)
    mean = np.add.outer(np.arange(ny) * 10.0, np.arange(nx))  # row j (south to north) holds 10 j + i
    ds = xr.Dataset({"mean": (("y", "x"), mean, {"units": "mg/kg"}),
                     "p_exceed": (("threshold", "y", "x"), mean[None] / mean.max(), {"units": "1"})},
                    coords={"x": x, "y": y, "threshold": [50.0]})
    ds.attrs.update(Conventions="CF-1.8", value_transform="log")
    return ds, (x0, y0, cell, nx, ny)


def test_gdal_reads_the_crs_corners_and_north_up_rows(tmp_path):
    """GDAL (rasterio, NETCDF:file:variable) finds the CRS EPSG:32633, the grid's outer corners (cell centres
    -+ half a cell) and a north-up geotransform, with the northernmost row first."""
    ds, (x0, y0, cell, nx, ny) = _grid_predictions()
    crs = pyproj.CRS.from_epsg(32633)
    path = tmp_path / "predictions.nc"
    georeferenced(ds, crs_wkt=crs.to_wkt(), coords="xy", distance_units="m").to_netcdf(path)
    with rasterio.open(f"NETCDF:{path}:mean") as src:
        assert pyproj.CRS.from_user_input(src.crs.to_wkt()).equals(crs)
        left, bottom, right, top = src.bounds
        assert (left, bottom, right, top) == pytest.approx((x0, y0, x0 + nx * cell, y0 + ny * cell))
        assert src.transform.e < 0 and src.transform.a == pytest.approx(cell)
        band = src.read(1)
    np.testing.assert_array_equal(band[0], ds["mean"].values[-1])  # first row = northernmost


def test_rioxarray_reads_crs_and_transform(tmp_path):
    """xarray + rioxarray (``decode_coords="all"``, the ``.rio`` accessor) find the CRS and the affine transform (no
    attribute named ``transform`` gets in their way)."""
    rioxarray = pytest.importorskip("rioxarray")
    ds, (x0, y0, cell, nx, ny) = _grid_predictions()
    path = tmp_path / "predictions.nc"
    georeferenced(ds, crs_wkt=pyproj.CRS.from_epsg(32633).to_wkt(), distance_units="m").to_netcdf(path)
    assert rioxarray.__version__
    with xr.open_dataset(path, decode_coords="all") as opened:  # rioxarray's own reading of the CF attributes
        da = opened["mean"]
        assert da.rio.crs.to_epsg() == 32633
        t = da.rio.transform()
        assert (t.c, t.f, t.a, t.e) == pytest.approx((x0, y0 + ny * cell, cell, -cell))


def test_cf_attributes_of_coordinates_and_grid_mapping():
    """CF 1.8: x/y carry standard_name, units and axis; the grid-mapping variable carries crs_wkt and the data
    variables name it; lon/lat grids say longitude/latitude in degrees_east/north; without a CRS no grid
    mapping is invented."""
    ds, _ = _grid_predictions()
    out = georeferenced(ds, crs_wkt=pyproj.CRS.from_epsg(32633).to_wkt(), distance_units="m")
    assert out["x"].attrs["standard_name"] == "projection_x_coordinate" and out["x"].attrs["axis"] == "X"
    assert out["y"].attrs["units"] == "m" and out["y"].attrs["axis"] == "Y"
    assert out["crs"].attrs["grid_mapping_name"] == "transverse_mercator" and "crs_wkt" in out["crs"].attrs
    assert out["mean"].attrs["grid_mapping"] == "crs" and out["p_exceed"].attrs["grid_mapping"] == "crs"
    assert "transform" not in out.attrs
    ll = georeferenced(ds, crs_wkt=pyproj.CRS.from_epsg(4326).to_wkt(), coords="lonlat")
    assert ll["x"].attrs["units"] == "degrees_east" and ll["y"].attrs["standard_name"] == "latitude"
    bare = georeferenced(ds, coords="xy", distance_units="coordinate units")
    assert "crs" not in bare and "units" not in bare["x"].attrs and "grid_mapping" not in bare["mean"].attrs


def test_map_command_writes_a_georeferenced_grid(tmp_path, capsys):
    """``bayesgeo map`` on a fit whose data were in EPSG:32632 (the invented demo parcel's coordinates read as
    UTM zone 32N) writes predictions.nc that GDAL opens with that CRS, 20 m cells, north-up, and corners on the
    grid of cell centres the command reports."""
    from test_cli_map import _fit_folder

    from bayesgeo.cli import main

    crs = pyproj.CRS.from_epsg(32632)
    folder, _ = _fit_folder(tmp_path / "fit", data={"crs": crs.to_wkt(), "crs_name": "EPSG:32632 (WGS 84 / UTM zone "
                                                                                      "32N)"})
    assert main(["map", str(folder), "--cell", "20", "--draws", "10", "--no-figures", "--json"]) == 0
    capsys.readouterr()
    path = folder / "predictions.nc"
    with xr.open_dataset(path) as pred:
        x, y = pred["x"].values, pred["y"].values
        assert pred.attrs["crs_name"].startswith("EPSG:32632") and "transform" not in pred.attrs
    assert y[0] > y[-1]
    with rasterio.open(f"NETCDF:{path}:mean") as src:
        assert src.crs.to_epsg() == 32632
        assert src.transform.a == pytest.approx(20.0) and src.transform.e == pytest.approx(-20.0)
        assert (src.bounds.left, src.bounds.top) == pytest.approx((x.min() - 10.0, y.max() + 10.0))


def test_geotiffs_carry_the_grid_and_its_crs(tmp_path):
    """Each GeoTIFF opened with rasterio has the CRS, the affine transform GDAL reads from the NetCDF file, and
    the predicted values row for row (north-up); thresholds get one file each."""
    from bayesgeo.predict.gis_export import write_geotiffs

    ds, _ = _grid_predictions()
    for name in ("sd", "q05", "q50", "q95"):
        ds[name] = ds["mean"] + 1.0
    geo = georeferenced(ds, crs_wkt=pyproj.CRS.from_epsg(32633).to_wkt(), distance_units="m")
    geo.to_netcdf(tmp_path / "p.nc")
    written = write_geotiffs(geo, tmp_path)
    assert [p.name for p in written] == ["mean.tif", "sd.tif", "q05.tif", "q50.tif", "q95.tif", "p_exceed_50.tif"]
    with rasterio.open(f"NETCDF:{tmp_path / 'p.nc'}:mean") as nc, rasterio.open(tmp_path / "mean.tif") as tif:
        assert tif.crs.to_epsg() == 32633 and tif.transform == nc.transform
        np.testing.assert_array_equal(tif.read(1), nc.read(1).astype(np.float32))
    with rasterio.open(tmp_path / "p_exceed_50.tif") as tif:
        np.testing.assert_allclose(tif.read(1), ds["p_exceed"].values[0, ::-1], rtol=1e-6)


def test_exceedance_polygons_cover_exactly_the_cells_above_each_level(tmp_path):
    """The polygons of P(exceed) >= 0.5 and >= 0.9 are the union of those cells: their shapely area equals the
    number of cells times the cell area, every cell centre above the level lies inside and every other one
    outside; lon/lat areas are pyproj's geodesic areas (Geod.geometry_area_perimeter, Karney 2013). The
    GeoPackage (read back with pyogrio) holds the polygons and the samples with their non-detect flags."""
    import shapely
    from pyogrio.raw import read

    from bayesgeo.predict.gis_export import exceedance_polygons, write_geopackage

    ds, (x0, y0, cell, nx, ny) = _grid_predictions()
    geo = georeferenced(ds, crs_wkt=pyproj.CRS.from_epsg(32633).to_wkt(), distance_units="m")
    prob = geo["p_exceed"].values[0]
    xx, yy = np.meshgrid(geo["x"].values, geo["y"].values)
    polys = exceedance_polygons(geo)
    assert [p["cells"] for p in polys] == [int((prob >= 0.5).sum()), int((prob >= 0.9).sum())] and polys[1]["cells"] > 0
    for p in polys:
        above = prob >= p["level"]
        assert p["cells"] == above.sum() and p["area"] == pytest.approx(above.sum() * cell**2)
        assert p["geometry"].area == pytest.approx(p["area"]) and p["area_units"] == "m2"
        inside = shapely.contains_xy(p["geometry"], xx, yy)
        np.testing.assert_array_equal(inside, above)
    samples = xr.Dataset({"x": ("obs", [x0 + 10, x0 + 60]), "y": ("obs", [y0 + 5, y0 + 80]),
                          "value": ("obs", [1.5, 0.5]), "censored": ("obs", [False, True])},
                         coords={"row": ("obs", [2, 3])})
    path = write_geopackage(tmp_path / "map.gpkg", geo, samples=samples)
    meta, _, geom, fields = read(path, layer="samples")
    np.testing.assert_allclose(shapely.get_x(shapely.from_wkb(geom)), samples["x"].values)
    assert list(fields[list(meta["fields"]).index("non_detect")]) == [0, 1]
    meta, _, geom, fields = read(path, layer="exceedance")
    assert pyproj.CRS.from_user_input(meta["crs"]).to_epsg() == 32633 and len(geom) == 2
    lon = np.array([10.0, 10.01, 10.02]); lat = np.array([45.0, 45.01])
    ll = xr.Dataset({"p_exceed": (("threshold", "y", "x"), np.ones((1, 2, 3)))},
                    coords={"x": lon, "y": lat, "threshold": [1.0]})
    p = exceedance_polygons(georeferenced(ll, crs_wkt=pyproj.CRS.from_epsg(4326).to_wkt(), coords="lonlat"))[0]
    box = shapely.box(9.995, 44.995, 10.025, 45.015)
    assert p["area"] == pytest.approx(abs(pyproj.Geod(ellps="WGS84").geometry_area_perimeter(box)[0]), rel=1e-9)


def test_maps_carry_crs_north_arrow_scale_bar_and_decision_contours():
    """Map furniture a reader of a regulatory map expects (common practice in cartography): the CRS's name, a
    north arrow, a scale bar in the distance unit, a colour bar saying what is shown in words and units, and on
    an exceedance map the contours P = 0.5 and P = 0.9 (matplotlib's contour levels)."""
    from matplotlib.contour import ContourSet
    from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

    from bayesgeo.predict.figures import map_figure

    x, y = 431_000 + 10.0 * np.arange(40), 5_622_000 + 10.0 * np.arange(30)
    xx, yy = np.meshgrid(x, y)
    prob = np.exp(-((xx - 431_200) ** 2 + (yy - 5_622_150) ** 2) / 8000.0)
    pred = xr.Dataset({"mean": (("y", "x"), 40 * prob, {"units": "mg/kg"}),
                       "p_exceed": (("threshold", "y", "x"), prob[None], {"units": "1"})},
                      coords={"x": x, "y": y, "threshold": ("threshold", [40.0], {"units": "mg/kg"})})
    pred.attrs.update(target_kind="grid", distance_units="m", coords="xy",
                      crs_name="EPSG:32632 (WGS 84 / UTM zone 32N)")
    fig = map_figure(pred, "p_exceed", threshold=0)
    ax, cax = fig.axes
    texts = [t.get_text() for t in ax.texts]
    assert "EPSG:32632 (WGS 84 / UTM zone 32N)" in texts and "N" in texts
    bars = [a for a in ax.artists if isinstance(a, AnchoredSizeBar)]
    assert len(bars) == 1 and bars[0].txt_label.get_text() == "50 m"
    assert cax.get_ylabel() == "probability of exceeding 40 mg/kg"
    contours = [c for c in ax.get_children() if isinstance(c, ContourSet)]
    assert len(contours) == 1 and list(contours[0].levels) == [0.5, 0.9]
    assert ax.get_xlabel() == "easting [m]" and "p_exceed" not in cax.get_ylabel()
    mean = map_figure(pred, "mean")
    assert mean.axes[1].get_ylabel() == "predictive mean [mg/kg]"


def test_area_average_goes_into_the_geopackage_as_its_polygon(tmp_path, capsys):
    """``map --area`` puts the area's polygon into map.gpkg (layer area_average, read back with pyogrio) with the
    same mean, interval and exceedance probability as the command's JSON, and its shapely area is the
    rectangle's."""
    import json

    import shapely
    from pyogrio.raw import read
    from test_cli_map import _fit_folder

    from bayesgeo.cli import main

    folder, _ = _fit_folder(tmp_path / "fit")
    assert main(["map", str(folder), "--cell", "25", "--draws", "10", "--threshold", "40",
                 "--area", "431350,5622350,431450,5622450", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)["area"]
    meta, _, geom, fields = read(folder / "maps" / "map.gpkg", layer="area_average")
    got = dict(zip(meta["fields"], (f[0] for f in fields)))
    assert got["mean"] == pytest.approx(out["mean"]) and got["q95"] == pytest.approx(out["q95"])
    assert got["p_exceed_40"] == pytest.approx(out["p_exceed"][0])
    assert shapely.from_wkb(geom[0]).area == pytest.approx(100.0 * 100.0)


def test_probability_that_the_true_area_is_larger_than_the_polygon():
    """With simulated counts of cells above the threshold (map's joint simulations) each polygon records the
    posterior probability that the true area above the threshold exceeds its own: the Monte Carlo share of
    simulated fields with more cells above the threshold (the frequency estimate of a probability; here 30 of
    100 fields by construction)."""
    from bayesgeo.predict.gis_export import exceedance_polygons

    ds, (x0, y0, cell, nx, ny) = _grid_predictions()
    prob = np.zeros((ny, nx))
    prob[0, :3] = 0.95  # three cells reach both levels
    ds["p_exceed"] = (("threshold", "y", "x"), prob[None])
    counts = np.full(100, 2)
    counts[:30] = 4  # 30 fields with 4 cells above 50, 70 with 2
    ds["cells_above"] = (("threshold", "sample", "sim"), counts.reshape(1, 2, 50))
    geo = georeferenced(ds, crs_wkt=pyproj.CRS.from_epsg(32633).to_wkt(), distance_units="m")
    polys = exceedance_polygons(geo)
    assert [p["cells"] for p in polys] == [3, 3]
    assert [p["p_true_area_larger"] for p in polys] == pytest.approx([0.3, 0.3])
    assert np.isnan(exceedance_polygons(geo.drop_vars("cells_above"))[0]["p_true_area_larger"])


def test_geopackage_to_fit_to_geotiff_round_trip(tmp_path, capsys):
    """The whole round trip a GIS user makes: points in a GeoPackage (EPSG:32633, written with pyogrio) -> ``bayesgeo
    fit`` -> ``bayesgeo map`` -> GeoTIFF and GeoPackage, opened with rasterio and pyogrio: the CRS of the input
    file, the grid's transform (cell size and corner), the samples back at their coordinates."""
    import shapely
    from pyogrio.raw import read, write

    from bayesgeo.cli import main
    from bayesgeo.data.demo import simulate_field

    rng = np.random.default_rng(8)
    xy = rng.uniform(0, 300, (40, 2)) + [455_000.0, 5_100_000.0]
    z = simulate_field(xy - xy.min(0), covariance="exponential", practical_range=150.0, partial_sill=0.5,
                       nugget=0.1, mean=3.0, rng=rng)
    gpkg = tmp_path / "samples.gpkg"
    write(gpkg, shapely.to_wkb(shapely.points(xy)), fields=["zinc"], field_data=[np.exp(z)], geometry_type="Point",
          crs="EPSG:32633", driver="GPKG", layer="samples")
    fit = tmp_path / "fit"
    assert main(["fit", str(gpkg), "--value", "zinc", "--transform", "log", "--covariance", "exponential",
                 "--chains", "2", "--draws", "300", "--tune", "400", "--seed", "5", "--out", str(fit), "--json"]) == 0
    capsys.readouterr()
    assert main(["map", str(fit), "--cell", "20", "--draws", "20", "--threshold", "30", "--allow-unconverged",
                 "--json"]) == 0
    capsys.readouterr()
    with xr.open_dataset(fit / "predictions.nc") as pred:
        x, y = pred["x"].values, pred["y"].values
    with rasterio.open(fit / "maps" / "mean.tif") as tif:
        assert tif.crs.to_epsg() == 32633
        assert (tif.transform.a, tif.transform.e) == pytest.approx((20.0, -20.0))
        assert (tif.transform.c, tif.transform.f) == pytest.approx((x.min() - 10.0, y.max() + 10.0))
    meta, _, geom, _ = read(fit / "maps" / "map.gpkg", layer="samples")
    assert pyproj.CRS.from_user_input(meta["crs"]).to_epsg() == 32633
    np.testing.assert_allclose(np.sort(shapely.get_x(shapely.from_wkb(geom))), np.sort(xy[:, 0]))


def test_samples_layer_leave_one_out_residuals_match_the_gaussian_identity(tmp_path):
    """The samples layer's leave-one-out residuals, with every posterior draw at the same parameters, are the
    Gaussian-process ones of the closed form: mean z_i - [K^-1 (z - mu)]_i / [K^-1]_ii and variance
    1 / [K^-1]_ii (Rasmussen and Williams 2006, eq. 5.12; numpy), standardised."""
    from scipy.spatial.distance import cdist
    from test_cli_map import _fit_folder

    from bayesgeo.common.defaults import JITTER
    from bayesgeo.fitting.fitted import read_site
    from bayesgeo.gp.covariance import get_covariance
    from bayesgeo.stages.maps import _loo_residuals

    folder, ds = _fit_folder(tmp_path / "fit", spread=0.0, chains=2, draws=20)
    fit = read_site(folder)
    post, obs = fit.posterior, fit.tree["observed_data"].to_dataset()
    got = _loo_residuals(fit, obs, 10)
    xy = np.column_stack([ds["x"].values, ds["y"].values])
    p = {k: float(post[k].values.ravel()[0]) for k in ("practical_range", "partial_sill", "nugget")}
    cov = get_covariance("matern32")
    k = (p["partial_sill"] * cov.correlation(cdist(xy, xy), p["practical_range"] / cov.range_factor)
         + (p["nugget"] + JITTER * p["partial_sill"]) * np.eye(len(xy)))
    z = np.log(ds["value"].values)
    mu = float(post["beta"].values.ravel()[0])
    kinv = np.linalg.inv(k)
    ref = (kinv @ (z - mu)) / np.diag(kinv) * np.sqrt(np.diag(kinv))  # (z_i - m_i) / s_i
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-9)


def test_lonlat_grid_cells_are_square_on_the_ground():
    """For lon/lat data ``--cell`` is in km and cells are square on the ground at the middle latitude: adjacent
    centres there are one cell apart east-west and north-south, measured on the sphere of radius 6371.0088 km
    by pyproj's geodesics (Geod with a = b = R); the file gets non-square degree pixels instead (60 N: a
    degree of longitude is half a degree of latitude on the ground)."""
    from bayesgeo.data.targets import grid_targets

    xy = np.column_stack([np.linspace(10.0, 10.1, 20), np.linspace(59.975, 60.025, 20)])
    g = grid_targets(xy, cell=0.5, metric="greatcircle")
    x, y = g["x"].values, g["y"].values
    j = int(np.argmin(np.abs(y - 60.0)))
    sphere = pyproj.Geod(a=6_371_008.8, b=6_371_008.8)
    _, _, ew = sphere.inv(x[0], y[j], x[1], y[j])
    _, _, ns = sphere.inv(x[0], y[j], x[0], y[j + 1])
    assert ew / 1000 == pytest.approx(0.5, rel=1e-3) and ns / 1000 == pytest.approx(0.5, rel=1e-6)
    assert g.attrs["cell_units"] == "km" and g.attrs["cell_degrees"][0] == pytest.approx(2 * g.attrs["cell_degrees"][1],
                                                                                          rel=1e-2)


def test_decision_levels_are_configurable(tmp_path, capsys):
    """``--decision-level`` (repeatable) sets the probability levels of the exceedance polygons (and contours);
    a level outside (0, 1) is refused with exit status 2."""
    from pyogrio.raw import read
    from test_cli_map import _fit_folder

    from bayesgeo.cli import main

    folder, _ = _fit_folder(tmp_path / "fit")
    assert main(["map", str(folder), "--cell", "25", "--draws", "10", "--threshold", "40", "--decision-level", "0.8",
                 "--decision-level", "0.95", "--decision-level", "0.2", "--json"]) == 0
    capsys.readouterr()
    meta, _, _, fields = read(folder / "maps" / "map.gpkg", layer="exceedance")
    assert sorted(fields[list(meta["fields"]).index("probability_level")]) == [0.2, 0.8, 0.95]
    assert main(["map", str(folder), "--decision-level", "1.5", "--overwrite", "--json"]) == 2


def test_map_gives_every_polygon_its_probability_of_a_larger_true_area(tmp_path, capsys):
    """By default ``map`` on a grid with a threshold simulates one joint field per draw (conditioning by kriging,
    tests/test_joint_simulation.py) and every exceedance polygon gets the share of fields with more cells above
    the threshold than it has, and the simulated area's 5/50/95% quantiles; the counts are in predictions.nc.
    A grid over 2,000 cells needs no --simulate;
    ``--simulate 0`` turns the simulation off (NaN)."""
    from pyogrio.raw import read
    from test_cli_map import _fit_folder

    from bayesgeo.cli import main

    folder, _ = _fit_folder(tmp_path / "fit")
    assert main(["map", str(folder), "--draws", "40", "--threshold", "40", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["cells"] > 2000 and out["simulation"]["fields_stored"] is False
    assert out["simulation"]["method"].startswith("conditioning by kriging")
    meta, _, _, fields = read(folder / "maps" / "map.gpkg", layer="exceedance")
    got = dict(zip(meta["fields"], fields))
    with xr.open_dataset(folder / "predictions.nc") as pred:
        counts = pred["cells_above"].isel(threshold=0).values.ravel()
        expected = float(pred["p_exceed"].isel(threshold=0).sum())
        cell_area = float(np.diff(pred["x"].values[:2])[0]) ** 2
    for q, name in zip((0.05, 0.5, 0.95), ("simulated_area_q05", "simulated_area_q50", "simulated_area_q95")):
        assert got[name] == pytest.approx(np.quantile(counts, q) * cell_area)  # numpy's quantile, area in m2
        assert "simulation" not in pred and counts.size == 40
    for cells, p in zip(got["cells"], got["p_true_area_larger"]):
        assert p == pytest.approx(np.mean(counts > cells))
    levels = list(got["probability_level"])
    assert got["p_true_area_larger"][levels.index(0.9)] >= got["p_true_area_larger"][levels.index(0.5)]
    # the fields have the map's marginals: E[cells above] = sum of the cells' P(exceed) (linearity of expectation)
    assert abs(counts.mean() - expected) < 4.5 * counts.std() / np.sqrt(counts.size)
    assert main(["map", str(folder), "--draws", "40", "--threshold", "40", "--simulate", "0", "--overwrite",
                 "--json"]) == 0
    capsys.readouterr()
    meta, _, _, fields = read(folder / "maps" / "map.gpkg", layer="exceedance")
    assert np.all(np.isnan(fields[list(meta["fields"]).index("p_true_area_larger")]))


def test_simulated_area_of_a_lonlat_grid_is_in_square_metres():
    """On a lon/lat grid of 0.5 km cells the simulated area above a threshold is the number of cells times a
    cell's geodesic area on WGS 84 (pyproj), about 0.25 km2 (cells square on the ground; within 1% of
    0.25e6 m2, the ellipsoid's radii differing from the grid's sphere by less than that)."""
    from bayesgeo.data.targets import grid_targets
    from bayesgeo.predict.gis_export import exceedance_polygons

    xy = np.column_stack([np.linspace(10.0, 10.1, 20), np.linspace(59.975, 60.025, 20)])
    g = grid_targets(xy, cell=0.5, metric="greatcircle")
    ny, nx = g["inside"].shape
    prob = np.zeros((1, ny, nx))
    prob[0, :2, :3] = 0.95
    counts = np.arange(100).reshape(1, 1, 100)
    ds = xr.Dataset({"p_exceed": (("threshold", "y", "x"), prob), "cells_above": (("threshold", "sample", "sim"),
                                                                                    counts)},
                    coords={"x": g["x"].values, "y": g["y"].values, "threshold": [1.0]})
    geo = georeferenced(ds, crs_wkt=pyproj.CRS.from_epsg(4326).to_wkt(), coords="lonlat", distance_units="km")
    poly = exceedance_polygons(geo)[0]
    assert poly["cells"] == 6 and poly["area_units"] == "m2"
    cell = poly["simulated_area"][1] / np.quantile(np.arange(100), 0.5)
    assert cell == pytest.approx(0.25e6, rel=0.01)
    assert poly["area"] == pytest.approx(6 * cell, rel=2e-3)  # the polygon's geodesic area, same cells


def test_report_lists_the_exceedance_areas_with_their_chances(tmp_path):
    """The report's map block tabulates map.gpkg's polygons: area, the chance of a larger area above the threshold
    and the simulated area's 5-95% interval, with the caution (as written by write_geopackage)."""
    from bayesgeo.predict.gis_export import write_geopackage
    from bayesgeo.report.sites import exceedance_table

    ds, (x0, y0, cell, nx, ny) = _grid_predictions()
    prob = np.zeros((1, ny, nx))
    prob[0, 0, :3] = 0.95
    ds["p_exceed"] = (("threshold", "y", "x"), prob)
    counts = np.full(100, 2)
    counts[:30] = 4
    ds["cells_above"] = (("threshold", "sample", "sim"), counts.reshape(1, 2, 50))
    geo = georeferenced(ds, crs_wkt=pyproj.CRS.from_epsg(32633).to_wkt(), distance_units="m")
    gpkg = write_geopackage(tmp_path / "map.gpkg", geo)
    html = "\n".join(exceedance_table(gpkg))
    assert html.count("<tr>") == 3 and html.count('<td class="">0.3</td>') == 2  # P = 30 of 100 fields, 2 levels
    lo, hi = np.quantile(counts, [0.05, 0.95]) * cell * cell  # numpy's quantiles of the counts, in m2
    assert f"{lo:,.0f} - {hi:,.0f} m2" in html and "licensed professional" in html
    assert exceedance_table(tmp_path / "absent.gpkg") == []
