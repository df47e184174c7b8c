"""Nearest-neighbour kriging and the error moments of the nearest-neighbour approximation.

:func:`nn_kriging_moments` is the kriging of the nearest-neighbour engine (:mod:`bayesgeo.gp.engines`): each
target conditioned on its m nearest data, no n x n matrix. :func:`nn_error_moments` gives the
moments of the error the Vecchia approximation makes in the log-likelihood, from the exact
covariance (small n only), which the accuracy check (:mod:`bayesgeo.gp.nn_accuracy`) is built on.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from bayesgeo.common.defaults import JITTER
from bayesgeo.gp import _nn_kernels as _nb
from bayesgeo.gp.covariance import Covariance
from bayesgeo.gp.nn import (DEFAULT_NEIGHBOURS, _METRICS, _as_xy, _check_m, _family, _search_points,
                            _structure)

__all__ = ["nn_error_moments", "nn_kriging_moments"]


def _factors(k: np.ndarray, nbr: np.ndarray):
    """Sparse U = I - B (rows: point i, -b_i at its neighbours) and the conditional variances f."""
    from scipy import sparse

    n = k.shape[0]
    rows, cols, vals = [np.arange(n)], [np.arange(n)], [np.ones(n)]
    f = np.empty(n)
    for i in range(n):
        nb = nbr[i][nbr[i] >= 0]
        if nb.size:
            b = np.linalg.solve(k[np.ix_(nb, nb)], k[nb, i])
            f[i] = k[i, i] - k[nb, i] @ b
            rows.append(np.full(nb.size, i))
            cols.append(nb)
            vals.append(-b)
        else:
            f[i] = k[i, i]
    u = sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n, n))
    return u, f


def nn_error_moments(xy, covariance: Covariance | str, scale: float, partial_sill: float, nugget: float, *,
                     neighbours: int = DEFAULT_NEIGHBOURS, order="maximin", metric: str = "euclidean",
                     distance_scale: float = 1.0, alt_scale: float | None = None, nbr=None) -> dict:
    """Exact mean and sd of the approximation error over data sets drawn from the model.

    For y ~ N(0, K) (K at the given parameters), the error e(y) = log q(y) - log p(y) of the
    Vecchia density q = N(0, Q^-1), Q = U^T F^-1 U, against the exact p is a quadratic form in y,
    so its moments have closed forms (no simulation):

        E e = 0.5 (log det K - sum_i log f_i) = -KL(p || q),
        Var e = 0.5 tr((Q K - I)^2)

    (Gaussian Kullback-Leibler divergence and variance of a Gaussian quadratic form, e.g. Mathai and
    Provost 1992, *Quadratic Forms in Random Variables*, thm. 3.2b.2; Katzfuss and Guinness 2021 use
    the KL divergence to compare Vecchia approximations). With ``alt_scale`` it also gives the
    moments of the error of a log-likelihood *difference*, d(y) = [log q_a - log q](y) - [log p_a -
    log p](y) with a = the same parameters but scale ``alt_scale``, still for y drawn at ``scale``:
    what moves a posterior is d, not e. Dense O(n^3): use it on n <= a few thousand points (a
    subset of the data), to choose ``neighbours`` or to check an nn fit at a few posterior draws.

    Parameters
    ----------
    xy, covariance, scale, partial_sill, nugget, neighbours, order, metric, distance_scale, nbr
        As :func:`nn_loglik_and_grad`.
    alt_scale : float, optional
        Second scale for the difference error.

    Returns
    -------
    dict
        ``error_mean``, ``error_sd`` (log units); with ``alt_scale`` also ``difference_mean``,
        ``difference_sd`` and ``exact_difference_mean`` = E[log p_a - log p] = -KL(p || p_a), the
        size of the exact difference for comparison.
    """
    from bayesgeo.common.geometry import distance_matrix
    from bayesgeo.gp.dense import covariance_matrix

    cov, _ = _family(covariance)
    xy = _as_xy(xy)
    n = xy.shape[0]
    if nbr is None:
        xy, nbr = _structure(xy, n, neighbours, order, metric)
    nbr = np.asarray(nbr, dtype=np.int64)
    dist = distance_matrix(xy, metric) / float(distance_scale)
    k0 = covariance_matrix(dist, cov, float(scale), float(partial_sill), float(nugget))
    l0 = np.linalg.cholesky(k0)
    logdet0 = 2.0 * np.log(np.diag(l0)).sum()
    u0, f0 = _factors(k0, nbr)
    # Q0 K0 - I = U^T F^-1 (U K0) - I; the mean needs only log det, since tr(Q0 K0) = sum f_i / f_i = n
    qk0 = np.asarray(u0.T @ ((u0 @ k0) / f0[:, None]))
    m0 = qk0 - np.eye(n)
    out = {"error_mean": 0.5 * (logdet0 - np.log(f0).sum()), "error_sd": float(np.sqrt(0.5 * np.sum(m0 * m0.T)))}
    if alt_scale is not None:
        ka = covariance_matrix(dist, cov, float(alt_scale), float(partial_sill), float(nugget))
        la = np.linalg.cholesky(ka)
        logdeta = 2.0 * np.log(np.diag(la)).sum()
        ua, fa = _factors(ka, nbr)
        qak0 = np.asarray(ua.T @ ((ua @ k0) / fa[:, None]))
        kik0 = _cho_solve_lower(la, k0)
        # d(y) = -0.5 y^T A y + c, A = (Qa - Ka^-1) - (Q0 - K0^-1), c = -0.5 [(sum log fa - logdet a) - (sum log f0 - logdet 0)]
        ak = qak0 - kik0 - qk0 + np.eye(n)
        c = -0.5 * ((np.log(fa).sum() - logdeta) - (np.log(f0).sum() - logdet0))
        out["difference_mean"] = float(c - 0.5 * np.trace(ak))
        out["difference_sd"] = float(np.sqrt(0.5 * np.sum(ak * ak.T)))
        out["exact_difference_mean"] = float(-0.5 * (np.trace(kik0) - n + logdeta - logdet0))
    out["error_mean"] = float(out["error_mean"])
    return out


def _cho_solve_lower(chol_lower: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve (L L^T) x = b for a lower Cholesky factor L."""
    from scipy import linalg

    return linalg.cho_solve((chol_lower, True), b, check_finite=False)


# --- prediction ---------------------------------------------------------------------------------


def nn_kriging_moments(xy_obs, values, design_obs, xy_new, design_new, *, covariance: Covariance | str, scale,
             partial_sill, nugget, beta, metric: str = "euclidean", neighbours: int = 30,
             include_nugget: bool = True, jitter: float = JITTER):
    """Nearest-neighbour simple kriging per posterior draw: each target uses its m nearest data.

    Per draw d and target s, with N the ``neighbours`` data points nearest s:

        mean = f(s)^T beta_d + k_N^T K_NN^-1 (z_N - F_N beta_d)
        var  = sigma2_d [+ tau2_d] - k_N^T K_NN^-1 k_N,

    the simple-kriging equations (Cressie 1993, *Statistics for Spatial Data*, sec. 3.4.5) with the
    data restricted to N; K_NN carries the same ``tau2 + jitter sigma2`` diagonal as
    :func:`bayesgeo.predict.prediction.make_basis`. With ``neighbours >= n`` it equals full simple kriging.
    Cost O(T (m^2 + D m^3)) time, O(T m) memory: no n x n matrix.

    Parameters
    ----------
    xy_obs, values, design_obs : arrays (n, 2), (n,), (n, p)
        Data locations, modelled values (log values under a log transform) and trend design.
    xy_new, design_new : arrays (T, 2), (T, p)
        Targets and their trend design.
    covariance : Covariance or str
        One of :data:`bayesgeo.gp.dense.FAST_FAMILIES`.
    scale, partial_sill, nugget : float or array (D,)
        phi (distance units of ``xy``; km for ``greatcircle``), sigma2, tau2 per draw.
    beta : array (p,) or (D, p)
    metric : {"euclidean", "greatcircle"}
    neighbours : int
        m data points per target (default 30).
    include_nugget : bool
        Variance of a new measurement (field + nugget, default) or of the field alone.

    Returns
    -------
    mean, var : ndarray (D, T)
        The same per-draw moments as :func:`bayesgeo.gp.kriging.draw_moments`.
    """
    _, code = _family(covariance)
    xy_obs, xy_new = _as_xy(xy_obs), np.ascontiguousarray(np.asarray(xy_new, float).reshape(-1, 2))
    values = np.ascontiguousarray(values, dtype=float).reshape(-1)
    n, t = xy_obs.shape[0], xy_new.shape[0]
    if values.shape[0] != n:
        raise ValueError(f"values has {values.shape[0]} entries for {n} locations")
    design_obs = np.ascontiguousarray(np.asarray(design_obs, float).reshape(n, -1))
    p = design_obs.shape[1]
    design_new = np.ascontiguousarray(np.asarray(design_new, float).reshape(t, p))
    scale = np.atleast_1d(np.asarray(scale, dtype=float))
    n_d = scale.shape[0]
    psill = np.ascontiguousarray(np.broadcast_to(np.asarray(partial_sill, float), (n_d,)))
    tau2 = np.ascontiguousarray(np.broadcast_to(np.asarray(nugget, float), (n_d,)))
    beta = np.ascontiguousarray(np.broadcast_to(np.asarray(beta, float).reshape(-1, p), (n_d, p)))
    if np.any(~(scale > 0)) or np.any(~(psill > 0)) or np.any(~(tau2 >= 0)):
        raise ValueError("every draw needs scale > 0, partial_sill > 0 and nugget >= 0")
    m = min(_check_m(neighbours), n)
    if metric not in _METRICS:
        raise ValueError(f"unknown metric {metric!r}; choose one of: {', '.join(_METRICS)}")
    nbr = np.full((t, m), -1, dtype=np.int64)
    if t:
        tree = cKDTree(_search_points(xy_obs, metric))
        _, idx = tree.query(_search_points(xy_new, metric), k=m)
        nbr[:] = np.asarray(idx).reshape(t, m)
    mean = np.empty((n_d, t))
    var = np.empty((n_d, t))
    _nb.nn_moments(code, _METRICS[metric], xy_obs, values, design_obs, xy_new, design_new, nbr,
                   np.ascontiguousarray(scale), psill, tau2, beta, bool(include_nugget), float(jitter), mean, var)
    return mean, var


def nn_residual_means(basis, xy_new, resid) -> np.ndarray:
    """Nearest-neighbour simple-kriging means of residual vectors, several per draw: (D, S, m) from ``resid``
    (D, S, n), each target conditioned on its ``basis.neighbours`` nearest data, as :func:`nn_kriging_moments`
    (the mean part, without the trend)."""
    resid = np.asarray(resid, dtype=float)
    n_d, n_s, n = resid.shape
    xy_new = np.asarray(xy_new, dtype=float).reshape(-1, 2)
    out = np.empty((n_d, n_s, xy_new.shape[0]))
    from bayesgeo.gp.kriging import draw_xy

    ones, ones_new = np.ones((n, 1)), np.ones((xy_new.shape[0], 1))
    for k in range(n_d):
        xy_k, new_k = draw_xy(basis, basis.xy, k), draw_xy(basis, xy_new, k)  # anisotropic fits: the draw's own
        for s in range(n_s):
            out[k, s] = nn_kriging_moments(xy_k, resid[k, s], ones, new_k, ones_new, covariance=basis.covariance,
                                           scale=basis.scale[k:k + 1], partial_sill=basis.partial_sill[k:k + 1],
                                           nugget=basis.nugget[k:k + 1], beta=[0.0], metric=basis.metric,
                                           neighbours=basis.neighbours, include_nugget=False)[0][0]
    return out
