"""NumPy kernels of Bayesian kriging: Gaussian prediction per posterior draw, combined over draws.

The public front end (posterior draws, targets, chunking with dask, xarray results) is
:mod:`bayesgeo.predict.prediction`; this module works on plain arrays.

For one posterior draw theta = (phi, sigma2, tau2, beta) the field at new locations given the
data z is Gaussian (simple kriging with the trend known given the draw; Rasmussen and Williams
2006, *Gaussian Processes for Machine Learning*, eqs. 2.23-2.24; Cressie 1993, *Statistics for
Spatial Data*, sec. 3.4.5)::

    K     = sigma2 R(phi) + (tau2 + jitter) I          (n x n, the data covariance)
    k_*   = sigma2 rho(|s_* - s_i| / phi)                (cross-covariances, n per target)
    mean  = f(s_*)^T beta + k_*^T K^-1 (z - F beta)
    var   = sigma2 [+ tau2] - k_*^T K^-1 k_*

``[+ tau2]``: with ``include_nugget=True`` (the default) the variance is that of a *new
measurement* at s_* (field plus nugget); with ``False`` it is that of the smooth field alone.
The choice is discussed in ``docs/prediction.md``. Area averages always use the field (the
nugget averages out over an area).

Because beta and the covariance parameters change from draw to draw, the predictive distribution
is the mixture of these Gaussians over the posterior draws (Bayesian kriging; Diggle and Ribeiro
2007, *Model-based Geostatistics*, sec. 7.2). Its mean, sd, quantiles (the mixture CDF inverted
by vectorised bisection) and exceedance probabilities (mean over draws of the normal tail) are
reported. Under ``transform="log"`` each draw is log-normal in data units: mean exp(mu + v/2),
tail 1 - Phi((log T - mu)/sqrt(v)), quantiles exp(q) of the log-scale mixture quantile q.

Work is organised for bounded memory: each draw's data covariance is factorised once
(:func:`make_basis`, Cholesky factor L and alpha = K^-1 (z - F beta)); targets are split into
chunks of cells and each chunk reduces over all draws (memory O(chunk x draws)). Chunks run as
dask tasks (local threads by default; NumPy's BLAS releases the GIL) or on a dask.distributed
cluster. Per-cell arithmetic does not depend on the chunking.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import linalg, special
from scipy.linalg import blas

from bayesgeo.gp.covariance import Covariance, get_covariance, kernel_code
from bayesgeo.common.geometry import cross_distance, distance_matrix
from bayesgeo.common.validate import InputError
from bayesgeo.common.defaults import JITTER

__all__ = [
    "CAUTION",
    "KrigingBasis",
    "make_basis",
    "kriging_moments",
    "draw_moments",
    "mixture_summary",
    "mixture_quantiles",
]

#: Caution attached to every prediction output (contamination and exposure decisions).
CAUTION = (
    "Model-based predictions and exceedance probabilities: they rest on the fitted covariance model, "
    "the sampling design and the posterior draws, and are not a substitute for site investigation. "
    "Decisions about contamination or exposure must follow local regulation and guidance and be "
    "reviewed by a licensed professional."
)

_TINY = 1e-300
_PAD = 16
_KERNEL = None


@dataclass(frozen=True)
class KrigingBasis:
    """Data and per-draw factorisations shared by every chunk of targets.

    Attributes
    ----------
    xy : ndarray (n, 2)
        Data locations. ``values`` (n,): modelled values (log values under ``transform="log"``).
    design : ndarray (n, p)
        Trend design at the data locations.
    covariance : Covariance
    metric : str
        ``euclidean`` or ``greatcircle``.
    scale, partial_sill, nugget : ndarray (D,)
        Scale parameter phi (distance units), sigma2 and tau2 (squared model units) per draw.
    beta : ndarray (D, p)
        Trend coefficients per draw (model units, for ``design``).
    chol : list of ndarray (n, n)
        Lower Cholesky factor of K per draw (Fortran order, for BLAS).
    alpha : ndarray (D, n)
        K^-1 (values - design beta) per draw.
    transform : str or None
        ``"log"``: results are back-transformed to data units per draw.
    neighbours : int
        0 for exact kriging with the factors above; m > 0 for nearest-neighbour kriging
        (:func:`bayesgeo.gp.nn_kriging.nn_kriging_moments`: each target conditioned on its m nearest data), where
        ``chol`` is empty and ``alpha`` unused, so memory stays O(n) for large data.
    anisotropy : ndarray (D, 2) or None
        Per draw the azimuth of the major axis (degrees) and the ratio of ranges of a geometrically
        anisotropic fit (:mod:`bayesgeo.gp.anisotropy`): each draw's distances are then taken in its own
        rotated and scaled coordinates (:func:`draw_xy`).
    """

    xy: np.ndarray
    values: np.ndarray
    design: np.ndarray
    covariance: Covariance
    metric: str
    scale: np.ndarray
    partial_sill: np.ndarray
    nugget: np.ndarray
    beta: np.ndarray
    chol: list
    alpha: np.ndarray
    transform: str | None = None
    neighbours: int = 0
    site: str = ""  # the site label of a fit extracted from a several-site fit ("" otherwise)
    anisotropy: np.ndarray | None = None

    @property
    def engine_name(self) -> str:
        """The likelihood engine whose kriging this basis is for (:func:`bayesgeo.gp.engines.engine`)."""
        return "nn" if self.neighbours else "dense"

    @property
    def n_draws(self) -> int:
        """Number of posterior draws D."""
        return int(self.scale.shape[0])


def make_basis(xy, values, design, *, covariance: Covariance | str, scale, partial_sill, nugget, beta,
               metric: str = "euclidean", transform: str | None = None, jitter: float = JITTER,
               max_bytes: float = 4 * 2**30, neighbours: int = 0, anisotropy=None) -> KrigingBasis:
    """Factorise the data covariance of every draw once.

    Parameters
    ----------
    xy : array (n, 2)
        Data locations (distance units; lon/lat degrees for ``greatcircle``, distances in km).
    values : array (n,) or (D, n)
        Modelled values (already log-transformed under ``transform="log"``); one row per draw when they
        differ between draws (non-detects imputed draw by draw).
    design : array (n, p)
        Trend design at the data locations (p may be 0 for a known zero mean).
    covariance : Covariance or str
        Family (:func:`bayesgeo.gp.covariance.get_covariance`).
    scale, partial_sill, nugget : float or array (D,)
        phi, sigma2, tau2 per draw.
    beta : array (p,) or (D, p)
        Trend coefficients per draw.
    metric : {"euclidean", "greatcircle"}
    transform : {None, "log"}
    jitter : float
        Added to the diagonal as ``jitter * sigma2`` (keeps K invertible without a nugget).
    max_bytes : float
        Refuse (InputError naming ``--draws``) when the D factors of n x n would exceed this.
    neighbours : int
        0 (default): exact kriging; m > 0: nearest-neighbour kriging with m data per target,
        nothing factorised here.
    anisotropy : array (D, 2), optional
        Azimuth (degrees) and ratio per draw of an anisotropic fit (dense kriging only).

    Returns
    -------
    KrigingBasis
    """
    cov = get_covariance(covariance) if isinstance(covariance, str) else covariance
    xy = np.asarray(xy, dtype=float)
    values = np.asarray(values, dtype=float)
    n = values.shape[-1]
    design = np.asarray(design, dtype=float).reshape(n, -1)
    scale = np.atleast_1d(np.asarray(scale, dtype=float))
    d_count = scale.shape[0]
    psill = np.broadcast_to(np.asarray(partial_sill, dtype=float), (d_count,)).copy()
    tau2 = np.broadcast_to(np.asarray(nugget, dtype=float), (d_count,)).copy()
    beta = np.broadcast_to(np.asarray(beta, dtype=float).reshape(-1, design.shape[1]), (d_count, design.shape[1])).copy()
    if xy.shape != (n, 2):
        raise ValueError(f"xy must have shape ({n}, 2), got {xy.shape}")
    if transform not in (None, "log"):
        raise ValueError(f"transform must be None or 'log', got {transform!r}")
    if np.any(~(scale > 0)) or np.any(~(psill > 0)) or np.any(~(tau2 >= 0)):
        raise ValueError("every draw needs scale > 0, partial_sill > 0 and nugget >= 0")
    if anisotropy is not None:
        anisotropy = np.asarray(anisotropy, dtype=float).reshape(d_count, 2)
        if metric != "euclidean":
            raise ValueError("anisotropic kriging needs planar coordinates")
    if neighbours:
        return KrigingBasis(xy, values, design, cov, metric, scale, psill, tau2, beta, [], np.empty((d_count, 0)),
                            transform, int(neighbours), anisotropy=anisotropy)
    need = 8.0 * d_count * n * n
    if need > max_bytes:
        raise InputError(f"draws: {d_count} draws x {n} points need {need / 2**30:.1f} GiB of Cholesky factors "
                         f"(limit {max_bytes / 2**30:.1f} GiB); use at most {int(max_bytes // (8.0 * n * n))} draws")
    dist = distance_matrix(xy, metric)
    chol, alpha = [], np.empty((d_count, n))
    for k in range(d_count):
        if anisotropy is not None:
            dist = distance_matrix(_rotated(xy, anisotropy, k), metric)
        kmat = psill[k] * cov.correlation(dist, scale[k])
        kmat[np.diag_indices_from(kmat)] += tau2[k] + jitter * psill[k]
        lower = linalg.cholesky(kmat, lower=True, check_finite=False)
        chol.append(np.asfortranarray(lower))
        alpha[k] = linalg.cho_solve((lower, True), (values if values.ndim == 1 else values[k]) - design @ beta[k],
                                    check_finite=False)
    return KrigingBasis(xy, values, design, cov, metric, scale, psill, tau2, beta, chol, alpha, transform,
                        anisotropy=anisotropy)


def _rotated(xy: np.ndarray, anisotropy: np.ndarray | None, k: int) -> np.ndarray:
    if anisotropy is None:
        return xy
    from bayesgeo.gp.anisotropy import to_isotropic

    return to_isotropic(xy, anisotropy[k, 0], anisotropy[k, 1])


def draw_xy(basis: KrigingBasis, xy: np.ndarray, k: int) -> np.ndarray:
    """Coordinates in which draw ``k``'s distances are Euclidean: ``xy`` itself, or for an anisotropic fit
    rotated and scaled by the draw's angle and ratio (:func:`bayesgeo.gp.anisotropy.to_isotropic`)."""
    return _rotated(np.asarray(xy, dtype=float), basis.anisotropy, k)


# --- cross-covariances ------------------------------------------------------------------------


def _kernel():
    """Numba kernel filling out[i, j] = sigma2 rho(d[i, j] / phi) for the closed-form families."""
    global _KERNEL
    if _KERNEL is None:
        import numba

        from bayesgeo.gp.dense import rho_code

        @numba.njit(cache=True, nogil=True)
        def fill(d, inv_scale, sill, family, out):
            n, m = d.shape
            for j in range(m):
                for i in range(n):
                    out[i, j] = sill * rho_code(family, d[i, j] * inv_scale)

        _KERNEL = fill
    return _KERNEL


def _cross_cov(basis: KrigingBasis, dist_f: np.ndarray, k: int, out: np.ndarray) -> np.ndarray:
    """sigma2_k rho(dist / phi_k) written into ``out`` (n, m, Fortran order)."""
    code = kernel_code(basis.covariance.name)
    if code is None:
        out[...] = basis.partial_sill[k] * basis.covariance.correlation(dist_f, basis.scale[k])
    else:
        _kernel()(dist_f, 1.0 / basis.scale[k], basis.partial_sill[k], code, out)
    return out


def _dist_f(basis: KrigingBasis, xy_new: np.ndarray, k: int = 0) -> np.ndarray:
    """Distances data x targets as an (n, m) Fortran-ordered array (of draw ``k`` for an anisotropic fit)."""
    return cross_distance(draw_xy(basis, xy_new, k), draw_xy(basis, basis.xy, k), basis.metric).T


def _at(basis: KrigingBasis, dist_f: np.ndarray, xy_new: np.ndarray, k: int) -> np.ndarray:
    """``dist_f`` (shared by all draws), or draw ``k``'s own distances for an anisotropic fit."""
    return dist_f if basis.anisotropy is None else _dist_f(basis, xy_new, k)


def draw_moments(basis: KrigingBasis, xy_new, design_new, *, include_nugget: bool = True):
    """Conditional mean and variance per draw at new locations (model units) from the basis's Cholesky
    factors: the dense engine's kriging (:meth:`bayesgeo.gp.engines.Engine.draw_moments` picks the engine).

    Parameters
    ----------
    basis : KrigingBasis
    xy_new : array (m, 2)
    design_new : array (m, p)
        Trend design at the targets (:func:`bayesgeo.explore.trend.design_at`).
    include_nugget : bool
        Add tau2: the variance of a new measurement rather than of the smooth field.

    Returns
    -------
    mean, var : ndarray (D, m)
    """
    _needs_factors(basis, "kriging with every datum")
    xy_new = np.asarray(xy_new, dtype=float).reshape(-1, 2)
    m = xy_new.shape[0]
    design_new = np.asarray(design_new, dtype=float).reshape(m, -1)
    # Pad to a multiple of _PAD targets (repeating the last one): BLAS kernels treat a ragged
    # tail of columns differently in the last bit, and padding makes each target's numbers
    # independent of how the targets were split into chunks.
    pad = (-m) % _PAD if m else 0
    if pad:
        xy_new = np.vstack([xy_new, np.repeat(xy_new[-1:], pad, axis=0)])
        design_new = np.vstack([design_new, np.repeat(design_new[-1:], pad, axis=0)])
    dist = _dist_f(basis, xy_new)
    buf = np.empty(dist.shape, order="F")
    mean = design_new @ basis.beta.T  # (m, D)
    mean = np.ascontiguousarray(mean.T)
    var = np.empty((basis.n_draws, m + pad))
    for k in range(basis.n_draws):
        _cross_cov(basis, _at(basis, dist, xy_new, k), k, buf)
        mean[k] += basis.alpha[k] @ buf
        v = blas.dtrsm(1.0, basis.chol[k], buf, side=0, lower=1, trans_a=0, diag=0, overwrite_b=1)
        total = basis.partial_sill[k] + (basis.nugget[k] if include_nugget else 0.0)
        var[k] = np.maximum(total - np.einsum("ij,ij->j", v, v), 0.0)
    return mean[:, :m], var[:, :m]


def residual_means(basis: KrigingBasis, xy_new, resid, *, chunk: int = 4096) -> np.ndarray:
    """Simple-kriging means ``k_*^T K^-1 r`` of residual vectors at new locations, several per draw.

    The mean part of :func:`draw_moments` without the trend, for data residuals ``r`` other than the
    basis's own (conditioning by kriging, :mod:`bayesgeo.gp.joint`): ``resid`` (D, S, n) gives S vectors
    per draw; K^-1 r uses the basis's Cholesky factors, the cross-covariances are built ``chunk`` targets
    at a time. Returns (D, S, m) in model units.
    """
    _needs_factors(basis, "kriging with every datum")
    xy_new = np.asarray(xy_new, dtype=float).reshape(-1, 2)
    resid = np.asarray(resid, dtype=float)
    m = xy_new.shape[0]
    alpha = np.stack([linalg.cho_solve((basis.chol[k], True), resid[k].T, check_finite=False).T
                      for k in range(basis.n_draws)])
    out = np.empty((basis.n_draws, resid.shape[1], m))
    for lo in range(0, m, chunk):
        dist = _dist_f(basis, xy_new[lo:lo + chunk])
        buf = np.empty(dist.shape, order="F")
        for k in range(basis.n_draws):
            out[k, :, lo:lo + chunk] = alpha[k] @ _cross_cov(basis, _at(basis, dist, xy_new[lo:lo + chunk], k), k, buf)
    return out


def kriging_moments(xy_obs, y_obs, design_obs, xy_new, design_new, covariance: Covariance | str, scale: float,
          partial_sill: float, nugget: float, beta, metric: str = "euclidean", *, include_nugget: bool = True,
          full_cov: bool = False, jitter: float = JITTER):
    """Simple kriging with a known trend: conditional mean and variance of one parameter set.

    Parameters
    ----------
    xy_obs, y_obs, design_obs : arrays (n, 2), (n,), (n, p)
        Data locations, values and trend design.
    xy_new, design_new : arrays (m, 2), (m, p)
        Targets and their trend design.
    covariance : Covariance or str
    scale, partial_sill, nugget : float
        phi (distance units), sigma2 and tau2 (squared value units).
    beta : array (p,)
    metric : {"euclidean", "greatcircle"}
    include_nugget : bool
        Report the variance of a new measurement (field + nugget, default) or of the field.
    full_cov : bool
        Return the (m, m) conditional covariance instead of the variances.

    Returns
    -------
    mean : ndarray (m,)
    var : ndarray (m,) or cov : ndarray (m, m)
    """
    basis = make_basis(xy_obs, y_obs, design_obs, covariance=covariance, scale=scale, partial_sill=partial_sill,
                       nugget=nugget, beta=beta, metric=metric, jitter=jitter)
    if not full_cov:
        mean, var = draw_moments(basis, xy_new, design_new, include_nugget=include_nugget)
        return mean[0], var[0]
    mean, cov = _joint_moments(basis, 0, np.asarray(xy_new, float), np.asarray(design_new, float), include_nugget)
    return mean, cov


def _needs_factors(basis: KrigingBasis, what: str) -> None:
    """Joint quantities need the exact factors, which a nearest-neighbour basis does not hold."""
    if not basis.chol:
        raise InputError(f"{what} needs the exact dense kriging system; this fit uses the nearest-neighbour "
                         "approximation (large data): map points and grids only, or refit with --approx dense")


def _joint_moments(basis: KrigingBasis, k: int, xy_new, design_new, include_nugget: bool):
    """Conditional mean (m,) and covariance (m, m) for draw ``k``."""
    _needs_factors(basis, "joint conditional simulation (--simulate)")
    dist = _dist_f(basis, xy_new, k)
    cross = _cross_cov(basis, dist, k, np.empty(dist.shape, order="F"))
    mean = design_new.reshape(len(xy_new), -1) @ basis.beta[k] + basis.alpha[k] @ cross
    v = linalg.solve_triangular(basis.chol[k], cross, lower=True, check_finite=False)
    dpp = distance_matrix(draw_xy(basis, xy_new, k), basis.metric)
    prior = basis.partial_sill[k] * basis.covariance.correlation(dpp, basis.scale[k])
    cov = prior - v.T @ v
    if include_nugget:
        cov[np.diag_indices_from(cov)] += basis.nugget[k]
    return mean, 0.5 * (cov + cov.T)


# --- combining draws --------------------------------------------------------------------------


def _ndtr_ratio(num, sd):
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return special.ndtr(num / np.maximum(sd, _TINY))


def mixture_quantiles(mu, sd, probs: Sequence[float], *, iterations: int = 20) -> np.ndarray:
    """Quantiles of the equal-weight Gaussian mixture over draws, per cell.

    Solves mean_d Phi((q - mu_d) / sd_d) = p by vectorised bisection on the bracket
    [min_d(mu_d - 10 sd_d), max_d(mu_d + 10 sd_d)], then one linear-interpolation step.

    Parameters
    ----------
    mu, sd : array (D, m)
    probs : sequence of float in (0, 1)

    Returns
    -------
    ndarray (len(probs), m)
    """
    mu = np.asarray(mu, dtype=float)
    sd = np.asarray(sd, dtype=float)
    p = np.asarray(probs, dtype=float)[:, None]
    lo = np.broadcast_to((mu - 10.0 * sd).min(axis=0), (p.shape[0], mu.shape[1])).copy()
    hi = np.broadcast_to((mu + 10.0 * sd).max(axis=0), lo.shape).copy()

    def cdf(q):
        return _ndtr_ratio(q[:, None, :] - mu[None], sd[None]).mean(axis=1)

    f_lo, f_hi = cdf(lo), cdf(hi)
    for _ in range(iterations):
        mid = 0.5 * (lo + hi)
        f_mid = cdf(mid)
        below = f_mid < p
        lo = np.where(below, mid, lo)
        f_lo = np.where(below, f_mid, f_lo)
        hi = np.where(below, hi, mid)
        f_hi = np.where(below, f_hi, f_mid)
    span = f_hi - f_lo
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(span > 0, (p - f_lo) / span, 0.5)
    return lo + np.clip(w, 0.0, 1.0) * (hi - lo)


def mixture_summary(mean, var, *, thresholds: Sequence[float] = (), transform: str | None = None,
                    probs: Sequence[float] = (0.05, 0.5, 0.95)) -> dict[str, np.ndarray]:
    """Predictive mean, sd, quantiles and exceedance probabilities of the mixture over draws.

    Parameters
    ----------
    mean, var : array (D, m)
        Per-draw Gaussian moments on the model scale (log scale under ``transform="log"``).
    thresholds : sequence of float
        Levels T in data units; ``p_exceed`` = mean_d P(Z > T | draw d).
    transform : {None, "log"}
        Under ``"log"`` each draw is log-normal in data units (mean exp(mu + v / 2), variance
        (exp(v) - 1) exp(2 mu + v)); quantiles are exp of the log-scale mixture quantiles.
    probs : sequence of float
        Quantile levels.

    Returns
    -------
    dict
        ``mean``, ``sd`` (m,), ``quantiles`` (P, m), ``p_exceed`` (T, m), all in data units.
    """
    mu = np.asarray(mean, dtype=float)
    var = np.maximum(np.asarray(var, dtype=float), 0.0)
    sd = np.sqrt(var)
    thr = np.asarray(thresholds, dtype=float).reshape(-1)
    if transform == "log":
        if np.any(thr <= 0):
            raise InputError(f"thresholds: under the log transform thresholds must be positive, got {thr.tolist()}")
        m1 = np.exp(mu + 0.5 * var)
        pm = m1.mean(axis=0)
        second = (np.exp(var) * m1 * m1).mean(axis=0)
        pvar = np.maximum(second - pm * pm, 0.0)
        q = np.exp(mixture_quantiles(mu, sd, probs))
        levels = np.log(thr)
    elif transform is None:
        pm = mu.mean(axis=0)
        pvar = np.maximum((var + mu * mu).mean(axis=0) - pm * pm, 0.0)
        q = mixture_quantiles(mu, sd, probs)
        levels = thr
    else:
        raise ValueError(f"transform must be None or 'log', got {transform!r}")
    pex = np.stack([_ndtr_ratio(mu - t, sd).mean(axis=0) for t in levels]) if levels.size else np.empty((0, mu.shape[1]))
    return {"mean": pm, "sd": np.sqrt(pvar), "quantiles": q, "p_exceed": pex}
