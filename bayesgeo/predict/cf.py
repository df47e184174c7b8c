"""Prediction files a GIS opens as georeferenced rasters: CF-1.8 coordinates, a grid mapping, north-up.

:func:`georeferenced` takes the predictions of :func:`bayesgeo.predict.prediction.predict_targets` and
returns the copy that is written to ``predictions*.nc``:

* ``x`` and ``y`` carry ``standard_name`` (``projection_x_coordinate`` / ``projection_y_coordinate``,
  or ``longitude`` / ``latitude`` for lon/lat data), ``units`` and ``axis`` (CF conventions 1.8, sections
  4.1-4.2 and 5.6);
* with a known CRS, a scalar grid-mapping variable ``crs`` holds pyproj's CF attributes of it
  (``grid_mapping_name`` and parameters, ``crs_wkt``) plus ``spatial_ref`` (the same WKT, which GDAL reads),
  and every data variable on the grid names it in ``grid_mapping`` (CF 1.8 section 5.6);
* a grid is stored north-up (``y`` descending), the row order of a GeoTIFF and of GDAL's NetCDF reader.

GDAL, QGIS and rioxarray then read the grid with its CRS and cell positions (tests/test_gis_output.py).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

__all__ = ["georeferenced", "georeferenced_fit_map", "GRID_MAPPING"]

#: Name of the grid-mapping variable.
GRID_MAPPING = "crs"

_CF_UNITS = {"m": "m", "km": "km", "ft": "ft", "ftUS": "US_survey_foot"}


def georeferenced(pred: xr.Dataset, *, crs_wkt: str = "", coords: str = "xy", distance_units: str = "") -> xr.Dataset:
    """The CF-1.8, north-up copy of the predictions ``pred`` (module docstring).

    Parameters
    ----------
    pred : xarray.Dataset
        Predictions on a grid (dims ``y``, ``x``) or at target points (dim ``target``).
    crs_wkt : str
        WKT of the coordinates' CRS ("" when unknown: no grid mapping is written).
    coords : {"xy", "lonlat"}
        Planar coordinates or degrees.
    distance_units : str
        Unit of planar coordinates (``"m"``, ...); units bayesgeo cannot name are left out.

    Returns
    -------
    xarray.Dataset
    """
    out = pred.copy()
    grid = "x" in out.dims and "y" in out.dims
    if grid and out.sizes["y"] > 1 and out["y"].values[0] < out["y"].values[-1]:
        out = out.isel(y=slice(None, None, -1))  # north-up
    if coords == "lonlat":
        out["x"].attrs.update(standard_name="longitude", long_name="longitude", units="degrees_east", axis="X")
        out["y"].attrs.update(standard_name="latitude", long_name="latitude", units="degrees_north", axis="Y")
    else:
        unit = _CF_UNITS.get(distance_units)
        for name, axis in (("x", "X"), ("y", "Y")):
            attrs = {"standard_name": f"projection_{name}_coordinate", "axis": axis,
                     "long_name": f"{'easting' if name == 'x' else 'northing'} of the cell centre" if grid
                     else f"{'easting' if name == 'x' else 'northing'}"}
            if unit:
                attrs["units"] = unit
            out[name].attrs.update(attrs)
    if crs_wkt:
        from pyproj import CRS

        crs = CRS.from_wkt(crs_wkt)
        attrs = {k: v for k, v in crs.to_cf().items() if v is not None}
        attrs.update(crs_wkt=crs_wkt, spatial_ref=crs_wkt, long_name=crs.name)
        out[GRID_MAPPING] = xr.DataArray(np.int32(0), attrs=attrs)
        spatial = {"y", "x"} if grid else {"target"}
        for name, var in out.data_vars.items():
            if name != GRID_MAPPING and spatial <= set(var.dims):
                var.attrs["grid_mapping"] = GRID_MAPPING
    return out


def georeferenced_fit_map(pred: xr.Dataset, fit) -> xr.Dataset:
    """Record the CRS of ``fit``'s data on its predictions ``pred`` (attributes ``crs_name`` and ``coords``, set
    in place for the figures drawn from ``pred``) and return the georeferenced copy: the one place both
    ``bayesgeo map`` and :func:`bayesgeo.predict.maps.predict_map` take a fit's CRS from (``settings["data"]``)."""
    data = fit.settings.get("data") or {}
    spec = fit.spec
    pred.attrs["crs_name"] = str(data.get("crs_name", ""))
    pred.attrs["coords"] = "lonlat" if spec.metric == "greatcircle" else "xy"
    return georeferenced(pred, crs_wkt=str(data.get("crs", "")), coords=pred.attrs["coords"],
                         distance_units=spec.distance_units)
