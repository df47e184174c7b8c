"""Where to predict: regular grids, point lists, the convex-hull mask and areas.

Targets are ``xarray.Dataset`` objects that :func:`bayesgeo.predict.prediction.predict_targets` accepts:

* a grid (``attrs["kind"] == "grid"``): 1-D coordinates ``x`` and ``y`` at cell centres and a
  boolean ``inside`` on dims ``(y, x)`` (false for masked cells, which are not computed);
* points (``attrs["kind"] == "points"``): dim ``target`` in input order with coordinates ``x``,
  ``y``, ``row`` (spreadsheet row in the input file) and any further numeric columns as data
  variables (covariates of the trend), and the labels of the trend's categories.

A grid takes the categories of the trend from a polygon layer (:func:`zone_grid`): each cell the
level of the polygon holding its centre; cells in no polygon are masked out.

Areas (polygons or rectangles) are discretised into points on a fine regular grid inside the
area (point-in-polygon by :class:`matplotlib.path.Path`) for block averages.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.common.csvtable import MAX_MAGNITUDE, number_problem, parse_number, read_table
from bayesgeo.common.validate import InputError, check_positive, format_rows
from bayesgeo.data.categories import refuse_unknown, zone_categories

__all__ = [
    "DEFAULT_CELLS",
    "grid_targets",
    "read_target_points",
    "zone_grid",
    "hull_mask",
    "read_area",
    "parse_rectangle",
    "area_from_option",
    "discretise_area",
    "polygon_area",
    "nearest_data_distance",
    "data_extent",
    "check_area_near_data",
    "far_targets_warning",
]

#: Cells along the longer side of a default grid.
DEFAULT_CELLS = 100
_MAX_CELLS = 25_000_000


def grid_targets(xy_obs, *, cell: float | None = None, margin: float = 0.0, cells: int = DEFAULT_CELLS,
                 hull: bool = False, metric: str = "euclidean") -> xr.Dataset:
    """Regular grid over the bounding box of the data, widened by ``margin``.

    For lon/lat data (``metric="greatcircle"``) ``cell`` and ``margin`` are in km and the cells are square
    on the ground at the box's middle latitude: the grid is laid out in km on the local equirectangular
    plane (x = R cos(lat_mid) lon, y = R lat, R = :data:`bayesgeo.common.geometry.EARTH_RADIUS_KM`) and
    its centres are given back in degrees, so a cell is ``cell`` km wide in both directions there.

    Parameters
    ----------
    xy_obs : array (n, 2)
        Data locations.
    cell : float, optional
        Cell side (distance units). Default: the longer side of the box divided by ``cells``.
    margin : float
        Added on every side of the box (distance units, >= 0).
    cells : int
        Cells along the longer side when ``cell`` is not given.
    hull : bool
        Mark cells whose centre lies outside the convex hull of the data as not ``inside``.

    Returns
    -------
    xarray.Dataset
        Coordinates ``x``, ``y`` (cell centres), variable ``inside`` (y, x); attrs ``kind``,
        ``cell``, ``margin``, ``hull_mask``.
    """
    xy = np.asarray(xy_obs, dtype=float)
    if metric == "greatcircle":
        return _lonlat_grid(xy, cell=cell, margin=margin, cells=cells, hull=hull)
    if not (np.isfinite(margin) and margin >= 0):
        raise InputError(f"margin: expected a number >= 0, got {margin!r}")
    x0, y0 = xy.min(axis=0) - margin
    x1, y1 = xy.max(axis=0) + margin
    width, height = x1 - x0, y1 - y0
    side = max(width, height)
    if not side > 0:
        raise InputError("grid: the data span no area; give --cell and --margin, or target --points")
    cell = side / cells if cell is None else check_positive(cell, "cell")
    nx, ny = max(1, math.ceil(width / cell - 1e-9)), max(1, math.ceil(height / cell - 1e-9))
    if nx * ny > _MAX_CELLS:
        raise InputError(f"cell: {cell:g} gives {nx} x {ny} = {nx * ny} cells (limit {_MAX_CELLS}); use a larger cell")
    # centre the grid on the box so that the extra part of the last cell is shared by both sides
    gx = x0 + (width - nx * cell) / 2.0 + cell * (np.arange(nx) + 0.5)
    gy = y0 + (height - ny * cell) / 2.0 + cell * (np.arange(ny) + 0.5)
    inside = np.ones((ny, nx), dtype=bool)
    if hull:
        xx, yy = np.meshgrid(gx, gy)
        inside = hull_mask(xy, np.column_stack([xx.ravel(), yy.ravel()])).reshape(ny, nx)
    ds = xr.Dataset({"inside": (("y", "x"), inside, {"long_name": "cell is predicted (inside the mask)"})},
                    coords={"x": ("x", gx, {"long_name": "x of cell centre"}),
                            "y": ("y", gy, {"long_name": "y of cell centre"})})
    ds.attrs.update({"kind": "grid", "cell": float(cell), "margin": float(margin), "hull_mask": int(bool(hull))})
    return ds


def _lonlat_grid(xy: np.ndarray, *, cell, margin, cells, hull) -> xr.Dataset:
    """:func:`grid_targets` for lon/lat data: laid out in km on the local plane, centres in degrees."""
    from bayesgeo.common.geometry import EARTH_RADIUS_KM

    lat_mid = 0.5 * (xy[:, 1].min() + xy[:, 1].max())
    ky = math.pi * EARTH_RADIUS_KM / 180.0  # km per degree of latitude
    kx = ky * math.cos(math.radians(lat_mid))  # km per degree of longitude at the middle latitude
    km = grid_targets(xy * [kx, ky], cell=cell, margin=margin, cells=cells)
    out = km.assign_coords(x=("x", km["x"].values / kx, {"long_name": "longitude of cell centre",
                                                        "units": "degrees_east"}),
                           y=("y", km["y"].values / ky, {"long_name": "latitude of cell centre",
                                                        "units": "degrees_north"}))
    if hull:
        xx, yy = np.meshgrid(out["x"].values, out["y"].values)
        out["inside"] = (("y", "x"), hull_mask(xy, np.column_stack([xx.ravel(), yy.ravel()])).reshape(xx.shape),
                         dict(out["inside"].attrs))
    out.attrs.update({"hull_mask": int(bool(hull)), "cell_units": "km", "cell_degrees": [km.attrs["cell"] / kx,
                                                                                        km.attrs["cell"] / ky]})
    return out


def hull_mask(xy_obs, xy_new) -> np.ndarray:
    """True where a target lies inside (or on) the convex hull of the data (scipy Delaunay)."""
    from scipy.spatial import Delaunay, QhullError

    try:
        tri = Delaunay(np.asarray(xy_obs, dtype=float))
    except QhullError:
        raise InputError("hull_mask: the data points are collinear and have no convex hull with an area") from None
    return tri.find_simplex(np.asarray(xy_new, dtype=float), tol=1e-9) >= 0


def _read_csv(path: str | Path, what: str) -> tuple[list[str], list[list[str]], str, list[int]]:
    table = read_table(path, what=what)
    return table.header, [cells for _, cells in table.rows], table.src, [r for r, _ in table.rows]


def _column(header: list[str], names: tuple[str, ...], src: str) -> int:
    lower = [h.lower() for h in header]
    for n in names:
        if n in lower:
            return lower.index(n)
    raise InputError(f"{src}: no column {names[0]!r} (looked for {', '.join(names)}); columns are: {', '.join(header)}")


def _numbers(body, col: int, name: str, src: str, rows: list[int]) -> np.ndarray:
    out = np.empty(len(body))
    for i, r in enumerate(body):
        text = r[col].strip()
        v = parse_number(text) if text else None
        if v is None:
            raise InputError(f"{src}: row {rows[i]}, column {name!r}: {number_problem(text)}")
        if not np.isfinite(v):
            raise InputError(f"{src}: row {rows[i]}, column {name!r}: {text!r} is not a finite number")
        if abs(v) > MAX_MAGNITUDE:
            raise InputError(f"{src}: row {rows[i]}, column {name!r}: {text} is too large in magnitude "
                             f"(limit {MAX_MAGNITUDE:g}); rescale the column (other units)")
        out[i] = v
    return out


def read_target_points(path: str | Path, *, columns: tuple[str, ...] = (),
                       categories: Mapping[str, Sequence[str]] | None = None) -> xr.Dataset:
    """Read prediction points from a CSV with columns ``x``, ``y`` (or ``easting``, ``northing``).

    Parameters
    ----------
    path : str or Path
    columns : tuple of str
        Further columns required (covariates of the trend), read as numbers.
    categories : mapping, optional
        Category columns of the trend -> the levels the fit has seen: read as labels (surrounding
        spaces removed); an empty cell or another level is refused, naming the rows.

    Returns
    -------
    xarray.Dataset
        Along ``target`` in file order; coordinates ``x``, ``y``, ``row``; ``inside`` (all true)
        and one variable per column in ``columns``.

    Raises
    ------
    InputError
        Missing file or column, empty table, or a cell that is not a finite number, naming the
        file, the row (header = row 1) and the column.
    """
    header, body, src, rows = _read_csv(path, "--points")
    if not body:
        raise InputError(f"{src}: no target points below the header")
    ix = _column(header, ("x", "easting", "lon", "longitude"), src)
    iy = _column(header, ("y", "northing", "lat", "latitude"), src)
    ds = xr.Dataset(coords={"x": ("target", _numbers(body, ix, header[ix], src, rows)),
                            "y": ("target", _numbers(body, iy, header[iy], src, rows)),
                            "row": ("target", np.array(rows))})
    for c in columns:
        if c not in header:
            raise InputError(f"{src}: the trend needs covariate column {c!r} at the target points; columns are: "
                             f"{', '.join(header)}")
        ds[c] = ("target", _numbers(body, header.index(c), c, src, rows))
    for c, levels in (categories or {}).items():
        if c not in header:
            raise InputError(f"{src}: the trend needs category column {c!r} at the target points; columns are: "
                             f"{', '.join(header)}")
        labels = np.array([r[header.index(c)].strip() for r in body], dtype=str)
        empty = np.flatnonzero(labels == "")
        if empty.size:
            raise InputError(f"{src}: empty cells in category column {c!r} at rows "
                             f"{format_rows(np.asarray(rows)[empty])}; give every target point a level")
        refuse_unknown(labels, list(levels), c, src, rows=rows)
        ds[c] = ("target", labels)
    ds["inside"] = ("target", np.ones(len(body), dtype=bool))
    ds.attrs.update({"kind": "points", "source": src})
    return ds


def zone_grid(targets: xr.Dataset, path: str | Path, categories: Mapping[str, Sequence[str]], *,
              layer: str | None = None, crs: str | None = None) -> xr.Dataset:
    """A copy of the grid ``targets`` whose cells take the trend's categories from a polygon layer.

    Each cell takes the level of the polygon holding its centre
    (:func:`bayesgeo.data.categories.zone_categories`); a cell whose centre lies in no polygon is
    masked out (``inside`` false), counted in ``attrs["cells_outside_zones"]``.

    Parameters
    ----------
    targets : xarray.Dataset
        A grid from :func:`grid_targets`.
    path : str or Path
        The polygon layer (GeoPackage, shapefile, GeoJSON, FlatGeobuf), in the fit's coordinates.
    categories : mapping
        Category column -> the levels the fit has seen; each column an attribute of the polygons.
    layer, crs : str, optional
        Layer of a file holding several; the fit's CRS (a layer declaring another is refused).
    """
    xx, yy = np.meshgrid(targets["x"].values, targets["y"].values)
    labels, covered = zone_categories(path, np.column_stack([xx.ravel(), yy.ravel()]), categories, layer=layer,
                                      crs=crs)
    shape = targets["inside"].shape
    out = targets.copy()
    was = np.asarray(targets["inside"].values, dtype=bool)
    out["inside"] = (("y", "x"), was & covered.reshape(shape), dict(targets["inside"].attrs))
    for c, v in labels.items():
        out[c] = (("y", "x"), v.reshape(shape), {"long_name": f"level of {c!r} at the cell centre ('' outside "
                                                             "every zone polygon)"})
    out.attrs.update(zones=str(path), cells_outside_zones=int(np.count_nonzero(was & ~covered.reshape(shape))))
    return out


def polygon_area(vertices) -> float:
    """Area enclosed by a simple polygon (shoelace formula), squared distance units."""
    v = np.asarray(vertices, dtype=float)
    x, y = v[:, 0], v[:, 1]
    return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def read_area(path: str | Path) -> np.ndarray:
    """Polygon vertices (k, 2) from a CSV with columns ``x``, ``y``, in drawing order.

    The polygon is closed automatically; at least three distinct vertices enclosing a positive
    area are required.
    """
    header, body, src, rows = _read_csv(path, "--area")
    ix = _column(header, ("x", "easting", "lon", "longitude"), src)
    iy = _column(header, ("y", "northing", "lat", "latitude"), src)
    v = np.column_stack([_numbers(body, ix, header[ix], src, rows), _numbers(body, iy, header[iy], src, rows)])
    if len(v) > 1 and np.all(v[0] == v[-1]):
        v = v[:-1]
    if len(v) < 3 or not polygon_area(v) > 0:
        raise InputError(f"{src}: an area needs at least 3 vertices enclosing a positive area (got {len(v)})")
    return v


def parse_rectangle(text: str) -> np.ndarray:
    """Vertices of the rectangle ``"xmin,ymin,xmax,ymax"``."""
    parts = [p.strip() for p in str(text).split(",")]
    try:
        x0, y0, x1, y1 = (float(p) for p in parts)
    except ValueError:
        raise InputError(f"area: expected a CSV file or xmin,ymin,xmax,ymax, got {text!r}") from None
    if not all(map(math.isfinite, (x0, y0, x1, y1))):
        raise InputError(f"area: xmin,ymin,xmax,ymax must be four finite numbers, got {text!r}")
    if not (x1 > x0 and y1 > y0):
        raise InputError(f"area: need xmin < xmax and ymin < ymax, got {text!r}")
    return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]])


def area_from_option(text: str) -> tuple[np.ndarray, str]:
    """Vertices and a label from an ``--area`` value: a vertex CSV file or four numbers."""
    if Path(text).is_file() or str(text).count(",") != 3:
        return read_area(text), Path(text).name
    return parse_rectangle(text), f"rectangle {text}"


def discretise_area(vertices, *, points: int = 400) -> np.ndarray:
    """About ``points`` locations on a regular grid inside a polygon (cell centres).

    The grid spacing is sqrt(area / points); if fewer than 16 centres fall inside (a thin
    polygon), the spacing is halved until at least 16 do.

    Returns
    -------
    ndarray (M, 2)
    """
    from matplotlib.path import Path as MplPath

    v = np.asarray(vertices, dtype=float)
    path = MplPath(np.vstack([v, v[:1]]), closed=True)
    (x0, y0), (x1, y1) = v.min(axis=0), v.max(axis=0)
    h = math.sqrt(polygon_area(v) / max(int(points), 1))
    for _ in range(12):
        gx = np.arange(x0 + h / 2.0, x1, h)
        gy = np.arange(y0 + h / 2.0, y1, h)
        xx, yy = np.meshgrid(gx, gy)
        pts = np.column_stack([xx.ravel(), yy.ravel()])
        pts = pts[path.contains_points(pts)]
        if len(pts) >= 16:
            return pts
        h /= 2.0
    raise InputError("area: the polygon is too thin to place points inside it")


def _unit_vectors(xy) -> np.ndarray:
    lon, lat = np.radians(xy[:, 0]), np.radians(xy[:, 1])
    return np.column_stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])


def nearest_data_distance(xy_obs, xy_new, metric: str = "euclidean") -> np.ndarray:
    """Distance from each row of ``xy_new`` to the nearest data location (distance units; km for ``greatcircle``).

    A k-d tree (scipy) on the planar coordinates, or on unit vectors for great-circle distances
    (chord c to angle 2 arcsin(c / 2)), so no targets x data matrix is built.
    """
    from scipy.spatial import cKDTree

    from bayesgeo.common.geometry import EARTH_RADIUS_KM

    a = np.asarray(xy_obs, dtype=float)
    b = np.asarray(xy_new, dtype=float).reshape(-1, 2)
    if metric == "greatcircle":
        chord, _ = cKDTree(_unit_vectors(a)).query(_unit_vectors(b))
        return 2.0 * EARTH_RADIUS_KM * np.arcsin(np.clip(chord / 2.0, 0.0, 1.0))
    d, _ = cKDTree(a).query(b)
    return d


def data_extent(xy_obs, metric: str = "euclidean") -> float:
    """Largest distance between two data locations (the diameter of their convex hull)."""
    from scipy.spatial import ConvexHull, QhullError

    from bayesgeo.common.geometry import continuous_longitudes, cross_distance

    xy = np.array(xy_obs, dtype=float)
    if metric == "greatcircle":
        xy[:, 0] = continuous_longitudes(xy[:, 0])
    try:
        cand = xy[ConvexHull(xy).vertices]
    except (QhullError, ValueError):
        cand = xy[np.unique([xy[:, 0].argmin(), xy[:, 0].argmax(), xy[:, 1].argmin(), xy[:, 1].argmax()])]
    return float(cross_distance(cand, cand, metric).max())


def _units(metric: str) -> str:
    return "km" if metric == "greatcircle" else "distance units"


def check_area_near_data(xy_obs, xy_area, metric: str = "euclidean") -> None:
    """Refuse an area all of whose points are farther from the data than half the data's extent.

    There the kriging predictor has reverted to the fitted mean and the prior variance: an
    average over such an area says nothing the data support.
    """
    near = float(nearest_data_distance(xy_obs, xy_area, metric).min())
    extent = data_extent(xy_obs, metric)
    if near > 0.5 * extent:
        u = _units(metric)
        raise InputError(
            f"area: the area lies outside the data: its nearest point is {near:,.4g} {u} from the nearest data "
            f"point, more than half the data's extent ({extent:,.4g} {u}); an average there is the fitted mean with "
            "prior uncertainty, not an estimate from the data; choose an area over or next to the data")


def far_targets_warning(xy_obs, xy_targets, rows, metric: str = "euclidean", *, what: str = "target points") -> str:
    """A warning naming the targets farther from the nearest data point than the data's extent ('' if none)."""
    d = nearest_data_distance(xy_obs, xy_targets, metric)
    extent = data_extent(xy_obs, metric)
    far = np.flatnonzero(d > extent)
    if not far.size:
        return ""
    from bayesgeo.common.validate import format_rows

    u = _units(metric)
    return (f"{len(far)} {what} lie farther from the nearest data point than the data's extent ({extent:,.4g} {u}), "
            f"up to {d[far].max():,.4g} {u} (rows {format_rows(np.asarray(rows)[far])}); predictions there are the "
            "fitted mean with prior uncertainty, not estimates from the data")
