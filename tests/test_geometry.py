"""Distances and longitude conventions, including data across the antimeridian."""

from __future__ import annotations

import numpy as np
import pytest

from bayesgeo.common.geometry import EARTH_RADIUS_KM, continuous_longitudes, cross_distance, wrap_longitudes_near


def _law_of_cosines_km(lon1, lat1, lon2, lat2):
    """Great-circle distance by the spherical law of cosines, cos c = sin f1 sin f2 + cos f1 cos f2 cos dl
    (Snyder 1987, Map Projections - A Working Manual, USGS Professional Paper 1395, eq. 5-3a; from memory)."""
    f1, f2, dl = np.radians(lat1), np.radians(lat2), np.radians(lon2 - lon1)
    c = np.sin(f1) * np.sin(f2) + np.cos(f1) * np.cos(f2) * np.cos(dl)
    return EARTH_RADIUS_KM * np.arccos(np.clip(c, -1.0, 1.0))


def test_antimeridian_distance_is_the_short_way():
    """Two equator points at 179E and 179W are 2 degrees apart: arc = R * 2 pi / 180 (arc-length formula), in any longitude convention."""
    expected = EARTH_RADIUS_KM * np.radians(2.0)
    for a, b in ([179.0, -179.0], [179.0, 181.0], [-181.0, -179.0]):
        d = cross_distance([[a, 0.0]], [[b, 0.0]], "greatcircle")[0, 0]
        assert d == pytest.approx(expected, rel=1e-12)


def test_greatcircle_matches_law_of_cosines_across_180():
    """Haversine distances of a set straddling 180 degrees (written 0..360) match the spherical law of
    cosines (Snyder 1987, eq. 5-3a) to 1 m (the arccos form loses about sqrt(machine eps) * R near zero); the same points written -180..180 give the same matrix."""
    rng = np.random.default_rng(3)
    lon = rng.uniform(165.0, 188.0, 40)
    lat = rng.uniform(-25.0, -5.0, 40)
    xy = np.column_stack([lon, lat])
    d = cross_distance(xy, xy, "greatcircle")
    ref = _law_of_cosines_km(lon[:, None], lat[:, None], lon[None, :], lat[None, :])
    np.testing.assert_allclose(d, ref, rtol=0, atol=1e-3)
    west = np.column_stack([np.where(lon > 180.0, lon - 360.0, lon), lat])
    np.testing.assert_allclose(cross_distance(west, west, "greatcircle"), d, atol=1e-9)


def test_continuous_longitudes_choose_the_narrower_convention():
    """Longitudes across 180 become one continuous range; others are left as written (longitude is periodic in 360, common practice)."""
    np.testing.assert_array_equal(continuous_longitudes([170.0, 179.5, -179.5, -170.0]), [170.0, 179.5, 180.5, 190.0])
    np.testing.assert_array_equal(continuous_longitudes([165.0, 188.0]), [165.0, 188.0])
    np.testing.assert_array_equal(continuous_longitudes([-10.0, 10.0]), [-10.0, 10.0])
    np.testing.assert_array_equal(continuous_longitudes([350.0, 10.0]), [-10.0, 10.0])
    np.testing.assert_allclose(wrap_longitudes_near([-175.0, 10.0], 180.0), [185.0, 10.0])
