"""Numba kernels for the exploratory pair statistics: one pass over the pairs i < j, no n x n matrix.

The kernels accumulate, per direction, lag bin and value column (column 0 the observed values,
columns 1.. permutations of them), the sums from which the semivariogram and correlogram follow.
Memory is O(n * columns + directions * bins * columns * threads).
"""

from __future__ import annotations

import math

import numba
import numpy as np
from numba import njit, prange

from bayesgeo.geometry import EARTH_RADIUS_KM

__all__ = ["pair_sums", "max_pair_distance", "permuted_columns"]

# which sums to accumulate (bit flags)
WANT_SQ = 1  # sum (z_i - z_j)^2
WANT_ROOT = 2  # sum |z_i - z_j|^(1/2)
WANT_CORR = 4  # sum z_i + z_j, sum z_i^2 + z_j^2, sum z_i z_j


@njit(cache=True, parallel=True)
def _max_distance(a, b, group, greatcircle, nchunks):
    n = a.shape[0]
    best = np.zeros(nchunks)
    for c in prange(nchunks):
        m = 0.0
        for i in range(c, n, nchunks):
            for j in range(i + 1, n):
                if group[i] != group[j]:
                    continue
                if greatcircle:
                    s1 = math.sin(0.5 * (b[j] - b[i]))
                    s2 = math.sin(0.5 * (a[j] - a[i]))
                    h = s1 * s1 + math.cos(b[i]) * math.cos(b[j]) * s2 * s2
                    d = 2.0 * math.asin(math.sqrt(min(h, 1.0)))
                else:
                    d = math.hypot(a[j] - a[i], b[j] - b[i])
                if d > m:
                    m = d
        best[c] = m
    return best.max()


@njit(cache=True, parallel=True)
def _pair_kernel(a, b, z, group, width, nbins, max_lag, greatcircle, omni, dir_az, dir_tol, want, nchunks):
    """Accumulate pair sums. ``a, b``: x, y (or lon, lat in radians); ``z``: (n, ncol) values."""
    n, ncol = z.shape
    ndir = dir_az.shape[0]
    nsq = ncol if want & 1 else 0
    nroot = ncol if want & 2 else 0
    ncorr = ncol if want & 4 else 0
    count = np.zeros((nchunks, ndir, nbins), dtype=np.int64)
    dsum = np.zeros((nchunks, ndir, nbins))
    sq = np.zeros((nchunks, ndir, nbins, nsq))
    root = np.zeros((nchunks, ndir, nbins, nroot))
    s1 = np.zeros((nchunks, ndir, nbins, ncorr))
    s2 = np.zeros((nchunks, ndir, nbins, ncorr))
    s12 = np.zeros((nchunks, ndir, nbins, ncorr))
    pi = math.pi
    for c in prange(nchunks):
        for i in range(c, n, nchunks):
            for j in range(i + 1, n):
                if group[i] != group[j]:
                    continue
                if greatcircle:
                    h1 = math.sin(0.5 * (b[j] - b[i]))
                    h2 = math.sin(0.5 * (a[j] - a[i]))
                    h = h1 * h1 + math.cos(b[i]) * math.cos(b[j]) * h2 * h2
                    d = 2.0 * EARTH_RADIUS_KM * math.asin(math.sqrt(min(h, 1.0)))
                else:
                    d = math.hypot(a[j] - a[i], b[j] - b[i])
                if d > max_lag:
                    continue
                k = int(d / width)
                if k >= nbins:
                    k = nbins - 1
                theta = 0.0
                if not omni:
                    if greatcircle:
                        dlon = a[j] - a[i]
                        if dlon > pi:
                            dlon -= 2.0 * pi
                        elif dlon < -pi:
                            dlon += 2.0 * pi
                        ex = dlon * math.cos(0.5 * (b[i] + b[j]))
                        ny = b[j] - b[i]
                    else:
                        ex = a[j] - a[i]
                        ny = b[j] - b[i]
                    theta = math.atan2(ex, ny)  # clockwise from north (+y)
                    if theta < 0.0:
                        theta += pi
                    if theta >= pi:
                        theta -= pi
                for r in range(ndir):
                    if not omni:
                        diff = abs(theta - dir_az[r])
                        diff = min(diff, pi - diff)
                        if diff > dir_tol[r]:
                            continue
                    count[c, r, k] += 1
                    dsum[c, r, k] += d
                    for p in range(nsq):
                        t = z[i, p] - z[j, p]
                        sq[c, r, k, p] += t * t
                    for p in range(nroot):
                        root[c, r, k, p] += math.sqrt(abs(z[i, p] - z[j, p]))
                    for p in range(ncorr):
                        zi = z[i, p]
                        zj = z[j, p]
                        s1[c, r, k, p] += zi + zj
                        s2[c, r, k, p] += zi * zi + zj * zj
                        s12[c, r, k, p] += zi * zj
    return (count.sum(axis=0), dsum.sum(axis=0), sq.sum(axis=0), root.sum(axis=0),
            s1.sum(axis=0), s2.sum(axis=0), s12.sum(axis=0))


def _coords(x: np.ndarray, y: np.ndarray, greatcircle: bool) -> tuple[np.ndarray, np.ndarray]:
    if greatcircle:
        return np.radians(np.asarray(x, dtype=float)), np.radians(np.asarray(y, dtype=float))
    # Centre planar coordinates: differences stay exact and hypot works on small numbers.
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    return np.ascontiguousarray(x - x.mean()), np.ascontiguousarray(y - y.mean())


def max_pair_distance(x: np.ndarray, y: np.ndarray, *, group: np.ndarray, greatcircle: bool = False) -> float:
    """Largest distance between two points of the same group (planar units, or km on the sphere)."""
    a, b = _coords(x, y, greatcircle)
    if a.size < 2:
        return 0.0
    g = np.ascontiguousarray(group, dtype=np.int64)
    d = float(_max_distance(a, b, g, greatcircle, numba.get_num_threads()))
    return d * EARTH_RADIUS_KM if greatcircle else d


def permuted_columns(z: np.ndarray, permutations: int, rng: np.random.Generator | None,
                     group: np.ndarray) -> np.ndarray:
    """(n, 1 + permutations) array: ``z`` then its permutations within each group, row-major."""
    n = z.size
    out = np.empty((n, 1 + permutations))
    out[:, 0] = z
    if permutations:
        members = [np.flatnonzero(group == g) for g in np.unique(group)]
        for p in range(1, permutations + 1):
            for idx in members:
                out[idx, p] = z[idx[rng.permutation(idx.size)]]
    return out


def pair_sums(x, y, z, *, group, edges, greatcircle, directions, tolerance, want):
    """Run the pair kernel.

    Parameters
    ----------
    x, y : ndarray (n,)
        Coordinates (planar, or lon/lat in degrees when ``greatcircle``).
    z : ndarray (n, ncol)
        Value columns.
    group : ndarray (n,) of int
        Only pairs within the same group are used.
    edges : ndarray (nbins + 1,)
        Uniform bin edges starting at 0.
    directions : sequence of float or None
        Azimuths in degrees clockwise from north; None for all directions.
    tolerance : float
        Half-width of each direction's sector in degrees.
    want : int
        Bit flags WANT_SQ | WANT_ROOT | WANT_CORR.

    Returns
    -------
    dict of arrays with a leading direction axis: count, dsum (ndir, nbins); sq, root, s1, s2,
    s12 (ndir, nbins, ncol) where requested.
    """
    a, b = _coords(x, y, greatcircle)
    nbins = edges.size - 1
    width = float(edges[1] - edges[0])
    omni = directions is None
    az = np.zeros(1) if omni else np.radians(np.mod(np.asarray(directions, dtype=float), 180.0))
    tol = np.full(az.shape, math.radians(tolerance) + 1e-12)
    zc = np.ascontiguousarray(z, dtype=float)
    out = _pair_kernel(a, b, zc, np.ascontiguousarray(group, dtype=np.int64), width, nbins,
                       float(edges[-1]) * (1.0 + 1e-12), greatcircle, omni, az, tol, int(want),
                       numba.get_num_threads())
    names = ("count", "dsum", "sq", "root", "s1", "s2", "s12")
    return dict(zip(names, out))
