"""Maximum-likelihood quick fits of large data with the nearest-neighbour (Vecchia) likelihood.

The dense quick fit (:func:`bayesgeo.explore.quickfit.fit_ml`) builds n x n matrices and costs about n^3 / 3
flops per evaluation: at 2,000 points five families took half a minute here, at 3,000 about eight minutes
under load. Above :data:`NN_ML_POINTS` points :func:`fit_ml_nn` maximises the Vecchia approximation of the
same likelihood instead (Vecchia 1988; Datta et al. 2016; the engine of ``fit --approx nn``,
:mod:`bayesgeo.gp.nn`): O(n m^3) per evaluation, analytic gradient, no n x n matrix.

Method, on the quick fit's standardised scale (coordinates centred and divided by the largest distance L,
values centred and divided by their sd s):

1. ordering and neighbour sets once (maximin order, :data:`QUICK_NEIGHBOURS` nearest earlier points);
2. the trend by ordinary least squares, then (log tau2, log sigma2, log phi) by L-BFGS-B on the Vecchia
   log-likelihood of the residuals, from the best of the dense fit's starting points (and the WLS fit when
   given), as :func:`bayesgeo.explore.quickfit.fit_ml` chooses them;
3. the trend again by generalised least squares in the Vecchia model (each row whitened,
   e_i = (r_i - b_i^T r_N(i)) / sqrt(f_i), :func:`bayesgeo.gp.nn_simulate.nn_factors`), and step 2 again from
   the last optimum, until the coefficients settle (at most :data:`ROUNDS` rounds): the optimum of the
   profile likelihood, as the dense fit's (equal to it when every earlier point is a neighbour, tested).

The reported log-likelihood is the Vecchia one in data units. A screening estimate like the dense one: the
Bayesian fit (``fit --approx nn``) gives the uncertainty.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import xarray as xr
from scipy import optimize

from bayesgeo.common.geometry import metric_of
from bayesgeo.common.validate import InputError
from bayesgeo.explore.wls import _at_bound, _design, _resolve, _single_site, search_space

__all__ = ["NN_ML_POINTS", "QUICK_NEIGHBOURS", "fit_ml_nn"]

#: Above this many points the ML quick fits use the nearest-neighbour likelihood.
NN_ML_POINTS = 1000
#: Conditioning points per point of the quick fits' nearest-neighbour likelihood.
QUICK_NEIGHBOURS = 15
#: Most alternations of covariance fit and GLS trend.
ROUNDS = 6


def _whiten(v: np.ndarray, fac) -> np.ndarray:
    """(v_i - b_i^T v_N(i)) / sqrt(f_i) for each column of ``v`` (n, k): the Vecchia model's innovations."""
    nbr = fac.nbr
    valid = nbr >= 0
    taken = v[np.where(valid, nbr, 0)]  # (n, m, k)
    pred = np.einsum("nm,nmk->nk", np.where(valid, fac.b, 0.0), taken)
    return (v - pred) / np.sqrt(fac.f)[:, None]


def fit_ml_nn(ds: xr.Dataset, covariance: str, *, trend: int = 0, covariates: Sequence[str] = (),
              nugget: bool = True, nu: float | None = None, start: dict | None = None,
              neighbours: int | None = None) -> dict:
    """Maximum-likelihood fit with the nearest-neighbour likelihood (module docstring).

    Parameters and returns as :func:`bayesgeo.explore.quickfit.fit_ml` (``method`` is ``"ml"``; ``likelihood``
    says ``nearest-neighbour, m = ...``); ``neighbours`` is m (default :data:`QUICK_NEIGHBOURS`).
    """
    from bayesgeo.common.pairs import max_pair_distance
    from bayesgeo.gp.covariance import kernel_code
    from bayesgeo.gp.nn import maximin_order, nearest_previous, nn_loglik_and_grad
    from bayesgeo.gp.nn_simulate import nn_factors

    cov = _resolve(covariance, nu)
    if kernel_code(cov.name) is None:
        raise InputError(f"covariance: {cov.name!r} has no nearest-neighbour kernel; the quick fit of large data "
                         "covers the closed-form families")
    _single_site(ds)
    n = int(ds.sizes["obs"])
    metric = metric_of(ds)
    xy = np.column_stack([ds["x"].values, ds["y"].values]).astype(float)
    if metric == "euclidean":
        xy = xy - xy.mean(axis=0)
    length = max_pair_distance(xy[:, 0], xy[:, 1], group=np.zeros(n, dtype=np.int64),
                               greatcircle=metric == "greatcircle")
    if not length > 0:
        raise InputError("all points share one location; distances are all zero")
    y = np.asarray(ds["value"].values, dtype=float)
    xmat, terms = _design(ds, trend, covariates)
    centre, s = float(y.mean()), float(np.std(y))
    if not s > 0:
        raise InputError("every value is the same; nothing varies to fit")
    z = (y - centre) / s
    order = maximin_order(xy, metric=metric)
    m = max(1, min(int(QUICK_NEIGHBOURS if neighbours is None else neighbours), n - 1))
    nbr = nearest_previous(xy, order, neighbours=m, metric=metric)
    kw = dict(nbr=nbr, metric=metric, distance_scale=length)

    def objective(theta, resid):
        tau = math.exp(theta[0]) if nugget else 0.0
        sig, phi = math.exp(theta[-2]), math.exp(theta[-1])
        ll, _, g_phi, g_s2, g_t2 = nn_loglik_and_grad(resid, xy, cov, phi, sig, tau, **kw)
        if not math.isfinite(ll):
            return 1e25, np.zeros_like(theta)
        g = [sig * g_s2, phi * g_phi]
        if nugget:
            g.insert(0, tau * g_t2)
        return -ll, -np.asarray(g)

    names, lo, hi, starts = search_space(cov, nugget, start, s, length)
    coef, *_ = np.linalg.lstsq(xmat, z, rcond=None)
    candidates = [(objective(x, z - xmat @ coef)[0], k, x) for k, x in enumerate(starts) if np.all(np.isfinite(x))]
    x0 = min(candidates, key=lambda c: (c[0], c[1]))[2]
    best = None
    for _ in range(ROUNDS):  # OLS trend, then the GLS trend of the Vecchia model at each optimum
        resid = z - xmat @ coef
        best = optimize.minimize(objective, x0, args=(resid,), jac=True, method="L-BFGS-B",
                                 bounds=list(zip(lo, hi)), options={"maxiter": 300, "ftol": 1e-10, "gtol": 1e-6})
        x0 = best.x
        tau = math.exp(best.x[0]) if nugget else 0.0
        fac = nn_factors(xy, cov, math.exp(best.x[-1]), math.exp(best.x[-2]), tau, order=order, **kw)
        new, *_ = np.linalg.lstsq(_whiten(xmat, fac), _whiten(z[:, None], fac)[:, 0], rcond=None)
        settled = np.max(np.abs(new - coef)) < 1e-7 * (1.0 + np.max(np.abs(coef)))
        coef = new
        if settled:
            break
    tau = math.exp(best.x[0]) if nugget else 0.0
    sig, phi = math.exp(best.x[-2]), math.exp(best.x[-1])
    ll_std = -float(best.fun)
    beta = coef * s
    if "1" in terms:
        beta[terms.index("1")] += centre
    return {
        "method": "ml", "covariance": cov.name, "nu": cov.nu, "nugget": tau * s**2, "partial_sill": sig * s**2,
        "practical_range": float(cov.practical_range(phi * length)), "scale": phi * length,
        "objective": -(ll_std - n * math.log(s)), "loglik": ll_std - n * math.log(s),
        "beta": dict(zip(terms, map(float, beta))), "n": n, "converged": bool(best.success),
        "at_bound": _at_bound(best.x, lo, hi, names), "likelihood": f"nearest-neighbour, m = {m}",
    }
