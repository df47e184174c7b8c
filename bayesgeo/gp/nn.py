"""Nearest-neighbour (Vecchia) Gaussian-process likelihood and prediction for large data sets.

The dense likelihood (:mod:`bayesgeo.gp.dense`) costs O(n^3) time and O(n^2) memory, which
stops at a few thousand points. Vecchia's approximation (Vecchia 1988) writes the joint density
as a product of conditionals in some ordering and conditions each point only on its ``m``
nearest *previous* points:

    log p(y) ~= sum_i log N(y_i | b_i^T y_N(i), f_i),
    b_i = K[N(i), N(i)]^-1 K[N(i), i],    f_i = K_ii - K[i, N(i)] b_i,

with the same K = sigma2 R(phi) + (tau2 + JITTER sigma2) I as the dense likelihood, so the nugget
sits in the response covariance (the "response" nearest-neighbour GP of Datta, Banerjee, Finley
and Gelfand 2016 and Finley, Datta, Cook, Morton, Andersen and Banerjee 2019). With
``m = n - 1`` the product is the exact chain rule, hence the dense likelihood; with fixed ``m``
the cost is O(n m^3) time and O(n m) memory.

Ordering: *maximin* (Guinness 2018): the first point is the one nearest the centroid of the
locations; each next point is the one whose smallest distance to the points already chosen is
largest (ties: the lowest index). It beats random and coordinate orderings at equal ``m``
(Guinness 2018, sec. 3; Katzfuss and Guinness 2021); in our exact computations it beat a random
ordering in every case, while against sorting by x the comparison was mixed (maximin clearly ahead
for Matérn 3/2 with a nugget at n = 1,000, behind in some small or noise-free cases).

Default ``m`` (:data:`DEFAULT_NEIGHBOURS` = 20). Exact means and sds of the error over data sets
(:func:`bayesgeo.gp.nn_kriging.nn_error_moments`), n = 2,000 on a 1 km square, practical range 300 m, nugget 0.25: the
error of logL(1.5 x range) - logL(range) is about 1% of the exact difference for the exponential
family at m = 20, but 9% (m = 20), 6% (m = 30) and 5.5% (m = 40) for Matérn 3/2: with a nugget,
smooth fields are approximated less well and a larger m helps only slowly (the response
approximation with noise; Katzfuss and Guinness 2021). The error flattens the likelihood; it does
not shift it: the nn score is an unbiased estimating equation, whose cost is lost information and
slightly narrow intervals, measured by :mod:`bayesgeo.gp.nn_accuracy` (every nn fit runs that check).
m = 30 costs about 2.2 times m = 20, so the default stays at 20 (``docs/large_data.md``).

Gradient: value and analytic gradient w.r.t. the residuals, scale, partial sill and nugget come
from one pass (formulas in :mod:`bayesgeo.gp._nn_kernels`), wrapped in one PyTensor Op with a
native Numba implementation so nutpie runs it without object mode. Families: every closed-form
family of :data:`bayesgeo.gp.dense.FAST_FAMILIES`; the general ``matern`` (Bessel function)
is refused with a ValueError.

References
----------
Vecchia, A. V. (1988). Estimation and model identification for continuous spatial processes.
*JRSS B* 50, 297-312.
Datta, A., Banerjee, S., Finley, A. O. and Gelfand, A. E. (2016). Hierarchical nearest-neighbor
Gaussian process models for large geostatistical datasets. *JASA* 111, 800-812.
Finley, A. O. et al. (2019). Efficient algorithms for Bayesian nearest neighbor Gaussian
processes. *JCGS* 28, 401-414.
Guinness, J. (2018). Permutation and grouping methods for sharpening Gaussian process
approximations. *Technometrics* 60, 415-429.
Katzfuss, M. and Guinness, J. (2021). A general framework for Vecchia approximations of Gaussian
processes. *Statistical Science* 36, 124-141.
"""

from __future__ import annotations

import sys

import numpy as np
import pytensor.tensor as pt
from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key
from scipy.spatial import cKDTree

from bayesgeo.gp import _nn_kernels as _nb
from bayesgeo.gp._logp_op import LogpGradOp, source_version
from bayesgeo.gp.covariance import Covariance, get_covariance
from bayesgeo.gp.dense import FAST_FAMILIES

__all__ = [
    "DEFAULT_NEIGHBOURS",
    "NNLogpGrad",
    "maximin_order",
    "nearest_previous",
    "nn_loglik",
    "nn_loglik_and_grad",
]

#: Default number of conditioning neighbours m (justified in the module docstring).
DEFAULT_NEIGHBOURS = 20
_METRICS = {"euclidean": 0, "greatcircle": 1}
_KD_LEAF = 16  # points per k-d tree leaf in maximin_order


# --- geometry: search space ---------------------------------------------------------------------


def _search_points(xy: np.ndarray, metric: str) -> np.ndarray:
    """Points in which Euclidean nearness equals nearness in ``metric`` (unit vectors for lon/lat)."""
    if metric == "euclidean":
        return xy
    if metric == "greatcircle":
        lon, lat = np.radians(xy[:, 0]), np.radians(xy[:, 1])
        # chord length is monotone in great-circle distance
        return np.column_stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])
    raise ValueError(f"unknown metric {metric!r}; choose one of: {', '.join(_METRICS)}")


def _as_xy(xy) -> np.ndarray:
    xy = np.ascontiguousarray(xy, dtype=float)
    if xy.ndim != 2 or xy.shape[1] != 2 or xy.shape[0] < 1:
        raise ValueError(f"locations must have shape (n, 2) with n >= 1, got {xy.shape}")
    if not np.all(np.isfinite(xy)):
        raise ValueError("locations must be finite")
    return xy


def maximin_order(xy, *, metric: str = "euclidean") -> np.ndarray:
    """Maximin ordering of locations (Guinness 2018).

    The first point is the one nearest the centroid; each next one maximises its smallest
    distance to the points before it; ties go to the lowest index. Exact: when point p is chosen
    with distance l_p, only points within l_p of p can have their smallest distance lowered, so a
    k-d tree ball query finds them and a heap of candidate distances picks the next point (the
    algorithm of Guinness 2018, sec. 2.2), compiled with Numba; the work is about O(n log n).

    Parameters
    ----------
    xy : array (n, 2)
        Locations (planar, or lon/lat degrees for ``greatcircle``).
    metric : {"euclidean", "greatcircle"}

    Returns
    -------
    ndarray (n,) of int
        ``order[k]`` is the index of the k-th point.
    """
    pts = np.ascontiguousarray(_search_points(_as_xy(xy), metric))
    centre = pts.mean(axis=0)
    first = int(np.argmin(np.sqrt(((pts - centre) ** 2).sum(axis=1))))
    return _nb.maximin(pts, first, _KD_LEAF)


def nearest_previous(xy, order, *, neighbours: int = DEFAULT_NEIGHBOURS, metric: str = "euclidean") -> np.ndarray:
    """For each point, its ``neighbours`` nearest points among those earlier in ``order``.

    Parameters
    ----------
    xy : array (n, 2)
    order : array (n,) of int
        A permutation of ``range(n)`` (for example :func:`maximin_order`).
    neighbours : int
        m >= 1; the k-th point in the ordering gets min(k, m) neighbours.
    metric : {"euclidean", "greatcircle"}

    Returns
    -------
    ndarray (n, m) of int64
        Row i (original indexing) lists point i's neighbours by increasing distance (ties: lower
        index first), padded with -1.
    """
    pts = _search_points(_as_xy(xy), metric)
    n = pts.shape[0]
    order = _check_order(order, n)
    m = _check_m(neighbours)
    pos = np.empty(n, dtype=np.int64)
    pos[order] = np.arange(n)
    out = np.full((n, m), -1, dtype=np.int64)
    # blocks of positions [lo, hi) with hi = 2 lo: a tree on the first hi points holds every
    # earlier point of the block and about as many later ones, so 2 m + 2 candidates usually do
    lo = 1
    while lo < n:
        hi = min(2 * lo, n)
        prefix = order[:hi]
        tree = cKDTree(pts[prefix])
        block = order[lo:hi]
        kq = min(2 * m + 2, hi)
        _, idx = tree.query(pts[block], k=kq)
        cand = prefix[np.asarray(idx).reshape(len(block), kq)]
        d = np.sqrt(((pts[cand] - pts[block][:, None, :]) ** 2).sum(axis=2))  # one formula for every row
        earlier = pos[cand] < pos[block][:, None]
        need = np.minimum(m, pos[block])
        dk = np.where(earlier, d, np.inf)
        srt = np.lexsort((cand, dk), axis=-1)
        ds = np.take_along_axis(dk, srt, axis=1)
        cs = np.take_along_axis(cand, srt, axis=1)
        # exact when the need-th earlier candidate is strictly nearer than the farthest candidate
        nth = ds[np.arange(len(block)), need - 1]
        ok = (nth < d.max(axis=1)) | (kq >= hi)
        width = min(m, kq)
        rows = np.where(np.arange(width)[None, :] < need[:, None], cs[:, :width], -1)
        out[block[ok], :width] = rows[ok]
        for i in block[~ok].tolist():
            out[i] = _pick(pts, tree, prefix, pos, i, m, min(2 * kq, hi), hi)
        lo = hi
    return out


def _pick(pts, tree, prefix, pos, i, m, kq, hi):
    """Neighbours of point i, querying more candidates until the set is certain."""
    need = min(m, int(pos[i]))
    while True:
        _, idx = tree.query(pts[i], k=kq)
        cand = prefix[np.atleast_1d(idx)]
        d = np.sqrt(((pts[cand] - pts[i]) ** 2).sum(axis=1))
        keep = pos[cand] < pos[i]
        c, dc = cand[keep], d[keep]
        srt = np.lexsort((c, dc))
        if (keep.sum() >= need and dc[srt][need - 1] < d.max()) or kq >= hi:
            row = np.full(m, -1, dtype=np.int64)
            row[:need] = c[srt][:need]
            return row
        kq = min(2 * kq, hi)


def _check_m(neighbours) -> int:
    if isinstance(neighbours, bool) or not isinstance(neighbours, (int, np.integer)) or neighbours < 1:
        raise ValueError(f"neighbours must be an integer >= 1, got {neighbours!r}")
    return int(neighbours)


def _check_order(order, n: int) -> np.ndarray:
    order = np.asarray(order)
    if order.shape != (n,) or not np.issubdtype(order.dtype, np.integer) or not np.array_equal(np.sort(order), np.arange(n)):
        raise ValueError(f"order must be a permutation of range({n})")
    return order.astype(np.int64)


def _ordering(xy: np.ndarray, order, metric: str) -> np.ndarray:
    if isinstance(order, str):
        if order == "maximin":
            return maximin_order(xy, metric=metric)
        if order == "coordinate":
            return np.lexsort((xy[:, 1], xy[:, 0])).astype(np.int64)
        raise ValueError(f"order must be 'maximin', 'coordinate' or a permutation, got {order!r}")
    return _check_order(order, xy.shape[0])


def _family(covariance: Covariance | str) -> tuple[Covariance, int]:
    cov = get_covariance(covariance) if isinstance(covariance, str) else covariance
    if cov.name not in FAST_FAMILIES:
        raise ValueError(f"covariance {cov.name!r} has no nearest-neighbour kernel; "
                         f"the nearest-neighbour likelihood covers: {', '.join(FAST_FAMILIES)}")
    return cov, FAST_FAMILIES.index(cov.name)


def _structure(xy, n, neighbours, order, metric):
    xy = _as_xy(xy)
    if xy.shape[0] != n:
        raise ValueError(f"resid has {n} values but xy has {xy.shape[0]} rows")
    if metric not in _METRICS:
        raise ValueError(f"unknown metric {metric!r}; choose one of: {', '.join(_METRICS)}")
    m = _check_m(neighbours)
    nbr = nearest_previous(xy, _ordering(xy, order, metric), neighbours=max(1, min(m, n - 1)), metric=metric)
    return xy, nbr


# --- likelihood ---------------------------------------------------------------------------------


def nn_loglik_and_grad(resid, xy, covariance: Covariance | str, scale: float, partial_sill: float,
                       nugget: float, *, neighbours: int = DEFAULT_NEIGHBOURS, order="maximin",
                       metric: str = "euclidean", distance_scale: float = 1.0, nbr=None):
    """Vecchia log-likelihood and its analytic gradient (NumPy in, NumPy out).

    Parameters
    ----------
    resid : array (n,)
        Data minus trend.
    xy : array (n, 2)
        Locations; distances are computed in ``metric`` and divided by ``distance_scale``.
    covariance : Covariance or str
        One of :data:`bayesgeo.gp.dense.FAST_FAMILIES`.
    scale, partial_sill, nugget : float
        phi (units of distance / distance_scale), sigma2, tau2.
    neighbours : int
        m, conditioning points per point (capped at n - 1, where the result is exact).
    order : {"maximin", "coordinate"} or array (n,)
        Ordering of the points.
    metric : {"euclidean", "greatcircle"}
    distance_scale : float
        Divisor of the distances (the model's largest data distance).
    nbr : array (n, m), optional
        Precomputed neighbour sets (:func:`nearest_previous`); overrides ``neighbours``/``order``.

    Returns
    -------
    logp, d_resid (n,), d_scale, d_partial_sill, d_nugget
        As :func:`bayesgeo.gp.dense.loglik_and_grad`.
    """
    _, code = _family(covariance)
    resid = np.ascontiguousarray(resid, dtype=float)
    if resid.ndim != 1:
        raise ValueError(f"resid must have shape (n,), got {resid.shape}")
    if nbr is None:
        xy, nbr = _structure(xy, resid.shape[0], neighbours, order, metric)
    else:
        xy = _as_xy(xy)
    nbr = np.ascontiguousarray(nbr, dtype=np.int64)
    grad_r = np.empty(resid.shape[0])
    logp, g_phi, g_s2, g_t2 = _nb.nn_logp_grad(code, _METRICS[metric], 1.0 / float(distance_scale), resid, xy, nbr,
                                               float(scale), float(partial_sill), float(nugget), grad_r)
    return logp, grad_r, g_phi, g_s2, g_t2


class NNLogpGrad(LogpGradOp):
    """Outputs (logp, d/d resid, d/d scale, d/d partial_sill, d/d nugget) of the Vecchia likelihood.

    Inputs: resid (n,), coords (n, 2), nbr (n, m) int64, scale, partial_sill, nugget. Properties:
    family, metric code and 1 / distance scale. :meth:`pullback` scales the stored gradient;
    second derivatives are not implemented.
    """

    __props__ = ("family", "metric", "inv_ds")

    def __init__(self, family: str, metric: int = 0, inv_ds: float = 1.0):
        if family not in FAST_FAMILIES:
            raise ValueError(f"no nearest-neighbour kernel for covariance {family!r}; "
                             f"choose one of: {', '.join(FAST_FAMILIES)}")
        self.family = family
        self.metric = int(metric)
        self.inv_ds = float(inv_ds)

    def make_node(self, resid, coords, nbr, scale, partial_sill, nugget):
        resid = pt.as_tensor_variable(resid).astype("float64")
        coords = pt.as_tensor_variable(coords).astype("float64")
        nbr = pt.as_tensor_variable(nbr).astype("int64")
        scalars = [pt.as_tensor_variable(v).astype("float64") for v in (scale, partial_sill, nugget)]
        if resid.type.ndim != 1 or coords.type.ndim != 2 or nbr.type.ndim != 2 or any(s.type.ndim for s in scalars):
            raise TypeError("NNLogpGrad needs resid (n,), coords (n, 2), nbr (n, m) and three scalars")
        return self.apply([resid, coords, nbr, *scalars])

    def constant_inputs(self, n_inputs):
        return (1, 2)  # coordinates and neighbour sets: constants of the model

    def kernel(self, inputs):
        resid, coords, nbr, scale, psill, nugget = inputs
        grad_r = np.empty(resid.shape[0])
        res = _nb.nn_logp_grad(FAST_FAMILIES.index(self.family), self.metric, self.inv_ds,
                               np.ascontiguousarray(resid), np.ascontiguousarray(coords),
                               np.ascontiguousarray(nbr), float(scale), float(psill), float(nugget), grad_r)
        return res[0], grad_r, res[1], res[2], res[3]


_SOURCE_VERSION = source_version(_nb, sys.modules[__name__])


@register_funcify_default_op_cache_key(NNLogpGrad)
def _numba_funcify_nn_logp_grad(op, node=None, **kwargs):
    import numba

    code = FAST_FAMILIES.index(op.family)
    metric = op.metric
    inv_ds = op.inv_ds
    kernel = _nb.nn_logp_grad

    @numba.njit
    def nn_logp_grad(resid, coords, nbr, scale, psill, nugget):
        grad_r = np.empty(resid.shape[0])
        logp, g_phi, g_s2, g_t2 = kernel(code, metric, inv_ds, np.ascontiguousarray(resid),
                                         np.ascontiguousarray(coords), np.ascontiguousarray(nbr),
                                         scale.item(), psill.item(), nugget.item(), grad_r)
        return np.asarray(logp), grad_r, np.asarray(g_phi), np.asarray(g_s2), np.asarray(g_t2)

    return nn_logp_grad, _SOURCE_VERSION


def nn_loglik(resid, xy, covariance: Covariance | str, scale, partial_sill, nugget, *,
              neighbours: int = DEFAULT_NEIGHBOURS, order="maximin", metric: str = "euclidean",
              distance_scale: float = 1.0):
    """PyTensor scalar: the Vecchia approximation of log N(resid | 0, K).

    Same meaning and arguments as :func:`bayesgeo.gp.dense.marginal_loglik`, with locations in
    place of the distance matrix: the distance between points i and j is
    ``metric_distance(xy[i], xy[j]) / distance_scale``. The ordering and neighbour sets are
    computed once, here, and are constants of the graph.

    Parameters
    ----------
    resid : TensorVariable (n,)
        Data minus trend (the model's standardised scale).
    xy : array (n, 2)
        Data locations (planar units, or lon/lat degrees for ``greatcircle``: distances in km).
    covariance : Covariance or str
        One of :data:`bayesgeo.gp.dense.FAST_FAMILIES`; ``matern`` is refused (ValueError).
    scale, partial_sill, nugget : TensorVariable or float
        phi (in units of distance / distance_scale), sigma2, tau2.
    neighbours : int
        m, default :data:`DEFAULT_NEIGHBOURS`; capped at n - 1 (exact likelihood).
    order : {"maximin", "coordinate"} or array (n,)
        Point ordering (maximin by default; Guinness 2018).
    metric : {"euclidean", "greatcircle"}
    distance_scale : float
        Divisor of the distances; the model passes ``spec.distance_scale``.

    Returns
    -------
    TensorVariable
        Scalar log-likelihood (``-inf`` where a neighbour matrix is not positive definite).
    """
    cov, _ = _family(covariance)
    n = int(np.asarray(getattr(xy, "shape", (len(xy),)))[0])
    xy, nbr = _structure(xy, n, neighbours, order, metric)
    if not (np.isfinite(distance_scale) and distance_scale > 0):
        raise ValueError(f"distance_scale must be positive, got {distance_scale!r}")
    op = NNLogpGrad(cov.name, _METRICS[metric], 1.0 / float(distance_scale))
    return op(resid, pt.constant(xy), pt.constant(nbr), scale, partial_sill, nugget)[0]


