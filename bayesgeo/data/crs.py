"""Coordinate reference systems of point data: read, checked, and projected to metres when asked.

A CRS comes from the file (GIS formats) or from the user (``--crs``: an EPSG code such as
``EPSG:32633`` or ``32633``, or WKT), through pyproj. A geographic CRS (degrees) makes the
coordinates lon/lat (great-circle distances in km); a projected one, or a local site grid (an engineering
CRS in WKT), makes them planar, in the CRS's axis unit. ``to="utm"`` (or another CRS) projects the points with pyproj before anything is computed, so
distances, ranges, cells and areas are in metres; the UTM zone is the one of the data's centre
(longitudes across 180 degrees are taken as one continuous range first). The CRS of the analysis is
kept as WKT in the data's attributes and goes into every output (docs/data_files.md).
"""

from __future__ import annotations

import numpy as np

from bayesgeo.common.geometry import continuous_longitudes, cross_distance
from bayesgeo.common.validate import InputError, format_rows

__all__ = ["refuse_lonlat_lookalike", "check_lonlat_ranges", "parse_crs", "resolve_crs", "coords_for", "georeference", "crs_attrs", "crs_unit", "utm_crs", "project"]

#: Axis unit names of pyproj -> the short unit bayesgeo records.
_UNITS = {"metre": "m", "meter": "m", "kilometre": "km", "foot": "ft", "US survey foot": "ftUS"}


def parse_crs(text, what: str = "crs"):
    """A :class:`pyproj.CRS` from an EPSG code (``"EPSG:32633"``, ``"32633"``, 32633), WKT or PROJ text.

    Raises
    ------
    InputError
        ``what: ...`` when pyproj does not know it.
    """
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    raw = str(text).strip()
    try:
        return CRS.from_user_input(int(raw) if raw.isdigit() else raw)
    except CRSError as err:
        raise InputError(f"{what}: {raw[:60]!r} is not a coordinate reference system pyproj knows ({err})"
                         ) from None


def resolve_crs(file_crs: str | None, option: str | None, src: str):
    """The CRS of the data: the file's, or ``option``'s (``--crs``) when the file declares none.

    Raises
    ------
    InputError
        Both given and different (the file is never overruled silently), or a CRS that is neither
        geographic nor projected.
    """
    if file_crs is None and option is None:
        return None
    given = parse_crs(option, "crs") if option is not None else None
    declared = parse_crs(file_crs, f"{src}: the file's CRS") if file_crs is not None else None
    if given is not None and declared is not None and not given.equals(declared, ignore_axis_order=True):
        raise InputError(f"{src}: the file declares {_label(declared)} but --crs says {_label(given)}; reproject the "
                         "file in your GIS or drop --crs")
    crs = declared if declared is not None else given
    if not (crs.is_geographic or crs.is_projected or crs.is_engineering):
        raise InputError(f"{src}: CRS {_label(crs)} is neither geographic, projected nor a local grid; give a 2-D "
                         "horizontal CRS")
    return crs


def _label(crs) -> str:
    code = crs.to_epsg()
    return f"EPSG:{code} ({crs.name})" if code else str(crs.name)


def crs_unit(crs) -> str:
    """The distance unit of a projected CRS's first axis (``"m"``, ``"ft"``, ...)."""
    name = crs.axis_info[0].unit_name
    return _UNITS.get(name, name)


def crs_attrs(crs, *, source=None) -> dict:
    """Attributes recording a CRS: ``crs`` (WKT2), ``crs_name`` (``EPSG:n (name)``), and ``source_crs_name``
    when the points were projected from ``source``."""
    out = {"crs": crs.to_wkt(), "crs_name": _label(crs)}
    if source is not None:
        out["source_crs_name"] = _label(source)
    return out


def utm_crs(lon: np.ndarray, lat: np.ndarray):
    """The WGS 84 UTM zone CRS of the centre of the points (pyproj's database; longitudes in degrees, any
    convention, the data may cross 180 degrees)."""
    from pyproj import CRS
    from pyproj.aoi import AreaOfInterest
    from pyproj.database import query_utm_crs_info

    lon_c = float(np.mean(continuous_longitudes(np.asarray(lon, dtype=float))))
    lon_c = (lon_c + 180.0) % 360.0 - 180.0
    lat_c = float(np.mean(lat))
    found = query_utm_crs_info(datum_name="WGS 84", area_of_interest=AreaOfInterest(lon_c, lat_c, lon_c, lat_c))
    if not found:  # pragma: no cover - every point of the globe between 80 S and 84 N has a zone
        raise InputError(f"to_crs: no UTM zone covers the data's centre ({lon_c:.3f}, {lat_c:.3f})")
    return CRS.from_epsg(int(found[0].code))


def project(x: np.ndarray, y: np.ndarray, source, target) -> tuple[np.ndarray, np.ndarray]:
    """Coordinates ``(x, y)`` in ``source`` re-expressed in ``target`` (pyproj, x = easting / longitude first).

    Raises
    ------
    InputError
        A point pyproj cannot project (outside the target's domain).
    """
    from pyproj import Transformer

    tx, ty = Transformer.from_crs(source, target, always_xy=True).transform(np.asarray(x, dtype=float),
                                                                              np.asarray(y, dtype=float))
    tx, ty = np.asarray(tx, dtype=float), np.asarray(ty, dtype=float)
    bad = ~(np.isfinite(tx) & np.isfinite(ty))
    if bad.any():
        raise InputError(f"to_crs: {int(bad.sum())} points cannot be projected to {_label(target)} (outside its area)")
    return tx, ty


def coords_for(crs, coords: str, src: str) -> str:
    """``"lonlat"`` for a geographic CRS, ``"xy"`` for a projected one, ``coords`` without a CRS; refuses a
    ``coords`` setting that contradicts the CRS."""
    if crs is None:
        return coords
    kind = "lonlat" if crs.is_geographic else "xy"
    if coords not in ("auto", kind):
        what = "geographic (degrees)" if kind == "lonlat" else "projected (planar)"
        raise InputError(f"{src}: the CRS {_label(crs)} is {what} but --coords says {coords}; drop --coords")
    return kind


def georeference(x: np.ndarray, y: np.ndarray, *, crs, to_crs: str | None, lonlat: bool,
                 distance_units: str | None, src: str):
    """The coordinates the analysis uses and the attributes that record their CRS.

    Parameters
    ----------
    x, y : ndarray
        Coordinates as read (longitudes already continuous for lon/lat).
    crs : pyproj.CRS or None
        The data's CRS (:func:`resolve_crs`).
    to_crs : str or None
        ``"utm"`` (the UTM zone of the data's centre) or a projected CRS to project the points to.
    lonlat : bool
        The coordinates are degrees (great-circle distances).
    distance_units : str or None
        The user's distance unit, checked against the CRS's.

    Returns
    -------
    x, y : ndarray
    lonlat : bool
    distance_units : str
    attrs : dict
        ``crs`` (WKT, or "" when unknown), ``crs_name`` and, after a projection, ``source_crs_name``.
    """
    from pyproj import CRS

    if to_crs is not None:
        if crs is None and not lonlat:
            raise InputError(f"{src}: --to-crs needs the CRS of the coordinates; give it with --crs")
        source = crs if crs is not None else CRS.from_epsg(4326)
        if str(to_crs).strip().lower() == "utm":
            lon, lat = (x, y) if source.is_geographic else project(x, y, source, CRS.from_epsg(4326))
            target = utm_crs(lon, lat)
        else:
            target = parse_crs(to_crs, "to_crs")
        if not target.is_projected:
            raise InputError(f"to_crs: {_label(target)} is not a projected CRS; give one in metres, or 'utm'")
        x, y = project(x, y, source, target)
        return x, y, False, _unit(target, distance_units), crs_attrs(target, source=source)
    if crs is None:
        if lonlat:  # degrees without a declared datum: WGS 84, the datum of GPS, recorded as assumed
            return x, y, True, "km", {"crs": CRS.from_epsg(4326).to_wkt(),
                                      "crs_name": "EPSG:4326 (WGS 84), assumed for lon/lat"}
        return x, y, False, distance_units or "coordinate units", {"crs": "", "crs_name": ""}
    if crs.is_geographic:
        return x, y, True, "km", crs_attrs(crs)
    return x, y, False, _unit(crs, distance_units), crs_attrs(crs)


def _unit(crs, given: str | None) -> str:
    unit = crs_unit(crs)
    if given not in (None, unit):
        raise InputError(f"distance_units: the CRS {_label(crs)} is in {unit}, not {given!r}; drop --distance-units")
    return unit


def refuse_lonlat_lookalike(xv, yv, xcol, ycol, src) -> None:
    """Under ``--coords auto``, refuse coordinates that could be degrees.

    Values alone cannot tell a 20 x 10 degree region from a 20 x 10 m plot, and treating degrees
    as planar units silently gives wrong distances (a degree of longitude shrinks with latitude).
    So coordinates that all lie in the degree box (|lat| <= 90 and lon in [-180, 180] or
    [0, 360]) need ``--coords lonlat`` or ``--coords xy``, whatever their span or column names.
    """
    in_lat = np.all(np.abs(yv) <= 90.0)
    in_lon = np.all(np.abs(xv) <= 180.0) or np.all((xv >= 0.0) & (xv <= 360.0))
    if not (in_lat and in_lon):
        return
    lon = continuous_longitudes(xv)
    ymid = 0.5 * (yv.min() + yv.max())
    xmid = 0.5 * (lon.min() + lon.max())
    width = float(cross_distance([[lon.min(), ymid]], [[lon.max(), ymid]], "greatcircle")[0, 0])
    height = float(cross_distance([[xmid, yv.min()]], [[xmid, yv.max()]], "greatcircle")[0, 0])
    raise InputError(
        f"{src}: columns {xcol!r}, {ycol!r} look like longitude/latitude (x in [{xv.min():g}, {xv.max():g}], "
        f"y in [{yv.min():g}, {yv.max():g}]: as degrees about {width:,.0f} x {height:,.0f} km, as planar units "
        f"a {np.ptp(xv):g} x {np.ptp(yv):g} site); pass --coords lonlat for great-circle distances in km, "
        "or --coords xy if they are planar (or name the CRS with --crs)"
    )


def check_lonlat_ranges(xv, yv, rows, xcol, ycol, src) -> None:
    """Refuse longitudes outside [-180, 360] and latitudes outside [-90, 90] degrees, naming the rows."""
    bad = rows[(xv < -180.0) | (xv > 360.0)]
    if bad.size:
        raise InputError(
            f"{src}: column {xcol!r} is outside [-180, 360] degrees at rows {format_rows(bad)} "
            "(--coords lonlat expects longitude in degrees, written -180..180 or 0..360)"
        )
    bad = rows[np.abs(yv) > 90.0]
    if bad.size:
        raise InputError(
            f"{src}: column {ycol!r} is outside [-90, 90] degrees at rows {format_rows(bad)} "
            "(--coords lonlat expects latitude in degrees)"
        )
