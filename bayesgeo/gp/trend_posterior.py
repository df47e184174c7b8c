"""The trend coefficients integrated out of the dense likelihood, and drawn back afterwards.

With ``y = F beta + w + e`` on the model's standardised scale, ``beta ~ N(0, b^2 I)`` and
``w + e ~ N(0, K)``, the coefficients can be integrated out exactly:

    y | theta ~ N(0, K + b^2 F F^T)                                          (1)

and, given the covariance parameters theta, their conditional posterior is Gaussian:

    beta | y, theta ~ N(m, V),  V = (F^T K^-1 F + I / b^2)^-1,  m = V F^T K^-1 y   (2)

(Rasmussen and Williams 2006, *Gaussian Processes for Machine Learning*, sec. 2.7, eqs. 2.41-2.42
in the limit of their prior mean 0; Gelman et al., BDA3, sec. 14.2). The sampler then explores only
theta, with the likelihood (1) (:func:`bayesgeo.gp.dense.marginal_loglik` with ``extra``), and
each posterior draw of theta gets one exact draw of beta from (2): the pairs are draws from the
joint posterior of the model in docs/model.md, unchanged. Measured in bench/bench_convergence.py
(docs/model.md, "Parametrisation").
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np
import xarray as xr
from scipy import linalg

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.gp.dense import solve_covariance

__all__ = ["draw_trend", "trend_prior_covariance"]


def trend_prior_covariance(design: np.ndarray, beta_sd: float) -> np.ndarray:
    """``b^2 F F^T``: the covariance the trend adds to the data when ``beta ~ N(0, b^2 I)`` (eq. 1).

    Parameters
    ----------
    design : ndarray, shape (n, p)
        Trend design matrix F (centred and scaled columns, :func:`bayesgeo.explore.trend.design_matrix`).
    beta_sd : float
        Prior sd b of every standardised coefficient (units of the standardised values).
    """
    f = np.asarray(design, dtype=float)
    return float(beta_sd) ** 2 * (f @ f.T)


def _one(y, f, dist, cov, scale, s2, t2, inv_b2, e):
    """m + L_P^-T e for one theta: an exact draw from N(m, V) of eq. (2), V = P^-1, P = L_P L_P^T."""
    sol = solve_covariance(dist, cov, scale, s2, t2, np.column_stack([f, y]))  # K^-1 [F | y]
    prec = f.T @ sol[:, :-1] + inv_b2 * np.eye(f.shape[1])
    prec = 0.5 * (prec + prec.T)
    lp = linalg.cholesky(prec, lower=True, check_finite=False)
    m = linalg.cho_solve((lp, True), f.T @ sol[:, -1], check_finite=False)
    return m + linalg.solve_triangular(lp, e, lower=True, trans="T", check_finite=False)


def draw_trend(posterior: xr.Dataset, spec, y: np.ndarray, design: np.ndarray, dist: np.ndarray, *,
               seed, workers: int = 2, xy: np.ndarray | None = None) -> xr.DataArray:
    """One draw of ``beta_z`` from its exact conditional posterior (eq. 2) per posterior draw.

    Parameters
    ----------
    posterior : xarray.Dataset
        Draws (chain, draw) of ``practical_range_z``, ``sd_z`` and, with a nugget, ``nugget_sd_z``.
    spec : FitSpec
        The fit's settings (covariance family, range factor, prior sd of the coefficients).
    y : ndarray, shape (n,) or (chain * draw, n)
        Standardised values the model was fitted to; one row per posterior draw (chain-major) when they
        differ between draws (non-detects imputed draw by draw).
    design : ndarray, shape (n, p)
        Trend design matrix.
    dist : ndarray, shape (n, n)
        Distances divided by ``spec.distance_scale``.
    xy : ndarray, shape (n, 2), optional
        Coordinates divided by ``spec.distance_scale``; with ``anisotropy_z`` in the posterior (an anisotropic
        fit) each draw's distances are the anisotropic ones of its own angle and ratio, and ``dist`` is unused.
    seed : int, sequence of int or None
        Seed (``numpy.random.default_rng``) of the standard normal draws: the same posterior and seed give the same coefficients
        whatever ``workers`` is (the normals are drawn up front, in draw order).
    workers : int
        Threads (the factorisations release the GIL).

    Returns
    -------
    xarray.DataArray
        ``beta_z`` along (chain, draw, term).
    """
    cov = get_covariance(spec.covariance, spec.nu if spec.covariance == "matern" else None)
    f = np.ascontiguousarray(design, dtype=float)
    y = np.asarray(y, dtype=float)
    pr = np.asarray(posterior["practical_range_z"].transpose("chain", "draw").values, dtype=float)
    s2 = np.asarray(posterior["sd_z"].transpose("chain", "draw").values, dtype=float) ** 2
    t2 = (np.asarray(posterior["nugget_sd_z"].transpose("chain", "draw").values, dtype=float) ** 2
          if spec.nugget else np.zeros_like(pr))
    shape, p = pr.shape, f.shape[1]
    normals = np.random.default_rng(seed).standard_normal((pr.size, p))
    flat = [(pr.flat[i] / spec.range_factor, s2.flat[i], t2.flat[i]) for i in range(pr.size)]
    inv_b2 = 1.0 / spec.priors.beta_sd**2

    angle = ratio = None
    if "anisotropy_z" in posterior:
        from bayesgeo.gp.anisotropy import angle_ratio, anisotropic_distance

        angle, ratio = angle_ratio(posterior["anisotropy_z"].transpose("chain", "draw", ...).values.reshape(-1, 2))

    def run(i):
        d = dist if angle is None else anisotropic_distance(xy, xy, angle[i], ratio[i])
        return _one(y if y.ndim == 1 else y[i], f, d, cov, *flat[i], inv_b2, normals[i])

    if workers > 1 and pr.size > 1:
        with ThreadPoolExecutor(max_workers=workers) as pool:
            out = np.array(list(pool.map(run, range(pr.size))))
    else:
        out = np.array([run(i) for i in range(pr.size)])
    return xr.DataArray(out.reshape(shape + (p,)), dims=("chain", "draw", "term"),
                        coords={"chain": posterior["chain"].values, "draw": posterior["draw"].values,
                                "term": list(spec.terms)})
