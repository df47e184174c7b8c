"""Distances between locations: planar (Euclidean) or great-circle on a spherical Earth.

Dense matrices here are for the model and prediction stages (n up to a few thousand); the
exploratory pair statistics never build an n x n matrix (see :mod:`bayesgeo.explore.variogram`).
"""

from __future__ import annotations

import numpy as np

from bayesgeo.common.defaults import EARTH_RADIUS_KM

__all__ = ["EARTH_RADIUS_KM", "METRICS", "distance_matrix", "cross_distance", "haversine", "metric_of", "continuous_longitudes",
           "wrap_longitudes_near"]


METRICS = ("euclidean", "greatcircle")


def metric_of(ds) -> str:
    """Distance metric recorded on a point data set: ``greatcircle`` for lon/lat, else ``euclidean``."""
    return "greatcircle" if ds.attrs.get("coords") == "lonlat" else "euclidean"


def continuous_longitudes(lon) -> np.ndarray:
    """Longitudes (degrees) written in whichever convention, -180..180 or 0..360, spans less.

    Data across the antimeridian (e.g. 170..190 written as 170..180 and -180..-170) get one
    continuous range (170..190), so bounding boxes, grids, hulls and maps built from raw
    longitudes do not wrap around the globe. Great-circle distances do not change (they depend on
    longitude only modulo 360). Values already in the narrower convention are returned as they are.
    """
    lon = np.asarray(lon, dtype=float)
    if lon.size == 0:
        return lon.copy()
    west = (lon + 180.0) % 360.0 - 180.0  # [-180, 180)
    west = np.where((lon == 180.0), 180.0, west)
    east = lon % 360.0  # [0, 360)
    best = west if np.ptp(west) <= np.ptp(east) else east
    return lon.copy() if np.ptp(lon) <= np.ptp(best) else best


def wrap_longitudes_near(lon, centre: float) -> np.ndarray:
    """Longitudes shifted by multiples of 360 to lie within 180 degrees of ``centre``."""
    lon = np.asarray(lon, dtype=float)
    return centre + (lon - centre + 180.0) % 360.0 - 180.0


def haversine(lon1, lat1, lon2, lat2):
    """Great-circle distance (km) between points given in degrees of longitude and latitude (arrays
    broadcast), on a sphere of radius :data:`EARTH_RADIUS_KM` (the haversine formula)."""
    lon1, lat1, lon2, lat2 = (np.radians(v) for v in (lon1, lat1, lon2, lat2))
    a = np.sin((lat2 - lat1) / 2.0) ** 2 + np.cos(lat1) * np.cos(lat2) * np.sin((lon2 - lon1) / 2.0) ** 2
    return 2.0 * EARTH_RADIUS_KM * np.arcsin(np.sqrt(np.clip(a, 0.0, 1.0)))


def cross_distance(a: np.ndarray, b: np.ndarray, metric: str = "euclidean") -> np.ndarray:
    """Distances between the rows of ``a`` (m, 2) and ``b`` (k, 2).

    Parameters
    ----------
    a, b : ndarray
        Locations as (x, y) or, for ``greatcircle``, (longitude, latitude) in degrees.
    metric : {"euclidean", "greatcircle"}
        Euclidean distance in coordinate units, or haversine great-circle distance in km.

    Returns
    -------
    ndarray, shape (m, k)
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    if a.ndim != 2 or a.shape[1] != 2 or b.ndim != 2 or b.shape[1] != 2:
        raise ValueError(f"locations must have shape (n, 2), got {a.shape} and {b.shape}")
    if metric == "euclidean":
        # Differences, not |a|^2 + |b|^2 - 2ab, which loses precision at projected coordinates.
        dx = a[:, None, 0] - b[None, :, 0]
        dy = a[:, None, 1] - b[None, :, 1]
        return np.hypot(dx, dy)
    if metric == "greatcircle":
        return haversine(a[:, None, 0], a[:, None, 1], b[None, :, 0], b[None, :, 1])
    raise ValueError(f"unknown metric {metric!r}; choose one of: {', '.join(METRICS)}")


def distance_matrix(xy: np.ndarray, metric: str = "euclidean") -> np.ndarray:
    """Symmetric (n, n) distance matrix of the rows of ``xy``, exactly zero on the diagonal."""
    d = cross_distance(xy, xy, metric)
    np.fill_diagonal(d, 0.0)
    return 0.5 * (d + d.T)
