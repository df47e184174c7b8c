"""Sample points from Excel and GIS files, and their coordinate reference systems.

Sources: GeoPackage, GeoJSON and shapefile files are written here with pyogrio (GDAL) and Excel workbooks
with openpyxl, the libraries a GIS or spreadsheet user's files come from; CRS definitions, UTM zones,
projections and geodesic distances are pyproj's (PROJ and its EPSG database, Karney's geodesics); the
laboratory notation ``<X`` for a non-detect is common practice.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest

pyogrio = pytest.importorskip("pyogrio")
shapely = pytest.importorskip("shapely")
pyproj = pytest.importorskip("pyproj")

from bayesgeo.common.validate import InputError  # noqa: E402
from bayesgeo.data.points import read_points  # noqa: E402

VALUES = ["1.2", "<0.5", "3.1", "2.2", "<1", "0.9", "1.7", "2.5", "4.0", "1.1", "2.8", "0.7"]


def _xy(n=12, x0=500_000.0, y0=4_100_000.0, step=50.0):
    return np.array([(x0 + step * (i % 4), y0 + step * (i // 4)) for i in range(n)], dtype=float)


def _write_vector(path, xy, fields: dict, crs, driver="GPKG", layer=None, geoms=None):
    from pyogrio.raw import write

    kind = "Point" if geoms is None else "Polygon"
    geoms = shapely.points(xy) if geoms is None else geoms
    write(path, shapely.to_wkb(geoms), field_data=[np.asarray(v, dtype=object if isinstance(v[0], str) else float)
                                                    for v in fields.values()],
          fields=list(fields), geometry_type=kind, crs=crs, driver=driver,
          layer=layer)
    return path


def _csv(path, xy, values):
    rows = "".join(f"{float(a)!r},{float(b)!r},{v}\n" for (a, b), v in zip(xy, values))
    path.write_text("easting,northing,arsenic\n" + rows, encoding="utf-8")
    return path


def test_geopackage_reads_like_the_csv_and_keeps_its_crs(tmp_path):
    """A GeoPackage of points in EPSG:32633 gives the same points, values and non-detects as the same table as
    CSV; its CRS (as pyproj reads it) is recorded as WKT with distances in metres; the file is only read."""
    xy = _xy()
    gpkg = _write_vector(tmp_path / "samples.gpkg", xy, {"arsenic": VALUES}, "EPSG:32633")
    before = hashlib.sha256(gpkg.read_bytes()).hexdigest()
    ds = read_points(gpkg, value="arsenic")
    ref = read_points(_csv(tmp_path / "samples.csv", xy, VALUES), value="arsenic", crs="EPSG:32633")
    for name in ("x", "y", "value", "censored"):
        np.testing.assert_array_equal(ds[name].values, ref[name].values)
    assert pyproj.CRS.from_wkt(ds.attrs["crs"]).equals(pyproj.CRS.from_epsg(32633))
    assert ds.attrs["crs_name"] == "EPSG:32633 (WGS 84 / UTM zone 33N)" and ds.attrs["distance_units"] == "m"
    assert ds.attrs["coords"] == "xy" and int(ds["censored"].sum()) == 2
    assert hashlib.sha256(gpkg.read_bytes()).hexdigest() == before


@pytest.mark.parametrize("suffix,driver", [(".geojson", "GeoJSON"), (".shp", "ESRI Shapefile")])
def test_geojson_and_shapefile_of_lonlat_points(tmp_path, suffix, driver):
    """GeoJSON and shapefile layers in EPSG:4326 are lon/lat: great-circle distances in km."""
    lonlat = np.column_stack([np.linspace(10.0, 10.3, 12), np.linspace(45.0, 45.2, 12)])
    path = _write_vector(tmp_path / f"pts{suffix}", lonlat, {"lead": np.linspace(1, 5, 12)}, "EPSG:4326", driver=driver)
    ds = read_points(path, value="lead")
    assert ds.attrs["coords"] == "lonlat" and ds.attrs["distance_units"] == "km"
    np.testing.assert_allclose(ds["x"].values, lonlat[:, 0])


def test_projection_to_utm_keeps_geodesic_distances(tmp_path):
    """``to_crs="utm"`` projects lon/lat points to the UTM zone pyproj's database gives for their centre;
    distances between the projected points agree with pyproj's geodesic distances on WGS 84 (Geod.inv) to
    the UTM scale error (scale factor 0.9996 on the central meridian, within 0.1% inside a zone; common
    practice)."""
    lon = np.array([15.01, 15.05, 14.98, 15.10, 15.03, 15.07, 14.95, 15.12, 15.0, 15.08, 15.04, 14.99])
    lat = np.array([45.00, 45.03, 45.05, 45.01, 45.08, 45.06, 45.02, 45.09, 45.04, 45.07, 45.10, 45.11])
    path = tmp_path / "ll.csv"
    path.write_text("lon,lat,zinc\n" + "".join(f"{a},{b},{i + 1}\n" for i, (a, b) in enumerate(zip(lon, lat))))
    ds = read_points(path, coords="lonlat", to_crs="utm")
    assert pyproj.CRS.from_wkt(ds.attrs["crs"]).to_epsg() == 32633  # 12-18 E, northern hemisphere
    assert ds.attrs["source_crs_name"].startswith("EPSG:4326") and ds.attrs["distance_units"] == "m"
    assert ds.attrs["coords"] == "xy"
    geod = pyproj.Geod(ellps="WGS84")
    i, j = np.triu_indices(len(lon), 1)
    _, _, ref = geod.inv(lon[i], lat[i], lon[j], lat[j])
    got = np.hypot(ds["x"].values[i] - ds["x"].values[j], ds["y"].values[i] - ds["y"].values[j])
    np.testing.assert_allclose(got, ref, rtol=1e-3)


def test_projection_across_the_antimeridian(tmp_path):
    """Points on both sides of 180 degrees, written -180..180 or 0..360, project to one UTM zone with
    distances equal to the geodesic ones (pyproj.Geod) within the UTM scale error near a zone edge (0.2%)."""
    lon = np.array([179.90, -179.95, 179.97, -179.90, 179.93, -179.97, 179.95, -179.92, 179.99, -179.99, 179.91,
                    -179.93])
    lat = np.linspace(-17.10, -17.00, 12)
    for written in (lon, np.where(lon < 0, lon + 360.0, lon)):
        path = tmp_path / "pacific.csv"
        path.write_text("lon,lat,v\n" + "".join(f"{a},{b},{k}\n" for k, (a, b) in enumerate(zip(written, lat))))
        ds = read_points(path, coords="lonlat", to_crs="utm")
        assert pyproj.CRS.from_wkt(ds.attrs["crs"]).to_epsg() in (32760, 32701)
        i, j = np.triu_indices(len(lon), 1)
        _, _, ref = pyproj.Geod(ellps="WGS84").inv(lon[i], lat[i], lon[j], lat[j])
        got = np.hypot(ds["x"].values[i] - ds["x"].values[j], ds["y"].values[i] - ds["y"].values[j])
        np.testing.assert_allclose(got, ref, rtol=2e-3)


def test_excel_sheet_reads_like_the_csv(tmp_path):
    """An .xlsx sheet (numbers as numbers, non-detects as text ``<X``) gives the same data as the CSV; a bad
    cell is named by its worksheet row and column."""
    openpyxl = pytest.importorskip("openpyxl")
    xy = _xy()
    book = openpyxl.Workbook()
    sheet = book.active
    sheet.title = "lab results"
    sheet.append(["easting", "northing", "arsenic"])
    for (a, b), v in zip(xy, VALUES):
        sheet.append([a, b, v if v.startswith("<") else float(v)])
    book.save(tmp_path / "lab.xlsx")
    ds = read_points(tmp_path / "lab.xlsx", value="arsenic", distance_units="m")
    ref = read_points(_csv(tmp_path / "lab.csv", xy, VALUES), value="arsenic", distance_units="m")
    for name in ("x", "y", "value", "censored", "row"):
        np.testing.assert_array_equal(ds[name].values, ref[name].values)
    sheet["C5"] = "n/a"
    book.save(tmp_path / "bad.xlsx")
    with pytest.raises(InputError, match=r"bad\.xlsx.*row 5.*arsenic"):
        read_points(tmp_path / "bad.xlsx", value="arsenic")
    with pytest.raises(InputError, match="no worksheet 'results'"):
        read_points(tmp_path / "lab.xlsx", value="arsenic", layer="results")


def test_crs_conflicts_and_geometry_are_refused_in_one_line(tmp_path):
    """A --crs that contradicts the file, --coords against the CRS, --to-crs without a CRS, a polygon layer and
    a file of several layers without --layer are refused with one line naming the file."""
    xy = _xy()
    gpkg = _write_vector(tmp_path / "a.gpkg", xy, {"v": np.arange(12.0)}, "EPSG:32633")
    with pytest.raises(InputError, match=r"declares EPSG:32633 .* --crs says EPSG:32634"):
        read_points(gpkg, value="v", crs="EPSG:32634")
    with pytest.raises(InputError, match="projected .* --coords says lonlat"):
        read_points(gpkg, value="v", coords="lonlat")
    with pytest.raises(InputError, match="--to-crs needs the CRS"):
        read_points(_csv(tmp_path / "p.csv", xy, VALUES), value="arsenic", to_crs="utm")
    with pytest.raises(InputError, match="crs: 'EPSG:999999' is not a coordinate reference system"):
        read_points(tmp_path / "p.csv", value="arsenic", crs="EPSG:999999")
    squares = shapely.buffer(shapely.points(xy), 5.0, quad_segs=1)
    poly = _write_vector(tmp_path / "poly.gpkg", xy, {"v": np.arange(12.0)}, "EPSG:32633", geoms=squares)
    with pytest.raises(InputError, match=r"row 2 \(feature 1\): a Polygon; bayesgeo takes one point per feature"):
        read_points(poly, value="v")
    _write_vector(gpkg, xy, {"v": np.arange(12.0)}, "EPSG:32633", layer="second")
    with pytest.raises(InputError, match=r"holds 2 layers .*--layer"):
        read_points(gpkg, value="v")
    assert read_points(gpkg, value="v", layer="second").attrs["layer"] == "second"


def test_command_line_explores_a_geopackage(tmp_path):
    """``bayesgeo explore points.gpkg --json`` reads the GeoPackage (exit 0, one JSON object; docs/cli.md)."""
    import contextlib
    import io
    import json

    from bayesgeo.cli import main

    rng = np.random.default_rng(2)
    xy = rng.uniform(0, 500, (30, 2)) + [600_000.0, 5_000_000.0]
    gpkg = _write_vector(tmp_path / "pts.gpkg", xy, {"zinc": rng.lognormal(3, 0.5, 30)}, "EPSG:25832")
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        code = main(["explore", str(gpkg), "--value", "zinc", "--permutations", "0", "--out", str(tmp_path / "ex"),
                     "--json"])
    assert code == 0
    assert json.loads(buf.getvalue())["n"] == 30


def test_demo_study_reads_its_data_in_the_invented_site_grid(tmp_path):
    """The demo's study file names the invented site grid (an engineering CRS in metres, WKT2, which pyproj
    reads): its data come in planar metres with that CRS recorded, so the demo's maps are georeferenced
    without naming any real place."""
    from bayesgeo.cli.demo import demo_study_text
    from bayesgeo.data.demo import DEMO_CRS_WKT, write_demo_data
    from bayesgeo.data.points import read_settings
    from bayesgeo.study.settings import parse_study

    write_demo_data(tmp_path / "demo.csv")
    study = parse_study(demo_study_text("demo.csv", quick=True), path=tmp_path / "study.toml")
    d = study.settings["data"]
    ds = read_points(d["path"], **read_settings(d))
    crs = pyproj.CRS.from_wkt(ds.attrs["crs"])
    assert crs.is_engineering and crs.equals(pyproj.CRS.from_wkt(DEMO_CRS_WKT))
    assert ds.attrs["distance_units"] == "m" and ds.attrs["coords"] == "xy"
