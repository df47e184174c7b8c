"""Gaussian-process marginal log-likelihood with the latent field integrated out.

    y = X beta + w + e,   w ~ GP(0, sigma2 rho(d / phi)),   e ~ N(0, tau2 I)
    log p(y | beta, phi, sigma2, tau2) = log N(r | 0, K),   r = y - X beta,
    K = sigma2 R(phi) + (tau2 + jitter) I.

Jitter policy: ``JITTER`` times the partial sill is added to the diagonal, so that a model
without nugget (or a Gaussian covariance, whose matrices are nearly singular) still factorises;
on the standardised scale used by the model this is about 1e-6 of the data variance.

Two implementations share this definition: :func:`loglik_numpy` (plain NumPy/SciPy, used by the
quick maximum-likelihood fits and as a test reference) and :func:`marginal_loglik` (a PyTensor
scalar for the PyMC model).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import linalg

from bayesgeo.covariance import Covariance

__all__ = ["JITTER", "loglik_numpy", "marginal_loglik", "covariance_matrix"]

#: Relative jitter added to the diagonal (times the partial sill).
JITTER = 1e-6

_LOG2PI = math.log(2.0 * math.pi)


def covariance_matrix(dist: np.ndarray, covariance: Covariance, scale: float, partial_sill: float,
                      nugget: float) -> np.ndarray:
    """K = sigma2 R(dist / scale) + (tau2 + JITTER sigma2) I for a square distance matrix."""
    k = partial_sill * covariance.correlation(dist, scale)
    k[np.diag_indices_from(k)] += nugget + JITTER * partial_sill
    return k


def loglik_numpy(resid: np.ndarray, dist: np.ndarray, covariance: Covariance, scale: float,
                 partial_sill: float, nugget: float) -> float:
    """log N(resid | 0, K) with K from :func:`covariance_matrix`; ``-inf`` if K is not positive definite."""
    k = covariance_matrix(dist, covariance, scale, partial_sill, nugget)
    try:
        c, low = linalg.cho_factor(k, lower=True, check_finite=False)
    except linalg.LinAlgError:
        return -math.inf
    alpha = linalg.cho_solve((c, low), resid, check_finite=False)
    logdet = 2.0 * np.sum(np.log(np.diag(c)))
    return float(-0.5 * (resid @ alpha + logdet + len(resid) * _LOG2PI))


def marginal_loglik(resid, dist: np.ndarray, covariance: Covariance, scale, partial_sill, nugget):
    """PyTensor scalar log N(resid | 0, K).

    Parameters
    ----------
    resid : TensorVariable, shape (n,)
        Data minus trend, on the model's (standardised) scale.
    dist : ndarray, shape (n, n)
        Distances between the observation sites (a constant of the model).
    covariance : Covariance
        Family from :func:`bayesgeo.covariance.get_covariance`.
    scale, partial_sill, nugget : TensorVariable
        Scalars: scale parameter phi (distance units of ``dist``), sigma2 and tau2.

    Notes
    -----
    Reference implementation through ``pt.linalg.cholesky`` and automatic differentiation.
    """
    import pytensor.tensor as pt

    n = dist.shape[0]
    k = partial_sill * covariance.pt_correlation(pt.as_tensor(dist), scale)
    k = k + (nugget + JITTER * partial_sill) * pt.eye(n)
    chol = pt.linalg.cholesky(k, lower=True)
    z = pt.linalg.solve_triangular(chol, resid, lower=True)
    logdet = 2.0 * pt.sum(pt.log(pt.diag(chol)))
    return -0.5 * (pt.dot(z, z) + logdet + n * _LOG2PI)
