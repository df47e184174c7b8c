"""Point-data intake: every bad-input case gives a one-line error naming file, row and column."""

from __future__ import annotations

import numpy as np
import pytest

from bayesgeo.data.points import read_points
from bayesgeo.common.validate import InputError


def test_reads_and_keeps_attributes(write_csv, grid_rows):
    """Intake keeps columns, units and file row numbers (header = row 1) and never modifies the input file (our own promise; no outside reference)."""
    path = write_csv(grid_rows)
    before = path.read_bytes()
    ds = read_points(path, value="conc", units="mg/kg")
    assert ds.sizes["obs"] == 25
    assert ds.attrs["x_column"] == "x" and ds.attrs["value_column"] == "conc"
    assert ds["value"].attrs["units"] == "mg/kg"
    assert ds["row"].values[0] == 2  # header is row 1
    assert path.read_bytes() == before  # input never modified


def test_detects_easting_northing_and_value(write_csv, grid_rows):
    """Column detection finds Easting/Northing and the one remaining numeric column (behaviour check)."""
    rows = [["Easting", "Northing", "lead"]] + grid_rows[1:]
    ds = read_points(write_csv(rows))
    assert (ds.attrs["x_column"], ds.attrs["y_column"], ds.attrs["value_column"]) == ("Easting", "Northing", "lead")


def test_missing_file(tmp_path):
    """A missing file is a one-line input error naming the file (behaviour check)."""
    with pytest.raises(InputError, match=r"nope\.csv: file not found"):
        read_points(tmp_path / "nope.csv")


def test_missing_column_lists_available(write_csv, grid_rows):
    """An unknown --value column is named together with the columns that exist (behaviour check)."""
    with pytest.raises(InputError, match=r"column 'zinc' \(--value\) not found; columns are: x, y, conc"):
        read_points(write_csv(grid_rows), value="zinc")


def test_non_numeric_cell(write_csv, grid_rows):
    """A non-numeric cell such as 'n.d.' is reported with file, row and column (behaviour check)."""
    grid_rows[4][2] = "n.d."
    with pytest.raises(InputError, match=r"points\.csv: row 5, column 'conc': 'n\.d\.' is not a number"):
        read_points(write_csv(grid_rows), value="conc")


@pytest.mark.parametrize("bad", ["", "nan", "inf", "-Infinity"])
def test_empty_nan_inf_cells_list_rows(write_csv, grid_rows, bad):
    """Empty, NaN and infinite cells are reported with their column and file rows (behaviour check)."""
    grid_rows[3][2] = bad
    grid_rows[7][0] = bad if bad else ""
    with pytest.raises(InputError, match=r"column '(x|conc)' has empty, NaN or infinite cells at rows (4|8)"):
        read_points(write_csv(grid_rows), value="conc")


def test_too_few_points(write_csv, grid_rows):
    """Fewer than 10 points is refused, listing the rows (the minimum is our documented choice, not an outside fact)."""
    with pytest.raises(InputError, match=r"only 9 points \(rows 2, 3, .*at least 10"):
        read_points(write_csv(grid_rows[:10]), value="conc")


def test_too_few_points_per_site(write_csv, grid_rows):
    """A site with fewer than 10 points is refused by name (behaviour check)."""
    rows = [grid_rows[0] + ["site"]] + [r + (["A"] if i < 18 else ["B"]) for i, r in enumerate(grid_rows[1:])]
    with pytest.raises(InputError, match=r"only 7 points at site 'B'"):
        read_points(write_csv(rows), value="conc", site="site")


def test_all_values_equal(write_csv, grid_rows):
    """Constant values (zero variance, nothing to model) are refused with the value (behaviour check)."""
    for r in grid_rows[1:]:
        r[2] = 5
    with pytest.raises(InputError, match=r"every value in column 'conc' equals 5"):
        read_points(write_csv(grid_rows), value="conc")


def test_duplicate_locations_error_or_mean(write_csv, grid_rows):
    """Duplicate locations make a singular covariance matrix without a nugget (common practice): an error naming both rows, or averaged with --duplicates mean (the arithmetic mean checked by hand)."""
    grid_rows.append([0, 0, 20.0])  # same place as row 2
    path = write_csv(grid_rows)
    with pytest.raises(InputError, match=r"duplicate locations .* at rows 2, 27; pass --duplicates mean"):
        read_points(path, value="conc")
    ds = read_points(path, value="conc", duplicates="mean")
    assert ds.sizes["obs"] == 25
    first = grid_rows[1][2]
    assert ds["value"].values[0] == pytest.approx((first + 20.0) / 2)


def test_lonlat_lookalike_refused_unless_asked(write_csv):
    """Degree-like coordinates are refused unless --coords says lonlat or xy; lonlat distances are in km (behaviour check)."""
    rng = np.random.default_rng(0)
    rows = [["x", "y", "v"]] + [[round(8.5 + 0.01 * rng.random(), 5), round(47.3 + 0.01 * rng.random(), 5),
                                 round(rng.normal(), 3)] for _ in range(20)]
    path = write_csv(rows)
    with pytest.raises(InputError, match=r"look like longitude/latitude.*--coords lonlat"):
        read_points(path)
    ds = read_points(path, coords="lonlat")
    assert ds.attrs["coords"] == "lonlat" and ds.attrs["distance_units"] == "km"
    assert read_points(path, coords="xy").attrs["coords"] == "xy"


def test_lonlat_out_of_range(write_csv, grid_rows):
    """Longitudes outside both written conventions, -180..180 and 0..360 degrees (common practice), are reported with their rows."""
    with pytest.raises(InputError, match=r"column 'x' is outside \[-180, 360\] degrees at rows 22, 23, 24, 25, 26 "):
        read_points(write_csv(grid_rows), value="conc", coords="lonlat")


def test_netcdf_roundtrip(tmp_path, write_csv, grid_rows):
    """A point file written with xarray's NetCDF writer reads back with identical values (xarray is the reference)."""
    ds = read_points(write_csv(grid_rows), value="conc")
    ds.to_netcdf(tmp_path / "pts.nc")
    back = read_points(tmp_path / "pts.nc")
    np.testing.assert_array_equal(back["value"].values, ds["value"].values)


def test_demo_data_recorded_truth(tmp_path):
    """The invented demo set has every recorded parcel, 60-300 points each, a truth file, and refuses to overwrite (behaviour check)."""
    from bayesgeo.data.demo import write_demo_data

    truth = write_demo_data(tmp_path / "demo.csv")
    ds = read_points(tmp_path / "demo.csv", site="parcel", value="arsenic_mg_kg")
    assert set(truth["sites"]) == set(np.unique(ds["site"].values))
    assert all(60 <= s["n"] <= 300 for s in truth["sites"].values())
    assert (tmp_path / "demo.truth.json").exists()
    with pytest.raises(InputError, match="already exists"):
        write_demo_data(tmp_path / "demo.csv")


def test_log_transform(write_csv, grid_rows):
    """log transform of positive concentrations (common practice); zeros refused with rows named."""
    from bayesgeo.data.points import apply_transform

    ds = read_points(write_csv(grid_rows), value="conc", units="mg/kg", distance_units="m")
    assert ds.attrs["distance_units"] == "m"
    logged = apply_transform(ds, "log")
    np.testing.assert_allclose(logged["value"].values, np.log(ds["value"].values))
    assert logged["value"].attrs["units"] == "log(mg/kg)" and logged.attrs["transform"] == "log"
    assert "transform" not in ds.attrs  # input untouched
    grid_rows[3][2] = 0
    with pytest.raises(InputError, match=r"--transform log needs positive values; column 'conc' .* rows 4"):
        apply_transform(read_points(write_csv(grid_rows), value="conc"), "log")
    with pytest.raises(InputError, match="^transform: 'sqrt' is not one of"):
        apply_transform(ds, "sqrt")


def test_only_site_keeps_one_site(write_csv, grid_rows):
    """--only-site keeps one site's rows with their file row numbers and refuses unknown sites or a missing --site (behaviour check)."""
    rows = [grid_rows[0] + ["site"]] + [r + (["A"] if i % 2 else ["B"]) for i, r in enumerate(grid_rows[1:])]
    rows += [[1000 + 10 * i, 0, 5.0 + i % 3, "A"] for i in range(10)]
    path = write_csv(rows)
    ds = read_points(path, value="conc", site="site", only_site="A")
    assert set(ds["site"].values) == {"A"} and ds.sizes["obs"] == 12 + 10
    assert ds["row"].values[0] == 3  # rows keep their file numbers
    with pytest.raises(InputError, match=r"--only-site: no site 'C' in column 'site' \(sites: B, A\)"):
        read_points(path, value="conc", site="site", only_site="C")
    with pytest.raises(InputError, match="--only-site needs --site"):
        read_points(path, value="conc", only_site="A")


def test_small_sites_kept_only_on_request(write_csv, grid_rows):
    """A site under 10 points is an error naming --small-sites keep; kept with small_sites='keep'
    (it still needs 3 points, and some site must have 10)."""
    rows = [grid_rows[0] + ["site"]] + [r + (["A"] if i < 20 else ["B"]) for i, r in enumerate(grid_rows[1:])]
    path = write_csv(rows)
    with pytest.raises(InputError, match=r"only 5 points at site 'B' .*--small-sites keep"):
        read_points(path, value="conc", site="site")
    ds = read_points(path, value="conc", site="site", small_sites="keep")
    assert int((ds["site"].values == "B").sum()) == 5
    tiny = write_csv(rows[:21] + rows[-2:], name="tiny.csv")
    with pytest.raises(InputError, match=r"only 2 points at site 'B'.*at least 3"):
        read_points(tiny, value="conc", site="site", small_sites="keep")


def _degree_rows(lon, lat, names=("x", "y")):
    rng = np.random.default_rng(5)
    return [[*names, "v"]] + [[round(a, 4), round(b, 4), round(rng.normal(), 3)] for a, b in zip(lon, lat)]


def test_continental_degrees_in_xy_columns_refused_under_auto(write_csv):
    """Columns named x, y holding a 20 x 10 degree region are refused under --coords auto, naming the
    columns, the extent as degrees in km and as planar units, and both choices. Check value: at latitude
    45 a degree of longitude spans R cos(45) pi/180 = 78.6 km (spherical Earth, common practice), so 20
    degrees are about 1,570 km."""
    rng = np.random.default_rng(2)
    lon, lat = rng.uniform(0.0, 20.0, 40), rng.uniform(40.0, 50.0, 40)
    lon[:2], lat[:2] = (0.0, 20.0), (40.0, 50.0)
    path = write_csv(_degree_rows(lon, lat))
    before = path.read_bytes()
    with pytest.raises(InputError, match=r"columns 'x', 'y' look like longitude/latitude .*as degrees about "
                                         r"1,5[67]\d x 1,11\d km, as planar units a 20 x 10 site\); "
                                         r"pass --coords lonlat .* or --coords xy"):
        read_points(path)
    assert path.read_bytes() == before
    assert read_points(path, coords="xy").attrs["coords"] == "xy"
    assert read_points(path, coords="lonlat").attrs["distance_units"] == "km"


def test_planar_field_trial_in_latitude_longitude_columns_passes_with_xy(write_csv):
    """Planar field-trial coordinates 1-47 in columns named latitude/longitude (as in real open data sets,
    FACTS.md) are refused under auto and accepted with --coords xy as planar units (behaviour check)."""
    rng = np.random.default_rng(4)
    path = write_csv(_degree_rows(rng.integers(1, 48, 60).astype(float) + rng.random(60),
                                  rng.integers(1, 48, 60).astype(float), names=("longitude", "latitude")))
    with pytest.raises(InputError, match=r"'longitude', 'latitude' look like longitude/latitude"):
        read_points(path)
    ds = read_points(path, coords="xy")
    assert ds.attrs["coords"] == "xy" and ds.attrs["distance_units"] == "coordinate units"


def test_longitudes_0_360_accepted_under_lonlat(write_csv):
    """Pacific longitudes written 0..360 (165-188 degrees) are accepted under --coords lonlat and kept as
    written; distances across 180 equal the arc-length formula R * dlon (radians) on the equator."""
    lon = np.linspace(165.0, 188.0, 24)
    lat = np.tile([0.0, 1.0], 12)
    ds = read_points(write_csv(_degree_rows(lon, lat)), coords="lonlat")
    np.testing.assert_allclose(ds["x"].values, np.round(lon, 4))
    assert ds.attrs["longitude_convention"] == "0..360"
    from bayesgeo.common.geometry import EARTH_RADIUS_KM, cross_distance

    xy = np.column_stack([ds["x"].values, ds["y"].values])
    d = cross_distance(xy[[0]], xy[[22]], "greatcircle")[0, 0]
    assert d == pytest.approx(EARTH_RADIUS_KM * np.radians(xy[22, 0] - xy[0, 0]), rel=1e-9)


def test_longitudes_across_180_become_continuous(write_csv):
    """The same Pacific points written -180..180 (170..180 and -180..-172) read as one continuous range
    170..188, so their bounding box, grid and hull do not span the globe (longitude is periodic in 360)."""
    from bayesgeo.data.targets import grid_targets, hull_mask

    rng = np.random.default_rng(6)
    lon = rng.uniform(170.0, 188.0, 40)
    lat = rng.uniform(-20.0, -10.0, 40)
    written = np.where(lon > 180.0, lon - 360.0, lon)
    ds = read_points(write_csv(_degree_rows(written, lat)), coords="lonlat")
    x = ds["x"].values
    assert x.min() >= 170.0 and x.max() <= 188.0
    assert ds.attrs["longitude_convention"] == "0..360"
    xy = np.column_stack([x, ds["y"].values])
    grid = grid_targets(xy, cells=20, hull=True)
    assert float(grid["x"].max() - grid["x"].min()) < 20.0
    assert hull_mask(xy, np.array([[179.9, -15.0], [0.0, -15.0]])).tolist() == [True, False]


def test_lonlat_latitude_out_of_range(write_csv):
    """Latitudes beyond +-90 degrees (common practice) are refused under --coords lonlat with their rows."""
    rows = _degree_rows(np.linspace(10, 12, 12), np.linspace(80, 91, 12))
    with pytest.raises(InputError, match=r"column 'y' is outside \[-90, 90\] degrees at rows 13"):
        read_points(write_csv(rows), coords="lonlat")


def test_degree_check_looks_at_the_whole_file_not_one_site(write_csv):
    """--only-site picks a site whose own coordinates fall inside the degree box; the file's other site
    lies outside it, so the file is planar and is read under --coords auto (behaviour check)."""
    rng = np.random.default_rng(9)
    rows = [["x", "y", "v", "site"]]
    rows += [[round(a, 2), round(b, 2), round(rng.normal(), 3), "inner"] for a, b in rng.uniform(0, 80, (15, 2))]
    rows += [[round(a, 2), round(b, 2), round(rng.normal(), 3), "outer"]
             for a, b in rng.uniform(500, 600, (15, 2))]
    ds = read_points(write_csv(rows), site="site", only_site="inner")
    assert ds.sizes["obs"] == 15 and ds.attrs["coords"] == "xy"
