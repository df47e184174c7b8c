"""Geometric anisotropy: the range differs by direction.

A field whose correlation reaches farther along one direction (a plume along groundwater flow, sediment
along a river) has elliptical contours of equal correlation. Geometric anisotropy models it by a rotation
and a scaling of the coordinates (Journel and Huijbregts 1978, sec. II.C; Cressie 1993, sec. 2.3.1;
Diggle and Ribeiro 2007, sec. 3.6): with the major axis at azimuth theta (degrees clockwise from north,
in [0, 180)) and the ratio r >= 1 of the major to the minor range, a separation (dx east, dy north) has

    a = dx sin(theta) + dy cos(theta)      (along the major axis)
    b = dx cos(theta) - dy sin(theta)      (along the minor axis)
    h^2 = a^2 / r + r b^2,

and the correlation is rho(h / phi) of any isotropic family. The scaling keeps the product of the two
axes' ranges: the major range is sqrt(r) times, the minor range 1 / sqrt(r) times the isotropic one, so
the fitted ``practical_range`` is their geometric mean, and r = 1 is exactly the isotropic model.

Sampling coordinates. theta is an axial angle (0 and 180 degrees are one direction) and is undefined at
r = 1, so the model samples the anisotropy vector

    alpha = log(r) (cos 2 theta, sin 2 theta),

whose origin is isotropy; h^2 is a smooth function of it,

    h^2 = cosh(|alpha|) (dx^2 + dy^2) + (sinh(|alpha|) / |alpha|) ((dx^2 - dy^2) alpha_1 - 2 dx dy alpha_2),

so the sampler meets no boundary and no singular point. The prior is alpha ~ Normal(0, s^2 I): the
direction is uniform, log(r) is Rayleigh with scale s, and the density in alpha is highest at isotropy,
so the prior shrinks towards it (in the spirit of penalised-complexity priors; not the exact PC prior).
The default s makes P(r > 3) = 0.05 (:data:`RATIO_TAIL`).

Only planar coordinates: for lon/lat data project first (``--to-crs utm``).
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["RATIO_TAIL", "prior_scale", "anisotropy_vector", "angle_ratio", "circular_mean", "to_isotropic",
           "anisotropic_distance", "axis_ranges", "anisotropy_parameters"]

#: Default prior tail of the ratio: P(ratio > 3) = 0.05.
RATIO_TAIL = (3.0, 0.05)


def prior_scale(ratio: float = RATIO_TAIL[0], tail: float = RATIO_TAIL[1]) -> float:
    """s of alpha ~ Normal(0, s^2 I) with P(r > ratio) = tail: log(r) is Rayleigh(s), so
    P(log r > c) = exp(-c^2 / (2 s^2)) and s = log(ratio) / sqrt(2 log(1 / tail))."""
    if not (ratio > 1.0 and 0.0 < tail < 1.0):
        raise ValueError(f"anisotropy prior: need ratio > 1 and 0 < tail < 1, got {ratio}, {tail}")
    return math.log(ratio) / math.sqrt(2.0 * math.log(1.0 / tail))


def anisotropy_vector(angle, ratio) -> np.ndarray:
    """alpha = log(r) (cos 2 theta, sin 2 theta) from the azimuth ``angle`` (degrees) and ``ratio`` >= 1;
    shape (..., 2)."""
    t = np.radians(np.asarray(angle, dtype=float))
    lr = np.log(np.asarray(ratio, dtype=float))
    return np.stack([lr * np.cos(2 * t), lr * np.sin(2 * t)], axis=-1)


def angle_ratio(alpha) -> tuple[np.ndarray, np.ndarray]:
    """(azimuth of the major axis in degrees, [0, 180); ratio >= 1) from alpha (..., 2)."""
    alpha = np.asarray(alpha, dtype=float)
    angle = np.degrees(0.5 * np.arctan2(alpha[..., 1], alpha[..., 0])) % 180.0
    return angle, np.exp(np.hypot(alpha[..., 0], alpha[..., 1]))


def circular_mean(angle, axis=None):
    """Mean direction of axial angles in degrees, [0, 180): half the angle of the mean of exp(2 i theta)
    (an axial angle and the same plus 180 count as one direction)."""
    return np.degrees(0.5 * np.angle(np.mean(np.exp(2j * np.radians(angle)), axis=axis))) % 180.0


def axis_ranges(practical_range, ratio) -> tuple[np.ndarray, np.ndarray]:
    """Practical ranges along the major and the minor axis: ``practical_range`` times sqrt(r) and 1 / sqrt(r)."""
    root = np.sqrt(np.asarray(ratio, dtype=float))
    return np.asarray(practical_range) * root, np.asarray(practical_range) / root


def to_isotropic(xy, angle, ratio) -> np.ndarray:
    """Coordinates (a / sqrt(r), sqrt(r) b) in which Euclidean distance is the anisotropic h (module docstring)."""
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    t = math.radians(float(angle))
    root = math.sqrt(float(ratio))
    a = xy[:, 0] * math.sin(t) + xy[:, 1] * math.cos(t)
    b = xy[:, 0] * math.cos(t) - xy[:, 1] * math.sin(t)
    return np.column_stack([a / root, b * root])


def anisotropic_distance(xy1, xy2, angle, ratio) -> np.ndarray:
    """h between every point of ``xy1`` and of ``xy2`` (coordinate units), shape (n1, n2)."""
    from scipy.spatial.distance import cdist

    return cdist(to_isotropic(xy1, angle, ratio), to_isotropic(xy2, angle, ratio))


def anisotropy_parameters(alpha, prange, du: str) -> dict:
    """Angle, ratio and the practical ranges along both axes from the sampled anisotropy vector.

    The angle is axial (0 and 180 degrees are one direction), so it is stored unwrapped around the circular
    mean of all draws (half the angle of the mean of exp(2 i theta)): values stay continuous across 0/180 and
    R-hat and ESS mean what they say; a value outside [0, 180) names the direction modulo 180.

    Parameters
    ----------
    alpha : xarray.DataArray
        ``anisotropy_z`` draws (chain, draw, [site,] anisotropy_coord).
    prange : xarray.DataArray
        The (geometric-mean) practical range draws (chain, draw[, site]), distance units ``du``.

    Returns
    -------
    dict of xarray.DataArray
        ``anisotropy_angle`` (degrees), ``anisotropy_ratio``, ``practical_range_major``, ``practical_range_minor``;
        with a ``site`` dim one circular mean per site (attribute ``circular_mean``, a list then).
    """
    import xarray as xr

    last = alpha.dims[-1]
    a = alpha.transpose("chain", "draw", ..., last)
    dims = a.dims[:-1]
    angle, ratio = angle_ratio(a.values)
    centre = circular_mean(angle, axis=(0, 1))
    unwrapped = centre + (angle - centre + 90.0) % 180.0 - 90.0
    major, minor = axis_ranges(prange.transpose(*dims).values, ratio)
    coords = {d: a[d] for d in dims if d in a.coords}
    mean = float(centre) if np.ndim(centre) == 0 else [float(c) for c in centre]
    return {
        "anisotropy_angle": xr.DataArray(unwrapped, dims=dims, coords=coords, attrs={
            "units": "degrees", "long_name": "azimuth of the major axis, clockwise from north (modulo 180)",
            "circular_mean": mean}),
        "anisotropy_ratio": xr.DataArray(ratio, dims=dims, coords=coords, attrs={
            "units": "1", "long_name": "ratio of the major to the minor practical range"}),
        "practical_range_major": xr.DataArray(major, dims=dims, coords=coords, attrs={
            "units": du, "long_name": "practical range along the major axis"}),
        "practical_range_minor": xr.DataArray(minor, dims=dims, coords=coords, attrs={
            "units": du, "long_name": "practical range along the minor axis"}),
    }


# --- Numba pieces of the likelihood ---------------------------------------------------------------


@numba.njit(cache=True, inline="always")
def shape_terms(a1, a2):
    """(cosh |alpha|, sinh |alpha| / |alpha|, (|alpha| cosh |alpha| - sinh |alpha|) / |alpha|^3): the smooth
    functions of |alpha| in h^2 and its gradient (series near 0)."""
    r2 = a1 * a1 + a2 * a2
    r = math.sqrt(r2)
    if r < 1e-4:
        return 1.0 + 0.5 * r2, 1.0 + r2 / 6.0, 1.0 / 3.0 + r2 / 30.0
    ch = math.cosh(r)
    sh = math.sinh(r)
    return ch, sh / r, (r * ch - sh) / (r2 * r)


@numba.njit(cache=True, inline="always")
def h2_and_grad(dx, dy, a1, a2, ch, sc, tt):
    """h^2 and d h^2 / d alpha_1, d alpha_2 for one separation, given :func:`shape_terms`."""
    p = dx * dx + dy * dy
    q = dx * dx - dy * dy
    s = 2.0 * dx * dy
    m = q * a1 - s * a2
    h2 = ch * p + sc * m
    g1 = sc * a1 * p + tt * a1 * m + sc * q
    g2 = sc * a2 * p + tt * a2 * m - sc * s
    return h2, g1, g2
