"""Tests of prediction targets (bayesgeo.data.targets): grids, point files, hull mask, areas."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import ConvexHull

from bayesgeo.data import targets as tg
from bayesgeo.common.validate import InputError

RNG = np.random.default_rng(7)


def test_default_grid_has_about_100_cells_on_the_longer_side_and_covers_the_box():
    """Cell centres are evenly spaced by the cell size, the grid covers the data box plus the margin
    (geometry of a regular grid; the ~100-cell default is the project's choice)."""
    xy = np.column_stack([RNG.uniform(1000, 1400, 50), RNG.uniform(2000, 2250, 50)])
    g = tg.grid_targets(xy, margin=10.0)
    assert g.sizes["x"] == 100 and 60 <= g.sizes["y"] <= 70
    cell = g.attrs["cell"]
    np.testing.assert_allclose(np.diff(g["x"].values), cell)
    np.testing.assert_allclose(np.diff(g["y"].values), cell)
    assert g["x"].values[0] - cell / 2 <= xy[:, 0].min() - 10 + 1e-9
    assert g["x"].values[-1] + cell / 2 >= xy[:, 0].max() + 10 - 1e-9
    assert g["y"].values[0] - cell / 2 <= xy[:, 1].min() - 10 + 1e-9
    assert g["y"].values[-1] + cell / 2 >= xy[:, 1].max() + 10 - 1e-9
    assert g["inside"].dims == ("y", "x") and g["inside"].values.all()
    g2 = tg.grid_targets(xy, cell=50.0)
    assert g2.attrs["cell"] == 50.0 and g2.sizes["x"] == int(np.ceil(np.ptp(xy[:, 0]) / 50))


def test_hull_mask_agrees_with_convex_hull_half_planes():
    """A point is inside the convex hull iff it satisfies every facet inequality a.x + b <= 0 of
    scipy.spatial.ConvexHull (Qhull's facet equations), an independent route from the Delaunay
    triangulation used by hull_mask."""
    xy = RNG.random((40, 2)) * 100
    pts = RNG.random((2000, 2)) * 140 - 20
    hull = ConvexHull(xy)
    ref = np.all(pts @ hull.equations[:, :2].T + hull.equations[:, 2] <= 1e-9, axis=1)
    np.testing.assert_array_equal(tg.hull_mask(xy, pts), ref)
    g = tg.grid_targets(xy, cells=30, hull=True)
    assert 0 < g["inside"].values.mean() < 1


def test_point_file_keeps_order_rows_and_covariates(tmp_path):
    """Targets keep file order; rows are spreadsheet rows (header = row 1, project convention)."""
    f = tmp_path / "pts.csv"
    f.write_text("id,Easting,Northing,ph\nA,3,4,6.5\nB,1,2,7.0\n\nC,5,6,5.5\n")
    ds = tg.read_target_points(f, columns=("ph",))
    np.testing.assert_array_equal(ds["x"].values, [3, 1, 5])
    np.testing.assert_array_equal(ds["ph"].values, [6.5, 7.0, 5.5])
    assert ds.attrs["kind"] == "points" and ds["inside"].values.all()
    with pytest.raises(InputError, match=r"needs covariate column 'clay'"):
        tg.read_target_points(f, columns=("clay",))


@pytest.mark.parametrize("text,match", [
    ("x,y\n1,2\n3,\n", r"row 3, column 'y': the cell is empty"),
    ("a,b\n1,2\n", r"no column 'x'"),
    ("x,y\n", r"no target points"),
    ("x,y\n1,inf\n", r"row 2, column 'y': 'inf' is not a finite number"),
])
def test_point_file_errors_name_file_row_and_column(tmp_path, text, match):
    """Bad point files: one-line InputError naming file, row and column (project rule)."""
    f = tmp_path / "bad.csv"
    f.write_text(text)
    with pytest.raises(InputError, match=match) as err:
        tg.read_target_points(f)
    assert str(f) in str(err.value) and "\n" not in str(err.value)


def test_polygon_area_and_discretisation_centroid():
    """Shoelace area of an L-shaped polygon (area 300 by hand: 20 x 10 + 10 x 10) and the centroid of
    the discretisation points against the polygon centroid from the standard formula
    C = 1/(6A) sum (x_i + x_{i+1})(x_i y_{i+1} - x_{i+1} y_i) (published formula for simple polygons)."""
    v = np.array([[0, 0], [20, 0], [20, 10], [10, 10], [10, 20], [0, 20]], float)
    assert tg.polygon_area(v) == pytest.approx(300.0)
    pts = tg.discretise_area(v, points=400)
    assert 300 <= len(pts) <= 500
    x, y = v[:, 0], v[:, 1]
    x1, y1 = np.roll(x, -1), np.roll(y, -1)
    cross = x * y1 - x1 * y
    a = cross.sum() / 2
    cx, cy = ((x + x1) * cross).sum() / (6 * a), ((y + y1) * cross).sum() / (6 * a)
    assert abs(pts[:, 0].mean() - cx) < 0.3 and abs(pts[:, 1].mean() - cy) < 0.3
    assert not np.any((pts[:, 0] > 10) & (pts[:, 1] > 10))  # nothing in the notch


def test_area_option_rectangle_or_file(tmp_path):
    """--area takes four numbers or a vertex file (closed or open ring); bad values are input errors."""
    v, label = tg.area_from_option("0,0,30,10")
    assert tg.polygon_area(v) == pytest.approx(300.0) and label.startswith("rectangle")
    f = tmp_path / "area.csv"
    f.write_text("x,y\n0,0\n10,0\n0,10\n0,0\n")
    v2, label2 = tg.area_from_option(str(f))
    assert len(v2) == 3 and tg.polygon_area(v2) == pytest.approx(50.0) and label2 == "area.csv"
    for bad in ("5,5,1,1", "1,2,3", "a,b,c,d"):
        with pytest.raises(InputError, match="area"):
            tg.area_from_option(bad)
    for bad in ("0,0,inf,5", "nan,0,1,1", "-inf,0,1,1"):
        with pytest.raises(InputError, match="four finite numbers"):
            tg.area_from_option(bad)
    f.write_text("x,y\n0,0\n1,1\n2,2\n")
    with pytest.raises(InputError, match="positive area"):
        tg.read_area(f)


def _basis(xy, metric="euclidean"):
    from bayesgeo.gp.kriging import make_basis

    n = len(xy)
    z = np.sin(np.asarray(xy)[:, 0] / 50.0)
    return make_basis(xy, z, np.ones((n, 1)), covariance="exponential", scale=30.0, partial_sill=1.0, nugget=0.1,
                      beta=[0.0], metric=metric)


def test_nearest_data_distance_and_extent_match_brute_force():
    """k-d tree nearest distances and the hull diameter equal brute-force minima/maxima of
    scipy.spatial.distance.cdist (planar) and of a haversine matrix (great-circle, across 180 degrees)."""
    from scipy.spatial.distance import cdist

    from bayesgeo.common.geometry import cross_distance

    rng = np.random.default_rng(11)
    xy = rng.uniform(0, 100, (60, 2))
    new = rng.uniform(-300, 400, (25, 2))
    np.testing.assert_allclose(tg.nearest_data_distance(xy, new), cdist(new, xy).min(axis=1), rtol=1e-12)
    assert tg.data_extent(xy) == pytest.approx(cdist(xy, xy).max(), rel=1e-12)
    ll = np.column_stack([rng.uniform(170, 190, 50), rng.uniform(-20, -5, 50)])
    new_ll = np.column_stack([rng.uniform(-180, 180, 30), rng.uniform(-60, 60, 30)])
    np.testing.assert_allclose(tg.nearest_data_distance(ll, new_ll, "greatcircle"),
                               cross_distance(new_ll, ll, "greatcircle").min(axis=1), rtol=1e-9, atol=1e-9)
    assert tg.data_extent(ll, "greatcircle") == pytest.approx(cross_distance(ll, ll, "greatcircle").max(), rel=1e-9)


def test_area_far_from_the_data_is_refused_and_near_area_accepted():
    """An area 4,000 units from data spanning 100 is refused naming both distances; an area over the data
    is averaged (behaviour check)."""
    from bayesgeo.predict.prediction import area_average

    rng = np.random.default_rng(12)
    xy = rng.uniform(0, 100, (40, 2))
    basis = _basis(xy)
    far = tg.discretise_area(tg.parse_rectangle("4000,4000,4100,4100"), points=100)
    with pytest.raises(InputError, match=r"area: the area lies outside the data: its nearest point is 5,5\d\d "
                                         r"distance units from the nearest data point, more than half the data's "
                                         r"extent \(1\d\d(\.\d)? distance units\)"):
        area_average(basis, far, np.ones((len(far), 1)))
    near = tg.discretise_area(tg.parse_rectangle("20,20,80,80"), points=100)
    assert np.isfinite(area_average(basis, near, np.ones((len(near), 1)))["mean"])


def test_far_lonlat_area_refused_in_km():
    """A lon/lat area about 4,000 km from Pacific data (written 0..360) is refused in km; distance check:
    the nearest points are on the equator 36+ degrees of longitude apart, about R * 0.63 = 4,000 km
    (arc-length formula)."""
    from bayesgeo.predict.prediction import area_average

    rng = np.random.default_rng(13)
    xy = np.column_stack([rng.uniform(170, 190, 40), rng.uniform(-5, 5, 40)])
    basis = _basis(xy, "greatcircle")
    far = tg.discretise_area(tg.parse_rectangle("-135,-5,-125,5"), points=100)
    with pytest.raises(InputError, match=r"its nearest point is [34],\d\d\d km from the nearest data point"):
        area_average(basis, far, np.ones((len(far), 1)))
    across = tg.discretise_area(tg.parse_rectangle("-178,-3,-172,3"), points=100)  # the same data, other convention
    assert np.isfinite(area_average(basis, across, np.ones((len(across), 1)))["mean"])


def test_far_target_points_warn_with_rows_and_distances(tmp_path):
    """--points farther from the data than the data's extent are predicted with a one-line warning naming
    their rows and distance, recorded in the predictions' attributes (behaviour check)."""
    from bayesgeo.common.csvtable import InputWarning
    from bayesgeo.predict.prediction import predict_targets

    rng = np.random.default_rng(14)
    xy = rng.uniform(0, 100, (40, 2))
    f = tmp_path / "pts.csv"
    f.write_text("x,y\n50,50\n5000,0\n60,40\n-900,-900\n")
    targets = tg.read_target_points(f)
    with pytest.warns(InputWarning, match=r"pts\.csv: 2 target points lie farther from the nearest data point than "
                                          r"the data's extent \(1\d\d(\.\d)? distance units\), up to 4,9\d\d distance units "
                                          r"\(rows 3, 5\)"):
        pred = predict_targets(_basis(xy), targets, scheduler="synchronous")
    assert "rows 3, 5" in pred.attrs["warning"]
    assert np.all(np.isfinite(pred["mean"].values))


def test_target_files_refuse_bad_bytes_and_ragged_rows(tmp_path):
    """Target and area files share the strict CSV reader: non-UTF-8 bytes and ragged rows are refused with row and column (behaviour check)."""
    f = tmp_path / "t.csv"
    f.write_bytes(b"x,y\n1,2\n3,4\xff\n")
    with pytest.raises(InputError, match=r"t\.csv: row 3, column 'y': byte 0xff is not UTF-8"):
        tg.read_target_points(f)
    f.write_text("x,y\n1,2\n3,4,5\n")
    with pytest.raises(InputError, match=r"t\.csv: row 3 has 3 fields but the header has 2"):
        tg.read_area(f)
