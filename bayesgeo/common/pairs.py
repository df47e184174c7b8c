"""Numba kernels for the exploratory pair statistics: one pass over the pairs i < j, no n x n matrix.

The kernels accumulate, per direction, lag bin and value column (column 0 the observed values,
columns 1.. permutations of them), the sums from which the semivariogram and correlogram follow.
Memory is O(n * columns + directions * bins * columns * threads). The kernel releases the GIL
and the rows are shared among ``numba.get_num_threads()`` Python threads (set NUMBA_NUM_THREADS to
change it); a plain (non-parfor) kernel keeps the first-call compile short.
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
from numba import njit
from scipy.spatial import ConvexHull, QhullError
from scipy.spatial.distance import pdist

from bayesgeo.common.geometry import EARTH_RADIUS_KM, cross_distance

__all__ = ["pair_sums", "max_pair_distance", "permuted_columns", "column_semivariances"]

# which sums to accumulate (bit flags)
WANT_SQ = 1  # sum (z_i - z_j)^2
WANT_ROOT = 2  # sum |z_i - z_j|^(1/2)
WANT_CORR = 4  # sum z_i + z_j, sum z_i^2 + z_j^2, sum z_i z_j


@njit(cache=True, nogil=True)
def _pair_kernel(a, b, z, group, width, nbins, lag_limit, greatcircle, omni, dir_az, dir_tol, want, first, step, block):
    """Pair sums over row blocks first, first + step, ... (each row with all later rows).

    ``a, b``: x, y (or lon, lat in radians); ``z``: (n, ncol) values. Pairs are visited tile by
    tile (``block`` rows of i against ``block`` rows of j) so both sets of value rows stay in
    cache. Runs without the GIL, so several threads can share the blocks.
    """
    n, ncol = z.shape
    ndir = dir_az.shape[0]
    nsq = ncol if want & 1 else 0
    nroot = ncol if want & 2 else 0
    ncorr = ncol if want & 4 else 0
    count = np.zeros((ndir, nbins), dtype=np.int64)
    dsum = np.zeros((ndir, nbins))
    sq = np.zeros((ndir, nbins, nsq))
    root = np.zeros((ndir, nbins, nroot))
    s1 = np.zeros((ndir, nbins, ncorr))
    s2 = np.zeros((ndir, nbins, ncorr))
    s12 = np.zeros((ndir, nbins, ncorr))
    pi = math.pi
    nblocks = (n + block - 1) // block
    for ib in range(first, nblocks, step):
        i0 = ib * block
        i1 = min(n, i0 + block)
        for j0 in range(i0, n, block):
            j1 = min(n, j0 + block)
            for i in range(i0, i1):
                for j in range(max(j0, i + 1), j1):
                    if group[i] != group[j]:
                        continue
                    if greatcircle:
                        h1 = math.sin(0.5 * (b[j] - b[i]))
                        h2 = math.sin(0.5 * (a[j] - a[i]))
                        h = h1 * h1 + math.cos(b[i]) * math.cos(b[j]) * h2 * h2
                        d = 2.0 * EARTH_RADIUS_KM * math.asin(math.sqrt(min(h, 1.0)))
                    else:
                        d = math.hypot(a[j] - a[i], b[j] - b[i])
                    if d > lag_limit:
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
                        count[r, k] += 1
                        dsum[r, k] += d
                        for p in range(nsq):
                            t = z[i, p] - z[j, p]
                            sq[r, k, p] += t * t
                        for p in range(nroot):
                            root[r, k, p] += math.sqrt(abs(z[i, p] - z[j, p]))
                        for p in range(ncorr):
                            zi = z[i, p]
                            zj = z[j, p]
                            s1[r, k, p] += zi + zj
                            s2[r, k, p] += zi * zi + zj * zj
                            s12[r, k, p] += zi * zj
    return count, dsum, sq, root, s1, s2, s12


def _threads() -> int:
    return max(1, int(numba.get_num_threads()))


def _coords(x: np.ndarray, y: np.ndarray, greatcircle: bool) -> tuple[np.ndarray, np.ndarray]:
    if greatcircle:
        return np.radians(np.asarray(x, dtype=float)), np.radians(np.asarray(y, dtype=float))
    # Centre planar coordinates: differences stay exact and hypot works on small numbers.
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    return np.ascontiguousarray(x - x.mean()), np.ascontiguousarray(y - y.mean())


def _max_brute(xy: np.ndarray, metric: str, block: int = 512) -> float:
    best = 0.0
    for lo in range(0, len(xy), block):
        best = max(best, float(cross_distance(xy[lo:lo + block], xy, metric).max()))
    return best


def _max_planar(xy: np.ndarray) -> float:
    try:
        hull = ConvexHull(xy)
    except QhullError:  # collinear or too few points: no 2-D hull
        return _max_brute(xy, "euclidean")
    v = xy[hull.vertices]
    return float(pdist(v).max()) if len(v) > 1 else 0.0


def max_pair_distance(x: np.ndarray, y: np.ndarray, *, group: np.ndarray, greatcircle: bool = False) -> float:
    """Largest distance between two points of the same group (planar units, or km on the sphere).

    Planar: the farthest pair lies on the convex hull, so only hull vertices are compared.
    Great circle: all pairs, in blocks of rows (memory O(block * n)).
    """
    xy = np.column_stack([np.asarray(x, dtype=float), np.asarray(y, dtype=float)])
    if not greatcircle:
        xy = xy - xy.mean(axis=0)
    best = 0.0
    for g in np.unique(group):
        part = xy[group == g]
        if len(part) < 2:
            continue
        best = max(best, _max_brute(part, "greatcircle") if greatcircle else _max_planar(part))
    return best


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
    g = np.ascontiguousarray(group, dtype=np.int64)
    args = (a, b, zc, g, width, nbins, float(edges[-1]) * (1.0 + 1e-12), greatcircle, omni, az, tol, int(want))
    n, ncol = zc.shape
    threads = _threads()
    # tiles of about 64 kB of value rows, and enough blocks to share among the threads
    block = max(8, min(max(8, 8192 // ncol), -(-n // (8 * threads))))
    step = min(threads, -(-n // block))
    if step == 1:
        parts = [_pair_kernel(*args, 0, 1, block)]
    else:
        # interleaved blocks balance the work (row i has n - i - 1 partners)
        with ThreadPoolExecutor(max_workers=step) as pool:
            parts = list(pool.map(lambda first: _pair_kernel(*args, first, step, block), range(step)))
    names = ("count", "dsum", "sq", "root", "s1", "s2", "s12")
    return {name: sum(p[k] for p in parts) for k, name in enumerate(names)}


def column_semivariances(xy: np.ndarray, metric: str, edges: np.ndarray, values: np.ndarray):
    """Matheron semivariance of each column of ``values`` (n, c) over all pairs within ``edges[-1]``.

    One pass over the pairs (:func:`pair_sums`), no pair list and no n x n matrix;
    pairs binned as :mod:`bayesgeo.explore.variogram` bins them. Returns ``count`` (bins,), ``dsum`` (bins,:
    sum of pair distances) and the semivariances (c, bins), NaN in empty bins.
    """
    sums = pair_sums(xy[:, 0], xy[:, 1], np.asarray(values, dtype=float), group=np.zeros(len(xy), np.int64),
                            edges=edges, greatcircle=metric == "greatcircle", directions=None, tolerance=0.0,
                            want=WANT_SQ)
    count, dsum = sums["count"][0], sums["dsum"][0]
    with np.errstate(invalid="ignore", divide="ignore"):
        semi = (sums["sq"][0] / (2.0 * count[:, None])).T
    return count, dsum, semi
