"""Map results a GIS takes directly: GeoTIFF rasters and a GeoPackage of samples and exceedance areas.

From the georeferenced predictions of a grid (:func:`bayesgeo.predict.cf.georeferenced`):

* :func:`write_geotiffs`: one single-band GeoTIFF per map statistic (``mean``, ``sd``, ``q05``, ``q50``,
  ``q95``, and ``p_exceed_<threshold>`` per threshold), float32, north-up, NaN as no-data, the fit's CRS
  (rasterio / GDAL);
* :func:`write_geopackage`: layer ``exceedance``, one (multi)polygon per threshold and probability
  level: the union of the grid cells where the posterior predictive probability of exceeding the
  threshold is at least the level (default 0.5 and 0.9), with its area, the probability that the area above
  the threshold is larger and that area's simulated 5/50/95% quantiles (from the map's joint simulations,
  :mod:`bayesgeo.predict.simulation`); layer ``samples``, the sample
  points with their values and, where present, non-detect flags and standardised leave-one-out residuals; layer ``area_average``, the polygon of
  an area average (``map --area``) with its mean, sd, 90% interval and exceedance probabilities
  (pyogrio / GDAL).

The polygons follow cell edges (each cell is the square around its centre), so their area is a whole
number of cells: in the CRS's units squared for planar data, geodesic m^2 on WGS 84 (pyproj) for lon/lat.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from bayesgeo.predict.figures import DECISION_LEVELS, threshold_label

__all__ = ["STATISTICS", "write_geotiffs", "exceedance_polygons", "write_geopackage"]

#: Map statistics written as GeoTIFF (besides one exceedance probability per threshold).
STATISTICS = ("mean", "sd", "q05", "q50", "q95")


def _grid_transform(pred: xr.Dataset):
    """The affine transform of a north-up grid of cell centres ``x`` (ascending), ``y`` (descending)."""
    from rasterio.transform import from_origin

    x, y = pred["x"].values, pred["y"].values
    dx = float(x[1] - x[0]) if x.size > 1 else float(pred.attrs.get("cell", 1.0))
    dy = float(y[0] - y[1]) if y.size > 1 else dx
    if not (dx > 0 and dy > 0):
        raise ValueError("the grid must be north-up with x ascending (bayesgeo.predict.cf.georeferenced)")
    return from_origin(float(x[0]) - dx / 2, float(y[0]) + dy / 2, dx, dy), dx, dy


def _crs(pred: xr.Dataset):
    from rasterio.crs import CRS

    wkt = pred["crs"].attrs.get("crs_wkt") if "crs" in pred else None
    return CRS.from_wkt(wkt) if wkt else None


def _layers(pred: xr.Dataset) -> dict[str, xr.DataArray]:
    out = {k: pred[k] for k in STATISTICS if k in pred}
    for j, t in enumerate(np.atleast_1d(pred["threshold"].values) if "threshold" in pred.coords else []):
        out[f"p_exceed_{threshold_label(float(t))}"] = pred["p_exceed"].isel(threshold=j)
    return out


def write_geotiffs(pred: xr.Dataset, folder: str | Path) -> list[Path]:
    """Write one GeoTIFF per map statistic of the grid ``pred`` into ``folder`` (module docstring).

    Returns
    -------
    list of Path
        The files written, in statistic order.
    """
    import rasterio

    transform, _, _ = _grid_transform(pred)
    crs = _crs(pred)
    written = []
    for name, da in _layers(pred).items():
        path = Path(folder) / f"{name}.tif"
        values = np.asarray(da.transpose("y", "x").values, dtype=np.float32)
        with rasterio.open(path, "w", driver="GTiff", height=values.shape[0], width=values.shape[1], count=1,
                           dtype="float32", crs=crs, transform=transform, nodata=np.float32(np.nan),
                           compress="deflate") as dst:
            dst.write(values, 1)
            dst.update_tags(units=str(da.attrs.get("units", "")), long_name=str(da.attrs.get("long_name", "")),
                            caution=str(pred.attrs.get("caution", "")))
            dst.set_band_description(1, name)
        written.append(path)
    return written


def exceedance_polygons(pred: xr.Dataset, levels=DECISION_LEVELS) -> list[dict]:
    """Per threshold and level, the cells where P(exceed) >= level, as one shapely (multi)polygon with its area.

    Returns
    -------
    list of dict
        ``threshold``, ``level``, ``cells``, ``area``, ``area_units``, ``geometry`` (empty when no cell
        reaches the level) and ``p_true_area_larger``: with the simulated counts ``cells_above`` in ``pred``
        (:func:`bayesgeo.predict.simulation.simulate_targets`, made by ``map`` by default), the share of
        simulated fields (over draws and simulations) with more cells above the threshold than the polygon
        has, i.e. the posterior probability that the true area above the threshold is larger than the
        polygon; NaN without them. Areas are compared in cells, equal in area on a planar grid (on a
        lon/lat grid they differ by the cosine of latitude across the rows, negligible over a site).
        ``simulated_area`` (q05, q50, q95): the 5%, 50% and 95% quantiles over the simulated fields of the
        area above the threshold (cells times the cell area; geodesic at the grid's middle row for lon/lat),
        the same for every level of a threshold; NaN without simulations.
    """
    import shapely
    from rasterio.features import shapes

    transform, dx, dy = _grid_transform(pred)
    lonlat = pred["x"].attrs.get("units") == "degrees_east"
    unit = pred["x"].attrs.get("units", "")
    counts = pred["cells_above"].transpose("threshold", ...).values if "cells_above" in pred else None
    cell_area, geod = dx * dy, None
    if lonlat:
        from pyproj import Geod

        geod = Geod(ellps="WGS84")
        x0, y0 = float(pred["x"].values[0]), float(pred["y"].values[pred.sizes["y"] // 2])
        lons, lats = [x0 - dx / 2, x0 + dx / 2, x0 + dx / 2, x0 - dx / 2], [y0 - dy / 2, y0 - dy / 2, y0 + dy / 2,
                                                                         y0 + dy / 2]
        cell_area = abs(geod.polygon_area_perimeter(lons, lats)[0])
    out = []
    for j, t in enumerate(np.atleast_1d(pred["threshold"].values)):
        above_sim = None if counts is None else counts[j]
        spread = (np.full(3, np.nan) if above_sim is None or not above_sim.size
                  else np.quantile(above_sim, [0.05, 0.5, 0.95]) * cell_area)
        prob = np.asarray(pred["p_exceed"].isel(threshold=j).transpose("y", "x").values, dtype=float)
        for level in levels:
            mask = np.nan_to_num(prob, nan=0.0) >= level
            parts = [shapely.geometry.shape(g) for g, v in shapes(mask.astype(np.uint8), mask=mask,
                                                                  transform=transform) if v == 1]
            geom = shapely.union_all(parts) if parts else shapely.MultiPolygon()
            if geom.geom_type == "Polygon":
                geom = shapely.MultiPolygon([geom])
            if geod is not None:
                area, units = abs(geod.geometry_area_perimeter(geom)[0]) if parts else 0.0, "m2"
            else:
                area, units = float(mask.sum()) * dx * dy, f"{unit}2" if unit else "coordinate units squared"
            larger = np.nan if above_sim is None else float(np.mean(above_sim > mask.sum()))
            out.append({"threshold": float(t), "level": float(level), "cells": int(mask.sum()), "area": float(area),
                        "area_units": units, "geometry": geom, "p_true_area_larger": larger,
                        "simulated_area": tuple(float(v) for v in spread)})
    return out


def write_geopackage(path: str | Path, pred: xr.Dataset, *, samples: xr.Dataset | None = None,
                     levels=DECISION_LEVELS, area: tuple | None = None) -> Path:
    """Write the GeoPackage ``path`` with layers ``exceedance`` (and ``samples`` when given; module docstring).

    Parameters
    ----------
    path : str or Path
        The new file (it must not exist).
    pred : xarray.Dataset
        Georeferenced grid predictions with ``p_exceed``.
    samples : xarray.Dataset, optional
        ``x``, ``y`` and ``value`` along ``obs`` (and ``censored``, ``row`` when present).
    levels : sequence of float
        Probability levels of the polygons.
    area : (vertices, block), optional
        The polygon of an area average, (k, 2) vertices, and its result (``mean``, ``sd``, ``q05``, ``q95``,
        ``threshold``, ``p_exceed``, ``area``; :func:`bayesgeo.predict.prediction.area_average`).
    """
    import warnings

    with warnings.catch_warnings():  # data without a CRS (docs/data_files.md): no pyogrio warning on stderr
        warnings.filterwarnings("ignore", message="'crs' was not provided", category=UserWarning)
        return _write_layers(Path(path), pred, samples=samples, levels=levels, area=area)


def _write_layers(path: Path, pred: xr.Dataset, *, samples, levels, area) -> Path:
    import shapely
    from pyogrio.raw import write

    wkt = pred["crs"].attrs.get("crs_wkt") if "crs" in pred else None
    polys = exceedance_polygons(pred, levels)
    units = str(pred.attrs.get("value_units", ""))
    write(path, shapely.to_wkb(np.array([p["geometry"] for p in polys], dtype=object)),
          fields=["threshold", "threshold_units", "probability_level", "cells", "area", "area_units",
                  "p_true_area_larger", "simulated_area_q05", "simulated_area_q50", "simulated_area_q95"],
          field_data=[np.array([p["threshold"] for p in polys]), np.array([units] * len(polys), dtype=object),
                      np.array([p["level"] for p in polys]), np.array([p["cells"] for p in polys], dtype=np.int64),
                      np.array([p["area"] for p in polys]), np.array([p["area_units"] for p in polys], dtype=object),
                      np.array([p["p_true_area_larger"] for p in polys]),
                      *(np.array([p["simulated_area"][i] for p in polys]) for i in range(3))],
          geometry_type="MultiPolygon", crs=wkt, driver="GPKG", layer="exceedance")
    if samples is not None:
        pts = shapely.points(np.column_stack([samples["x"].values, samples["y"].values]))
        fields = {"value": np.asarray(samples["value"].values, dtype=float)}
        if "row" in samples.coords:
            fields["file_row"] = np.asarray(samples["row"].values, dtype=np.int64)
        if "censored" in samples:
            fields["non_detect"] = np.asarray(samples["censored"].values, dtype=np.int64)
        if "loo_residual" in samples:
            fields["loo_residual"] = np.asarray(samples["loo_residual"].values, dtype=float)
        write(path, shapely.to_wkb(pts), fields=list(fields), field_data=list(fields.values()),
              geometry_type="Point", crs=wkt, driver="GPKG", layer="samples")
    if area is not None:
        vertices, block = area
        ring = np.vstack([np.asarray(vertices, dtype=float), np.asarray(vertices, dtype=float)[:1]])
        fields = {"label": np.array([str(block.get("area", ""))], dtype=object)}
        for k in ("mean", "sd", "q05", "q95", "area_size"):
            fields[k] = np.array([float(block.get(k, np.nan))])
        for t, p in zip(block.get("threshold", []), block.get("p_exceed", [])):
            fields[f"p_exceed_{threshold_label(float(t))}"] = np.array([float(p)])
        fields["units"] = np.array([str(block.get("units", ""))], dtype=object)
        write(path, shapely.to_wkb(np.array([shapely.Polygon(ring)], dtype=object)), fields=list(fields),
              field_data=list(fields.values()), geometry_type="Polygon", crs=wkt, driver="GPKG", layer="area_average")
    return path
