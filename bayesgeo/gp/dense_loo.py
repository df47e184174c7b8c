"""Exact Gaussian leave-one-out of the dense engine: the NumPy kernel and the draws' covariance matrices.

For one draw of the parameters, with ``y ~ N(mu, C)``, leaving point ``i`` out and conditioning on
the other ``n - 1`` points gives a normal predictive whose mean and variance follow from ``C^-1``
alone, with no refit (Sundararajan and Keerthi 2001, Neural Computation 13, 1103-1118; Rasmussen
and Williams 2006, *Gaussian Processes for Machine Learning*, sec. 5.4.2, eq. 5.12); the formulas
and units are set out in :mod:`bayesgeo.checks.loo`, which builds the results of a fit from here.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack

from bayesgeo.common.defaults import LOG_2PI as _LOG2PI
from bayesgeo.gp.covariance import get_covariance

__all__ = ["gp_loo", "draw_covariances"]


def gp_loo(resid: np.ndarray, cov: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact leave-one-out normal predictives of a zero-mean Gaussian vector.

    Parameters
    ----------
    resid : ndarray, shape (..., n)
        ``y - mu`` for each draw (any leading dimensions).
    cov : ndarray, shape (..., n, n)
        The covariance ``C`` of each draw, symmetric positive definite.

    Returns
    -------
    mean : ndarray (..., n)
        ``E[resid_i | resid_-i] = resid_i - g_i / c_i`` (add ``mu_i`` for the value).
    var : ndarray (..., n)
        ``Var[resid_i | resid_-i] = 1 / c_i``.
    logp : ndarray (..., n)
        ``log p(resid_i | resid_-i)``; ``-inf`` for every point of a draw whose ``C`` is not
        positive definite.

    Notes
    -----
    Sundararajan and Keerthi (2001); Rasmussen and Williams (2006), eq. 5.12.
    """
    resid = np.asarray(resid, dtype=float)
    cov = np.asarray(cov, dtype=float)
    n = resid.shape[-1]
    if cov.shape[-2:] != (n, n) or cov.shape[:-2] != resid.shape[:-1]:
        raise ValueError(f"cov must have shape {resid.shape[:-1] + (n, n)}, got {cov.shape}")
    lead = resid.shape[:-1]
    r2 = resid.reshape(-1, n)
    c2 = cov.reshape(-1, n, n)
    mean = np.empty_like(r2)
    var = np.empty_like(r2)
    logp = np.empty_like(r2)
    for k in range(r2.shape[0]):
        mean[k], var[k], logp[k] = _loo_one(r2[k], c2[k])
    return mean.reshape(lead + (n,)), var.reshape(lead + (n,)), logp.reshape(lead + (n,))


def _loo_one(r: np.ndarray, c: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One draw: factor C, solve for g, invert for the diagonal of C^-1."""
    factor, info = lapack.dpotrf(c, lower=1, clean=1, overwrite_a=0)
    if info != 0:
        nan = np.full(r.shape, np.nan)
        return nan, nan, np.full(r.shape, -np.inf)
    # C^-1 = L^-T L^-1: the diagonal is the column sums of squares of L^-1 (LAPACK dtrtri, n^3 / 3
    # flops, half the cost of the full inverse), and g = L^-T (L^-1 r).
    linv, info = lapack.dtrtri(factor, lower=1)
    if info != 0:
        nan = np.full(r.shape, np.nan)
        return nan, nan, np.full(r.shape, -np.inf)
    linv = np.tril(linv)
    cii = np.einsum("ki,ki->i", linv, linv)
    g = linv.T @ (linv @ r)
    mean = r - g / cii
    var = 1.0 / cii
    logp = -0.5 * _LOG2PI + 0.5 * np.log(cii) - 0.5 * g * g / cii
    return mean, var, logp


def draw_covariances(fa, index: np.ndarray | None = None):
    """Yield ``(flat_index, mean, cov)`` on the standardised scale for posterior draws.

    ``fa`` is the fit as arrays (:class:`bayesgeo.fitting.arrays.FitArrays`: ``spec``, ``draws``,
    ``dist``, ``design``); ``index`` selects flat (chain-major) draw indices, all draws by default.
    """
    from bayesgeo.gp.dense import covariance_matrix  # PyTensor/Numba load only when needed

    spec = fa.spec
    cov = get_covariance(spec.covariance, spec.nu if spec.covariance == "matern" else None)
    rng_ = fa.draws["practical_range_z"].reshape(-1)
    sd = fa.draws["sd_z"].reshape(-1)
    tau = fa.draws["nugget_sd_z"].reshape(-1)
    beta = fa.draws["beta_z"].reshape(rng_.size, -1)
    aniso = None
    if "anisotropy_z" in fa.draws:  # each draw's own anisotropic distances (bayesgeo.gp.anisotropy)
        from bayesgeo.gp.anisotropy import angle_ratio, anisotropic_distance

        aniso = angle_ratio(fa.draws["anisotropy_z"].reshape(rng_.size, 2))
    for k in (range(rng_.size) if index is None else index):
        scale = rng_[k] / fa.spec.range_factor
        dist = (fa.dist if aniso is None
                else anisotropic_distance(fa.xy, fa.xy, aniso[0][k], aniso[1][k]) / spec.distance_scale)
        c = covariance_matrix(dist, cov, scale, sd[k] ** 2, tau[k] ** 2)
        yield int(k), fa.design @ beta[k], c


