"""What the nearest-neighbour likelihood costs in accuracy: its pseudo-true values and information.

A fit with the nearest-neighbour (Vecchia) likelihood (:mod:`bayesgeo.gp.nn`) uses an
*approximate* density q_eta of the data. Two questions decide whether that matters:

1. **Does it move the estimates?** Data drawn from the exact model p at eta0 make the approximate
   likelihood peak, as data accumulate, at its pseudo-true value (White 1982)

       eta* = argmax_eta E_{y ~ p(eta0)} [log q_eta(y)].

   The nn log-likelihood is a sum of conditional log densities log q_eta(y_i | y_N(i)), and under p
   the conditional of y_i given y_N(i) is exactly the Gaussian that q uses at eta0; each term's
   expectation is therefore largest at eta0 (Gibbs' inequality), so eta* = eta0: the nn score is an
   unbiased estimating equation (Stein, Chi and Welty 2004, on conditional-likelihood
   approximations; statement from memory). :func:`nn_pseudo_true` computes eta* numerically, as a
   check of that argument on given locations.

2. **How much information does it lose, and are its intervals honest?** The nn posterior's spread
   follows the curvature H = -E[d^2 log q] (Bernstein-von Mises), but the spread of the nn estimate
   over data sets is the sandwich H^-1 J H^-1 with J = Var[d log q] (Godambe 1960; White 1982),
   and the exact likelihood's is I^-1, the Fisher information I = 0.5 tr(K^-1 K_j K^-1 K_k)
   (Mardia and Marshall 1984). :func:`nn_information` computes all three in log parameters on a
   window of the data: sandwich sd / posterior sd > 1 means intervals too narrow by that factor;
   exact sd / sandwich sd < 1 is the loss of precision against an exact fit.

Closed forms. With ``u_i`` the i-th row of ``I - B`` (1 at i, ``-b_i`` at the neighbours N(i)) and
K0 the exact covariance at eta0,

    E log q_eta(y) = sum_i [ -0.5 log(2 pi f_i) - 0.5 u_i^T K0 u_i / f_i ],
    u_i^T K0 u_i = K0_ii - 2 b_i^T K0[N(i), i] + b_i^T K0[N(i), N(i)] b_i,

with b_i, f_i of q_eta (the nn likelihood's formulas) and E[y y^T] = K0; it needs only the small
neighbour blocks, O(n m^3) like one likelihood evaluation. With log q = -0.5 y^T Q y + 0.5 log det Q
+ const and Q_j = dQ / d eta_j, Cov(d_j log q, d_k log q) = 0.5 tr(Q_j K0 Q_k K0) (variance of
Gaussian quadratic forms, Mathai and Provost 1992, thm. 3.2b.2); that one is dense, so
:func:`nn_information` uses a window of the data at the data's own density (the approximation's
behaviour is set mainly by how many points fall within a range; a window narrower than a few ranges
understates the width ratio somewhat, see :func:`nn_information`). Derivatives
in eta = (log scale, log partial sill[, log nugget]) are central differences (step 1e-3); the mean
of the data (trend) is taken as known.

References
----------
Godambe, V. P. (1960). An optimum property of regular maximum likelihood estimation. *Ann. Math.
Statist.* 31, 1208-1211. Mardia, K. V. and Marshall, R. J. (1984). Maximum likelihood estimation
of models for residual covariance in spatial regression. *Biometrika* 71, 135-146. Mathai, A. M.
and Provost, S. B. (1992). *Quadratic Forms in Random Variables*. Stein, M. L., Chi, Z. and Welty,
L. J. (2004). Approximating likelihoods for large spatial data sets. *JRSS B* 66, 275-296. White,
H. (1982). Maximum likelihood estimation of misspecified models. *Econometrica* 50, 1-25.
Katzfuss, M. and Guinness, J. (2021). *Statistical Science* 36, 124-141.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize

from bayesgeo.gp.covariance import Covariance
from bayesgeo.common.geometry import haversine
from bayesgeo.common.defaults import JITTER
from bayesgeo.gp.nn import _as_xy, _family, _ordering, maximin_order, nearest_previous
from bayesgeo.common.defaults import LOG_2PI as _LOG2PI

__all__ = ["NNBlocks", "expected_nn_loglik", "nn_blocks", "nn_information", "nn_pseudo_true", "window"]



class NNBlocks:
    """Distances of every point to its conditioning set, grouped by set size.

    ``groups[k] = (points, d_nn, d_ni)``: the points with k neighbours, the (p, k, k) distances
    among their neighbours and the (p, k) distances from each neighbour to the point.
    """

    def __init__(self, groups: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]], n: int):
        self.groups = groups
        self.n = n


def _dist(a: np.ndarray, b: np.ndarray, metric: str) -> np.ndarray:
    if metric == "greatcircle":
        return haversine(a[..., 0], a[..., 1], b[..., 0], b[..., 1])
    return np.hypot(a[..., 0] - b[..., 0], a[..., 1] - b[..., 1])


def nn_blocks(xy, *, neighbours: int, order="maximin", metric: str = "euclidean",
              distance_scale: float = 1.0, nbr=None) -> NNBlocks:
    """The local distance blocks of the nearest-neighbour likelihood (same ordering and sets).

    Parameters
    ----------
    xy : array (n, 2)
        Locations (distance units, or lon/lat degrees for ``greatcircle``).
    neighbours, order, metric, distance_scale, nbr
        As :func:`bayesgeo.gp.nn.nn_loglik_and_grad`; distances are divided by
        ``distance_scale``.
    """
    xy = _as_xy(xy)
    n = xy.shape[0]
    if nbr is None:
        m = max(1, min(int(neighbours), n - 1))
        order = maximin_order(xy, metric=metric) if order == "maximin" else _ordering(xy, order, metric)
        nbr = nearest_previous(xy, order, neighbours=m, metric=metric)
    nbr = np.asarray(nbr, dtype=np.int64)
    counts = (nbr >= 0).sum(axis=1)
    groups = {}
    for k in np.unique(counts):
        pts = np.flatnonzero(counts == k)
        if k == 0:
            groups[0] = (pts, np.zeros((pts.size, 0, 0)), np.zeros((pts.size, 0)))
            continue
        nb = nbr[pts, :k]
        loc = xy[nb]  # (p, k, 2)
        d_nn = _dist(loc[:, :, None, :], loc[:, None, :, :], metric) / distance_scale
        d_ni = _dist(loc, xy[pts][:, None, :], metric) / distance_scale
        idx = np.arange(k)
        d_nn[:, idx, idx] = 0.0
        groups[int(k)] = (pts, d_nn, d_ni)
    return NNBlocks(groups, n)


def _local(cov: Covariance, d_nn, d_ni, scale, psill, nugget):
    k = d_nn.shape[-1]
    a = psill * cov.correlation(d_nn, scale) + (nugget + JITTER * psill) * np.eye(k)
    c = psill * cov.correlation(d_ni, scale)
    return a, c, psill * (1.0 + JITTER) + nugget


def expected_nn_loglik(blocks: NNBlocks, covariance: Covariance | str, params, true_params) -> float:
    """E over y ~ N(0, K(true_params)) of the nn log-likelihood at ``params`` (closed form).

    Parameters
    ----------
    blocks : NNBlocks
        From :func:`nn_blocks`.
    covariance : str or Covariance
        Family (one with a nearest-neighbour kernel).
    params, true_params : tuple of float
        (scale, partial_sill, nugget) on the distance scale of ``blocks``; the nugget may be 0.

    Returns
    -------
    float
        Log units. At ``params == true_params`` with every point conditioned on all earlier points
        it equals E log p = -0.5 (log det K + n + n log 2 pi).
    """
    cov, _ = _family(covariance)
    total = 0.0
    for k, (pts, d_nn, d_ni) in blocks.groups.items():
        a, c, kii = _local(cov, d_nn, d_ni, *params)
        a0, c0, k0ii = _local(cov, d_nn, d_ni, *true_params)
        if k == 0:
            f = np.full(pts.size, kii)
            quad = np.full(pts.size, k0ii)
        else:
            chol = np.linalg.cholesky(a)
            w = np.linalg.solve(chol, c[..., None])                      # L^-1 c
            b = np.linalg.solve(np.swapaxes(chol, -1, -2), w)[..., 0]    # A^-1 c
            f = kii - np.einsum("pk,pk->p", w[..., 0], w[..., 0])
            quad = k0ii - 2.0 * np.einsum("pk,pk->p", b, c0) + np.einsum("pk,pkl,pl->p", b, a0, b)
        if np.any(f <= 0):
            return -np.inf
        total += float(np.sum(-0.5 * (_LOG2PI + np.log(f)) - 0.5 * quad / f))
    return total


def nn_pseudo_true(blocks: NNBlocks, covariance: Covariance | str, scale: float, partial_sill: float,
                   nugget: float, *, xatol: float = 1e-4, maxiter: int = 400) -> dict:
    """The parameters at which the nn likelihood peaks, in expectation, for data of the exact model.

    Parameters
    ----------
    blocks : NNBlocks
        From :func:`nn_blocks` (the data locations and the fit's ordering and neighbour count).
    covariance : str or Covariance
    scale, partial_sill, nugget : float
        The exact model's parameters eta0 (scale on the distance scale of ``blocks``; partial sill
        and nugget in squared value units). ``nugget = 0``: a model without nugget (not varied).
    xatol, maxiter
        Nelder-Mead tolerance on the log parameters and iteration cap.

    Returns
    -------
    dict
        ``scale``, ``partial_sill``, ``nugget``: the pseudo-true values; ``log_shift``: their log
        ratios to the inputs (``{"scale", "partial_sill", "nugget"}``); ``converged`` (bool);
        ``evaluations``.
    """
    eta0 = np.log([scale, partial_sill] + ([nugget] if nugget > 0 else []))
    true = (scale, partial_sill, nugget)

    def unpack(eta):
        e = np.exp(eta)
        return (e[0], e[1], e[2] if eta.size == 3 else 0.0)

    def neg(eta):
        v = expected_nn_loglik(blocks, covariance, unpack(eta), true)
        return 1e300 if not np.isfinite(v) else -v

    res = optimize.minimize(neg, eta0, method="Nelder-Mead",
                            options={"xatol": xatol, "fatol": 1e-9, "maxiter": maxiter,
                                     "initial_simplex": eta0 + np.vstack([np.zeros(eta0.size), 0.05 * np.eye(eta0.size)])})
    s, p, t = unpack(res.x)
    shift = {"scale": float(res.x[0] - eta0[0]), "partial_sill": float(res.x[1] - eta0[1])}
    if eta0.size == 3:
        shift["nugget"] = float(res.x[2] - eta0[2])
    return {"scale": float(s), "partial_sill": float(p), "nugget": float(t), "log_shift": shift,
            "converged": bool(res.success), "evaluations": int(res.nfev)}


def window(xy, *, points: int = 1000, metric: str = "euclidean") -> np.ndarray:
    """Indices of the ``points`` locations nearest the one closest to the centroid (all if fewer).

    A compact window keeps the data's own density, which is what sets the approximation's
    behaviour (points per range), at a size where dense algebra is cheap.
    """
    from scipy.spatial import cKDTree

    from bayesgeo.gp.nn import _search_points

    pts = _search_points(_as_xy(xy), metric)
    n = pts.shape[0]
    if n <= points:
        return np.arange(n)
    tree = cKDTree(pts)
    centre = int(np.argmin(((pts - pts.mean(axis=0)) ** 2).sum(axis=1)))
    _, idx = tree.query(pts[centre], k=points)
    return np.sort(np.asarray(idx, dtype=np.int64))


def _log_params(scale, partial_sill, nugget) -> np.ndarray:
    return np.log([scale, partial_sill] + ([nugget] if nugget > 0 else []))


def _unlog(eta: np.ndarray) -> tuple[float, float, float]:
    e = np.exp(eta)
    return float(e[0]), float(e[1]), float(e[2]) if eta.size == 3 else 0.0


#: Points in the window of :func:`nn_information` (about 7 s on one core at any n).
WINDOW_POINTS = 2000


def nn_information(xy, covariance: Covariance | str, scale: float, partial_sill: float, nugget: float, *,
                   neighbours: int, metric: str = "euclidean", window_points: int = WINDOW_POINTS,
                   step: float = 1e-3) -> dict:
    """Posterior, sampling and exact standard deviations of the log parameters under the nn likelihood.

    Parameters
    ----------
    xy : array (n, 2)
        Data locations (distance units; lon/lat degrees with ``greatcircle``, distances in km).
    covariance : str or Covariance
        Family with a nearest-neighbour kernel.
    scale, partial_sill, nugget : float
        Parameters at which to evaluate (for a fit: its posterior medians), in distance units and
        squared value units; ``nugget = 0`` for a model without nugget.
    neighbours : int
        m of the nn likelihood.
    metric : {"euclidean", "greatcircle"}
    window_points : int
        Size of the window (:func:`window`) on which the dense terms are computed.
    step : float
        Central-difference step in the log parameters.

    Returns
    -------
    dict
        ``parameters``: names in order (``scale``, ``partial_sill``[, ``nugget``]); per name, in
        log units (relative sds), for the window's data and ignoring the prior: ``nn_sd``
        sqrt(diag H^-1) (the spread an nn posterior reports), ``nn_sampling_sd`` sqrt(diag
        H^-1 J H^-1) (the actual spread of the nn estimate over data sets), ``exact_sd``
        sqrt(diag I^-1) (the exact likelihood's); ``width_ratio`` = sampling / nn
        (> 1: nn intervals too narrow), ``efficiency`` = (exact / sampling)^2 (share of the exact
        likelihood's information kept), ``shift_sd`` = sqrt(sampling^2 - exact^2) / exact (the sd
        over data sets of the nn estimate minus the exact one, in exact sds: for a consistent and an
        efficient estimator the variance of their difference is the difference of their variances,
        Hausman 1978; how far an nn posterior may sit from the exact one); ``window_points``,
        ``window_diameter`` (twice the largest distance from the window's centre point, distance
        units), ``neighbours``.

    Notes
    -----
    When the window spans less than a few ranges the width ratio is a lower bound for the whole
    data set: it grows with the window at fixed density (Matérn 3/2, nugget 0.25, 20,000 points per
    km², range 300 m, m = 20: 1.016, 1.04, 1.068, 1.082 for windows of 500, 1,000, 2,000, 3,000
    points; docs/large_data.md).
    """
    from bayesgeo.common.geometry import distance_matrix
    from bayesgeo.gp.dense import covariance_matrix
    from bayesgeo.gp.nn_kriging import _factors

    from bayesgeo.common.geometry import cross_distance

    cov, _ = _family(covariance)
    xy = _as_xy(xy)
    sub = xy[window(xy, points=window_points, metric=metric)]
    k = sub.shape[0]
    centre = int(np.argmin(((sub - sub.mean(axis=0)) ** 2).sum(axis=1)))
    diameter = 2.0 * float(cross_distance(sub[centre:centre + 1], sub, metric).max())
    m = max(1, min(int(neighbours), k - 1))
    nbr = nearest_previous(sub, maximin_order(sub, metric=metric), neighbours=m, metric=metric)
    blocks = nn_blocks(sub, neighbours=m, metric=metric, nbr=nbr)
    eta0 = _log_params(scale, partial_sill, nugget)
    p = eta0.size
    true = _unlog(eta0)
    basis = np.eye(p) * step

    def g(eta):
        return expected_nn_loglik(blocks, cov, _unlog(eta), true)

    h = np.empty((p, p))
    for i in range(p):
        for j in range(i, p):
            a, b = basis[i], basis[j]
            h[i, j] = h[j, i] = -(g(eta0 + a + b) - g(eta0 + a - b) - g(eta0 - a + b) + g(eta0 - a - b)) / (4 * step**2)
    dist = distance_matrix(sub, metric)
    k0 = covariance_matrix(dist, cov, *true)

    def q_of(eta):
        u, f = _factors(covariance_matrix(dist, cov, *_unlog(eta)), nbr)
        return np.asarray((u.T @ (u / f[:, None])).todense())

    qk = [(q_of(eta0 + basis[j]) - q_of(eta0 - basis[j])) @ k0 / (2 * step) for j in range(p)]
    kinv = np.linalg.inv(k0)
    kk = [kinv @ (covariance_matrix(dist, cov, *_unlog(eta0 + basis[j]))
                  - covariance_matrix(dist, cov, *_unlog(eta0 - basis[j]))) / (2 * step) for j in range(p)]
    jmat = np.array([[0.5 * np.sum(qk[i] * qk[j].T) for j in range(p)] for i in range(p)])
    fisher = np.array([[0.5 * np.sum(kk[i] * kk[j].T) for j in range(p)] for i in range(p)])
    hinv = np.linalg.inv(h)
    post = np.sqrt(np.diag(hinv))
    samp = np.sqrt(np.diag(hinv @ jmat @ hinv))
    exact = np.sqrt(np.diag(np.linalg.inv(fisher)))
    names = ["scale", "partial_sill", "nugget"][:p]
    out = {"parameters": names, "window_points": int(k), "window_diameter": diameter, "neighbours": int(m)}
    for i, name in enumerate(names):
        out[name] = {"nn_sd": float(post[i]), "nn_sampling_sd": float(samp[i]), "exact_sd": float(exact[i]),
                     "width_ratio": float(samp[i] / post[i]), "efficiency": float((exact[i] / samp[i]) ** 2),
                     "shift_sd": float(np.sqrt(max(samp[i] ** 2 - exact[i] ** 2, 0.0)) / exact[i])}
    return out


#: A width ratio above this marks an nn fit's intervals as too narrow to report unadjusted.
WIDTH_RATIO_LIMIT = 1.10


def approximation_check(posterior, xy, *, covariance: str, neighbours: int,
                        metric: str = "euclidean", window_points: int = WINDOW_POINTS) -> dict:
    """:func:`nn_information` at the posterior medians of an nn fit, with a verdict.

    Parameters
    ----------
    posterior : xarray.Dataset
        Derived posterior with ``scale`` and ``partial_sill`` (and ``nugget`` when fitted), in data
        units (:func:`bayesgeo.fitting.posterior.derive`).
    xy : array (n, 2)
        Data locations.
    covariance, neighbours, metric, window_points
        The fit's family (one with a nearest-neighbour kernel), its m and metric; the window size.

    Returns
    -------
    dict
        :func:`nn_information`'s output plus ``at`` (the medians used), ``limit``
        (:data:`WIDTH_RATIO_LIMIT`), ``status`` (``"ok"`` or ``"caution"``) and ``message``.
    """
    cov, _ = _family(covariance)
    med = {k: float(posterior[k].median()) for k in ("scale", "partial_sill", "nugget") if k in posterior}
    nug = med.get("nugget", 0.0)
    info = nn_information(xy, cov, med["scale"], med["partial_sill"], nug if nug > 0 else 0.0,
                          neighbours=neighbours, metric=metric, window_points=window_points)
    worst = max(info[p]["width_ratio"] for p in info["parameters"])
    eff = info["scale"]["efficiency"]
    status = "ok" if worst <= WIDTH_RATIO_LIMIT else "caution"
    width = (f"its intervals are up to {100 * (worst - 1):.0f}% narrower than the spread of its estimates"
             if worst >= 1.005 else "its intervals match the spread of its estimates")
    spans = info["window_diameter"] / (med["scale"] * cov.range_factor)
    if info["window_points"] < len(xy) and spans < 1.5:
        width += (f"; the window spans only {spans:.1f} practical ranges, so take these as lower bounds "
                  "(the ratio grows with the window)")
    shift = info["scale"]["shift_sd"]
    msg = (f"Nearest-neighbour likelihood (m = {info['neighbours']}), checked on {info['window_points']} points at "
           f"the posterior medians (its estimating equation is unbiased: docs/large_data.md): it keeps about "
           f"{100 * min(eff, 1.0):.0f}% of the exact likelihood's information on the range scale (its estimate "
           f"differs from the exact likelihood's by about {shift:.2f} posterior sd, one sd over data sets), "
           f"and {width}.")
    if status == "caution":
        msg += (f" That exceeds {100 * (WIDTH_RATIO_LIMIT - 1):.0f}%: widen the reported intervals by at least that "
                "factor and say so, or compare with an exact fit of a subset (docs/large_data.md, choosing m).")
    return {**info, "window_ranges": spans, "at": med, "limit": WIDTH_RATIO_LIMIT, "status": status,
            "message": msg}
