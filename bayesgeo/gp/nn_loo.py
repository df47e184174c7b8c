"""Leave-one-out predictive densities of nearest-neighbour (Vecchia) fits, for large n.

The exact leave-one-out formula (:mod:`bayesgeo.checks.loo`) needs one dense n x n factorisation per
posterior draw: O(n^3) time and O(n^2) memory, out of reach at the sizes the nearest-neighbour
likelihood (:mod:`bayesgeo.gp.nn`, ``FitSpec.approx == "nn"``) is made for (n = 20,000 needs
3.2 GB per matrix). Here the leave-one-out predictive of point ``i`` for draw ``s`` is the
Gaussian conditional of ``y_i`` given its ``m`` nearest *other* data points ``N(i)`` (in every
direction, not only earlier ones in the fit's ordering):

    mean_-i = mu_i + k_N^T K_NN^-1 (y_N - mu_N),
    var_-i  = K_ii - k_N^T K_NN^-1 k_N,
    log p(y_i | y_N) = -0.5 (log 2 pi + log var_-i + (y_i - mean_-i)^2 / var_-i),

with ``K = sigma2 R(phi) + (tau2 + JITTER sigma2) I``, the matrix of the likelihood, so the nugget
is on the observations (a left-out value is a new measurement) and ``K_ii`` carries the same
diagonal as the dense formula. These are the simple-kriging equations (Cressie 1993, *Statistics
for Spatial Data*, sec. 3.4.5) restricted to ``N(i)``, as in :func:`bayesgeo.gp.nn_kriging.nn_kriging_moments`,
and they are computed by the same Numba kernel (:func:`bayesgeo.gp._nn_kernels.nn_moments`).
With ``m = n - 1`` they are the exact conditional of ``y_i`` on all other points, hence the exact
leave-one-out predictive of :func:`bayesgeo.checks.loo.gp_loo` (Rasmussen and Williams 2006, eq. 5.12).
Cost O(S n m^3) time for S draws and O(n m) memory besides the (S, n) results; the neighbour
sets come from a k-d tree (``scipy.spatial.cKDTree``: the ``m + 1`` nearest points, the point
itself dropped; for lon/lat data on unit vectors, where chord length orders points as
great-circle distance does). Points are processed in chunks, on ``numba.get_num_threads()``
threads (the kernel releases the Python lock); results do not depend on the number of threads.

Which ``m``. A conditional on ``m`` points is never sharper than the conditional on all ``n - 1``
(its variance is at least the exact one), and the errors of the pointwise densities add up over
points, so they do not shrink relative to the standard error of an elpd difference as n grows.
Smooth families with a nugget (Matérn 3/2, 5/2, Gaussian) screen less well than the exponential
(the behaviour :mod:`bayesgeo.gp.nn` documents for the likelihood) and need more neighbours.
Measured against the exact leave-one-out, n = 1,500 random points in a 1 km square, practical
range 300 m, plug-in parameters, nugget 0.25 and 0.02 of the partial sill (``docs/model_checks.md``),
the summed log density of all points was off by (nugget 0.25, nugget 0.02)

    ============  ==============  ===============  ======================================
    family        m = 20          m = 30           m = 30: error of the elpd difference
                                                   against a fit with 1.5 x the range
    ============  ==============  ===============  ======================================
    exponential   -1.2, -2.4      -0.2, -0.6       0.2 of -6.8, 0.0 of -46.4
    Matérn 3/2    -1.8, -6.6      0.2, -2.8        8.1 of -23.9, -0.8 of -77.1
    Matérn 5/2    -13.3, -27.1    -10.3, -4.7      3.8 of -22.5, 14.2 of -58.3
    ============  ==============  ===============  ======================================

So the default is ``max(m_fit, 30)`` (:data:`DEFAULT_LOO_NEIGHBOURS`), not the fit's own ``m``
(20 by default): m = 30 cut the exponential error four- to sixfold for about twice the cost.
For smooth families an elpd difference can still be off by a third of itself, and the result
says so (attribute ``caution``); ``neighbours`` overrides the choice (m = 60 halved the Matérn 3/2
error again at about five times the cost of m = 30).

Why these densities and not those of the fitted Vecchia joint density. PSIS-LOO needs
``p(y_i | y_-i, theta)`` of the sampled model. The fitted density ``q = N(0, Q^-1)``,
``Q = U^T F^-1 U`` sparse, has its own exact leave-one-out conditional (``1 / Q_ii`` and
``y_i - [Q r]_i / Q_ii``); measured the same way, with the fit's own neighbour sets (maximin
order, m = 10, 20, 30), it was not closer to the exact Gaussian-process leave-one-out than the
conditional used here (errors of the elpd difference of the same size, better in some cases and
worse in others), while the nearest neighbours in all directions need no ordering and are easy to
explain as kriging from the surrounding samples.
Both fits being compared get the same treatment.

The densities are reported in data units with the same Jacobian terms and the same xarray layout
as :func:`bayesgeo.checks.loo.loo_predictive`, so PSIS-LOO (:func:`bayesgeo.checks.modelcheck.fit_loo`),
``compare`` and the LOO-PIT run on them unchanged.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np
from scipy.spatial import cKDTree

from bayesgeo.gp import _nn_kernels as _nb
from bayesgeo.common.defaults import JITTER
from bayesgeo.gp.nn import _METRICS, _as_xy, _check_m, _family, _search_points
from bayesgeo.common.defaults import LOG_2PI as _LOG2PI

__all__ = [
    "DEFAULT_LOO_NEIGHBOURS",
    "loo_neighbour_count",
    "loo_neighbours",
    "nn_loo",
]

#: Smallest number of neighbours of the nearest-neighbour leave-one-out (module docstring).
DEFAULT_LOO_NEIGHBOURS = 30

_PAIRS_PER_CHUNK = 200_000  # (point, draw) pairs per chunk: progress updates a few times a second


def loo_neighbour_count(fit_neighbours: int, n: int, neighbours: int | None = None) -> int:
    """The ``m`` of the leave-one-out: ``neighbours`` if given, else ``max(fit_neighbours, 30)``; at most n - 1."""
    m = max(int(fit_neighbours), DEFAULT_LOO_NEIGHBOURS) if neighbours is None else _check_m(neighbours)
    return max(1, min(m, n - 1))


def loo_neighbours(xy, *, neighbours: int, metric: str = "euclidean") -> np.ndarray:
    """For each point, its ``neighbours`` nearest *other* points.

    Parameters
    ----------
    xy : array (n, 2)
        Locations (planar, or lon/lat degrees for ``greatcircle``).
    neighbours : int
        m >= 1; capped at n - 1.
    metric : {"euclidean", "greatcircle"}

    Returns
    -------
    ndarray (n, m) of int64
        Row i lists the m points nearest point i, nearest first, never i itself. Points sharing
        i's location count as neighbours like any other.
    """
    xy = _as_xy(xy)
    n = xy.shape[0]
    if n < 2:
        raise ValueError("leave-one-out needs at least two points")
    m = min(_check_m(neighbours), n - 1)
    tree = cKDTree(_search_points(xy, metric))
    _, idx = tree.query(_search_points(xy, metric), k=m + 1)
    idx = np.asarray(idx, dtype=np.int64).reshape(n, m + 1)
    # drop the point itself wherever the tree put it (duplicated locations tie at distance 0);
    # when it is not among the m + 1, drop the farthest
    other = idx != np.arange(n)[:, None]
    first = np.argsort(~other, axis=1, kind="stable")[:, :m]
    return np.ascontiguousarray(np.take_along_axis(idx, first, axis=1))


def nn_loo(values, xy, design, *, covariance, scale, partial_sill, nugget, beta, neighbours: int,
           metric: str = "euclidean", nbr=None, jitter: float = JITTER, progress=None
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Nearest-neighbour leave-one-out normal predictives per draw (NumPy in, NumPy out).

    Parameters
    ----------
    values : array (n,)
        Observed values on the model's scale (the fit's standardised ``y``).
    xy : array (n, 2)
        Locations; distances in the units of ``xy`` (km for ``greatcircle``).
    design : array (n, p)
        Trend design matrix.
    covariance : Covariance or str
        One of :data:`bayesgeo.gp.dense.FAST_FAMILIES`.
    scale, partial_sill, nugget : float or array (S,)
        phi (distance units of ``xy``), sigma2, tau2 per draw.
    beta : array (p,) or (S, p)
        Trend coefficients per draw.
    neighbours : int
        m, conditioning points per left-out point (capped at n - 1, where the result is exact).
    metric : {"euclidean", "greatcircle"}
    nbr : array (n, m), optional
        Precomputed :func:`loo_neighbours`; overrides ``neighbours``.
    jitter : float
        Added to the diagonal as ``jitter * sigma2`` (default :data:`bayesgeo.gp.dense.JITTER`).
    progress : object with ``update(int)``, optional
        Told the number of points of each finished chunk (a tqdm bar of total n).

    Returns
    -------
    mean, var, logp : ndarray (S, n)
        ``E[y_i | y_N(i)]`` (trend included), ``Var[y_i | y_N(i)]`` (nugget included) and
        ``log p(y_i | y_N(i))`` for every draw and point; NaN, NaN and -inf for a draw whose
        neighbour matrix does not factorise.
    """
    _, code = _family(covariance)
    xy = _as_xy(xy)
    n = xy.shape[0]
    if metric not in _METRICS:
        raise ValueError(f"unknown metric {metric!r}; choose one of: {', '.join(_METRICS)}")
    values = np.ascontiguousarray(values, dtype=float).reshape(-1)
    if values.shape[0] != n:
        raise ValueError(f"values has {values.shape[0]} entries for {n} locations")
    design = np.ascontiguousarray(np.asarray(design, dtype=float).reshape(n, -1))
    p = design.shape[1]
    scale = np.ascontiguousarray(np.atleast_1d(np.asarray(scale, dtype=float)).reshape(-1))
    s_ = scale.shape[0]
    psill = np.ascontiguousarray(np.broadcast_to(np.asarray(partial_sill, float), (s_,)))
    tau2 = np.ascontiguousarray(np.broadcast_to(np.asarray(nugget, float), (s_,)))
    beta = np.ascontiguousarray(np.broadcast_to(np.asarray(beta, float).reshape(-1, p), (s_, p)))
    if nbr is None:
        nbr = loo_neighbours(xy, neighbours=neighbours, metric=metric)
    nbr = np.ascontiguousarray(nbr, dtype=np.int64)
    if nbr.ndim != 2 or nbr.shape[0] != n or np.any(nbr >= n) or np.any(nbr == np.arange(n)[:, None]):
        raise ValueError("nbr must be (n, m) indices of other points (-1 for padding)")
    # the kernel's target variance is sigma2 + tau2 and its neighbour diagonal sigma2 (1 + jitter) + tau2:
    # passing tau2 + jitter sigma2 with jitter 0 gives K_ii and K_NN the likelihood's diagonal exactly
    t2 = np.ascontiguousarray(tau2 + float(jitter) * psill)
    mean = np.empty((s_, n))
    var = np.empty((s_, n))
    chunk = max(1, min(n, _PAIRS_PER_CHUNK // max(s_, 1)))
    starts = list(range(0, n, chunk))
    metric_code = _METRICS[metric]

    def work(lo: int) -> int:
        hi = min(lo + chunk, n)
        m_c = np.empty((s_, hi - lo))
        v_c = np.empty((s_, hi - lo))
        _nb.nn_moments(code, metric_code, xy, values, design, np.ascontiguousarray(xy[lo:hi]),
                       np.ascontiguousarray(design[lo:hi]), np.ascontiguousarray(nbr[lo:hi]), scale, psill, t2, beta,
                       True, 0.0, m_c, v_c)
        mean[:, lo:hi] = m_c
        var[:, lo:hi] = v_c
        return hi - lo

    threads = min(max(1, int(numba.get_num_threads())), len(starts))
    if threads == 1:
        done = map(work, starts)
    else:
        pool = ThreadPoolExecutor(max_workers=threads)
        done = pool.map(work, starts)
    try:
        for k in done:
            if progress is not None:
                progress.update(k)
    finally:
        if threads > 1:
            pool.shutdown()
    logp = np.empty((s_, n))
    with np.errstate(divide="ignore", invalid="ignore"):
        for lo in range(0, s_, 64):  # blocks of draws: small temporaries
            v = var[lo:lo + 64]
            r = values[None, :] - mean[lo:lo + 64]
            logp[lo:lo + 64] = np.where(v > 0, -0.5 * (_LOG2PI + np.log(v) + r * r / v), -np.inf)
    return mean, var, logp
