"""Quick (non-Bayesian) covariance fits: screening estimates and starting values.

Two classical estimators of the nugget tau2, partial sill sigma2 and scale phi of an isotropic
covariance family (see :mod:`bayesgeo.gp.covariance` for the parameterisation):

* :func:`bayesgeo.explore.wls.fit_wls` - weighted least squares of the model semivariogram to an empirical one,
  with Cressie's (1985) weights N(h) / gamma(h; theta)^2, i.e. it minimises

      sum_j N(h_j) [gamma_hat(h_j) / gamma(h_j; theta) - 1]^2

  with the *model* value in the denominator (the criterion is dimensionless);
* :func:`fit_ml` - maximum likelihood on the Gaussian likelihood, the trend coefficients profiled
  out by generalised least squares (plain ML, not REML; ML under-estimates the sill slightly when
  a trend is estimated, Mardia and Marshall 1984).

Both optimise log parameters under bounds with SciPy on standardised data (coordinates centred
and divided by a length, values divided by their standard deviation) and report in data units.
Both are deterministic: fixed starting points, no random restarts.

These fits assume a stationary, isotropic field. They are screening estimates, not inference:
their uncertainty is what the Bayesian model is for.

References
----------
Cressie, N. (1985). Fitting variogram models by weighted least squares. *Mathematical Geology*
17, 563-586.
Mardia, K. V. and Marshall, R. J. (1984). Maximum likelihood estimation of models for residual
covariance in spatial regression. *Biometrika* 71, 135-146.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import xarray as xr
from scipy import linalg, optimize

from bayesgeo.gp.covariance import FAMILIES, Covariance
from bayesgeo.common.geometry import distance_matrix, metric_of
from bayesgeo.common.validate import InputError
from bayesgeo.common.defaults import LOG_2PI as _LOG2PI
from bayesgeo.explore.wls import _at_bound, _design, _resolve, _single_site, fit_wls, search_space

__all__ = ["MAX_DENSE_POINTS", "QUICK_FAMILIES", "fit_ml", "quick_fits"]

#: Largest number of points :func:`fit_ml` accepts (dense n x n matrices: 3,000 points take
#: 72 MB per matrix and about a second per likelihood evaluation on one core).
MAX_DENSE_POINTS = 3000

#: Families fitted by :func:`quick_fits` by default (the general Matérn needs its nu chosen).
QUICK_FAMILIES: tuple[str, ...] = tuple(f for f in FAMILIES if f != "matern")

# --- maximum likelihood -----------------------------------------------------------------------


def _gls_basis(xmat: np.ndarray) -> np.ndarray:
    """Orthonormal basis of the column space of the design (equilibrated columns), rank-checked."""
    norms = np.linalg.norm(xmat, axis=0)
    norms[norms == 0] = 1.0
    q, r = np.linalg.qr(xmat / norms)
    d = np.abs(np.diag(r))
    if d.size and d.min() < 1e-10 * d.max():
        raise InputError(f"the trend design ({xmat.shape[1]} terms) is rank-deficient on these "
                         f"{xmat.shape[0]} points; lower the trend order or drop a covariate")
    return q


def _lower_inverse(low: np.ndarray) -> np.ndarray:
    """Lower triangle (upper zeroed) of K^-1 from the lower Cholesky factor (LAPACK dpotri,
    about a third of the work of cho_solve with the identity)."""
    inv, info = linalg.lapack.dpotri(low, lower=1, overwrite_c=1)
    if info != 0:
        raise linalg.LinAlgError(f"dpotri failed with info={info}")
    return np.tril(inv)


def _trace_product(low_inv: np.ndarray, sym: np.ndarray) -> float:
    """tr(K^-1 S) = sum(K^-1 * S) for symmetric S, from the lower triangle of K^-1 only."""
    return float(2.0 * np.vdot(low_inv, sym) - np.dot(np.diag(low_inv), np.diag(sym)))


class _ProfileLik:
    """Profile log-likelihood (trend by GLS) and its gradient in (log tau2, log sigma2, log phi)."""

    def __init__(self, z, dist, basis, cov, nugget):
        self.z, self.dist, self.q, self.cov, self.nugget = z, dist, basis, cov, nugget
        self.n = len(z)
        # bayesgeo.gp.dense imports PyTensor (about 1 s); import it only when a fit runs, so
        # `import bayesgeo` and the exploratory command stay quick.
        from bayesgeo.common.defaults import JITTER

        self.jitter = JITTER

    def params(self, theta):
        tau = math.exp(theta[0]) if self.nugget else 0.0
        return tau, math.exp(theta[-2]), math.exp(theta[-1])

    def __call__(self, theta, grad: bool = True):
        tau, sig, phi = self.params(theta)
        rho = self.cov.correlation(self.dist, phi)
        rho[np.diag_indices_from(rho)] += self.jitter
        k = sig * rho  # = likelihood.covariance_matrix(dist, cov, phi, sig, tau), sharing rho
        k[np.diag_indices_from(k)] += tau
        try:
            c = linalg.cho_factor(k, lower=True, overwrite_a=True, check_finite=False)
        except linalg.LinAlgError:
            return (1e25, np.zeros_like(theta)) if grad else -math.inf
        kq = linalg.cho_solve(c, self.q, check_finite=False)
        kz = linalg.cho_solve(c, self.z, check_finite=False)
        beta = np.linalg.solve(self.q.T @ kq, self.q.T @ kz)
        alpha = kz - kq @ beta  # K^-1 (z - Q beta)
        r = self.z - self.q @ beta
        logdet = 2.0 * np.sum(np.log(np.diag(c[0])))
        ll = -0.5 * (r @ alpha + logdet + self.n * _LOG2PI)
        if not grad:
            return ll
        # d ll / d theta_i = 0.5 [alpha' S_i alpha - tr(K^-1 S_i)] with S_i = dK/dtheta_i; beta is
        # at its optimum, so its own derivative drops out (envelope theorem).
        kinv = _lower_inverse(c[0])
        dphi = self.cov.correlation_dlogscale(self.dist, phi)
        g = [0.5 * sig * (alpha @ (rho @ alpha) - _trace_product(kinv, rho)),
             0.5 * sig * (alpha @ (dphi @ alpha) - _trace_product(kinv, dphi))]
        if self.nugget:
            g.insert(0, 0.5 * tau * (alpha @ alpha - np.trace(kinv)))
        return -ll, -np.asarray(g)


def fit_ml(ds: xr.Dataset, covariance: str | Covariance, *, trend: int = 0, covariates: Sequence[str] = (),
           nugget: bool = True, nu: float | None = None, start: dict | None = None) -> dict:
    """Maximum-likelihood fit of a Gaussian field with a polynomial trend.

    Model: value = X beta + w + e with w a zero-mean field of the given covariance family
    (partial sill sigma2, scale phi) and e independent noise of variance tau2 (nugget). The trend
    coefficients beta are profiled out by generalised least squares, so the optimiser sees only
    (tau2, sigma2, phi). This is plain maximum likelihood, not REML.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data along ``obs`` (see :func:`bayesgeo.data.points.read_points`) from one site.
    covariance : str or Covariance
        Family name or object.
    trend : int, default 0
        Polynomial order of the trend in the coordinates (0: constant mean).
    covariates : sequence of str
        Data variables added to the trend design.
    nugget : bool, default True
        Fit a nugget; if False it is fixed at zero (a relative jitter of
        :data:`bayesgeo.gp.dense.JITTER` times sigma2 stays on the diagonal).
    nu : float, optional
        Smoothness, for ``"matern"`` only.
    start : dict, optional
        Starting ``nugget``, ``partial_sill`` and ``practical_range`` in data units (e.g. a
        :func:`fit_wls` result), a candidate start besides the default one (see Notes).

    Returns
    -------
    dict
        As :func:`fit_wls` (``objective`` is minus the log-likelihood) plus ``loglik`` (maximum
        log-likelihood of the data in data units), ``beta`` ({term: GLS coefficient}, value
        units, for the scaled columns of :func:`bayesgeo.explore.trend.design_matrix`) and ``n``.

    Notes
    -----
    Standardisation: distances divided by the largest inter-point distance L, values divided
    by their standard deviation s (and centred when the design holds a constant). The reported
    log-likelihood is the standardised one minus n log s, i.e. the density of the data in data
    units. Optimiser: L-BFGS-B on log parameters with the analytic gradient
    0.5 tr((alpha alpha^T - K^-1) dK/dtheta) (Rasmussen and Williams 2006, eq. 5.9). Starting
    points: the default (nugget 0.1 s^2, partial sill 0.9 s^2, practical range L/3) and 0.3 and
    3 times that range, or ``start`` and the default. The optimiser runs from the start with the
    highest likelihood, and from the next ones only while the best fit so far has not converged
    or sits on a bound. Bounds on the standardised scale: practical range in
    [1e-3, 10] L, sigma2 in [1e-4, 1e2], tau2 in [1e-8, 1e2].

    Raises
    ------
    InputError
        Several sites, more than :data:`MAX_DENSE_POINTS` points, or a rank-deficient trend.
    """
    cov = _resolve(covariance, nu)
    _single_site(ds)
    n = int(ds.sizes["obs"])
    if n > MAX_DENSE_POINTS:
        raise InputError(
            f"{n} points: the maximum-likelihood fit builds dense {n} x {n} covariance matrices "
            f"({8 * n * n / 1e6:.0f} MB each, cubic time per evaluation); it accepts at most "
            f"{MAX_DENSE_POINTS} points per site - thin the data or split it into sites"
        )
    xy = np.column_stack([ds["x"].values, ds["y"].values]).astype(float)
    metric = metric_of(ds)
    if metric == "euclidean":
        xy = xy - xy.mean(axis=0)
    dist = distance_matrix(xy, metric)
    length = float(dist.max())
    if not length > 0:
        raise InputError("all points share one location; distances are all zero")
    y = np.asarray(ds["value"].values, dtype=float)
    xmat, terms = _design(ds, trend, covariates)
    q = _gls_basis(xmat)
    ones = np.ones(n)
    has_const = np.linalg.norm(ones - q @ (q.T @ ones)) < 1e-8 * math.sqrt(n)
    centre = float(y.mean()) if has_const else 0.0
    s = float(np.std(y - centre)) if has_const else float(np.sqrt(np.mean(y**2)))
    if not s > 0:
        raise InputError("every value is the same; nothing varies to fit")
    z = (y - centre) / s
    dstd = dist / length
    lik = _ProfileLik(z, dstd, q, cov, nugget)

    names, lo, hi, starts = search_space(cov, nugget, start, s, length)
    if start is not None:
        del starts[2:]  # the given start and the default one
    points = []
    for x0 in starts:
        if np.all(np.isfinite(x0)):
            points.append((-lik(x0, grad=False), len(points), x0))
    best = None
    for _, _, x0 in sorted(points, key=lambda t: (t[0], t[1])):
        res = optimize.minimize(lik, x0, jac=True, method="L-BFGS-B", bounds=list(zip(lo, hi)),
                                options={"maxiter": 500, "ftol": 1e-12, "gtol": 1e-7})
        if best is None or res.fun < best.fun - 1e-10:
            best = res
        if best.success and not _at_bound(best.x, lo, hi, names):
            break
    tau, sig, phi = lik.params(best.x)
    ll_std = float(lik(best.x, grad=False))
    beta = _beta_data_units(xmat, y, dist, cov, phi * length, sig * s**2, tau * s**2)
    return {
        "method": "ml",
        "covariance": cov.name,
        "nu": cov.nu,
        "nugget": tau * s**2,
        "partial_sill": sig * s**2,
        "practical_range": float(cov.practical_range(phi * length)),
        "scale": phi * length,
        "objective": -(ll_std - n * math.log(s)),
        "loglik": ll_std - n * math.log(s),
        "beta": dict(zip(terms, map(float, beta))),
        "n": n,
        "converged": bool(best.success),
        "at_bound": _at_bound(best.x, lo, hi, names),
    }


def _beta_data_units(xmat, y, dist, cov, scale, sig, tau) -> np.ndarray:
    """GLS coefficients for the design as given (equilibrated columns, whitened least squares)."""
    from bayesgeo.gp.dense import covariance_matrix

    k = covariance_matrix(dist, cov, scale, sig, tau)
    chol = linalg.cholesky(k, lower=True, check_finite=False)
    norms = np.linalg.norm(xmat, axis=0)
    norms[norms == 0] = 1.0
    wx = linalg.solve_triangular(chol, xmat / norms, lower=True, check_finite=False)
    wy = linalg.solve_triangular(chol, y, lower=True, check_finite=False)
    coef, *_ = np.linalg.lstsq(wx, wy, rcond=None)
    return coef / norms


# --- both methods, several families -----------------------------------------------------------

_VARS = {
    "nugget": ("nugget tau2", "squared value units"),
    "partial_sill": ("partial sill sigma2", "squared value units"),
    "practical_range": ("distance where the correlation falls to 0.05", "distance units"),
    "scale": ("scale parameter phi", "distance units"),
    "objective": ("WLS: Cressie's criterion; ML: minus the log-likelihood", ""),
    "loglik": ("maximum log-likelihood (ML only)", ""),
}


def quick_fits(ds: xr.Dataset, vg: xr.Dataset, families: Sequence[str] = QUICK_FAMILIES, *, trend: int = 0,
               covariates: Sequence[str] = (), nugget: bool = True, ml: bool | None = None) -> xr.Dataset:
    """WLS and ML fits of several covariance families to one site's data.

    Parameters
    ----------
    ds : xarray.Dataset
        Point data of one site (see :func:`fit_ml`).
    vg : xarray.Dataset
        Its empirical semivariogram (of the trend residuals when ``trend`` > 0 or covariates are
        used), see :func:`fit_wls`.
    families : sequence of str
        Names of closed-form families; default all of them (:data:`QUICK_FAMILIES`). The
        general ``"matern"`` needs its nu: fit it with :func:`fit_wls` / :func:`fit_ml`.
    trend, covariates, nugget
        As in :func:`fit_ml` (``nugget`` also applies to the WLS fits).
    ml : bool, optional
        Run the maximum-likelihood fits (default: yes). Up to
        :data:`bayesgeo.explore.quickfit_nn.NN_ML_POINTS` points they use the dense likelihood
        (:func:`fit_ml`), above it the nearest-neighbour one (:func:`bayesgeo.explore.quickfit_nn.fit_ml_nn`),
        as ``attrs["ml"]`` says; with ``ml=False`` they are NaN with ``converged`` false and
        ``attrs["ml_skipped"]`` saying why.

    Returns
    -------
    xarray.Dataset
        Dimensions ``method`` (``["wls", "ml"]``) and ``family``; variables ``nugget``,
        ``partial_sill`` (squared value units), ``practical_range``, ``scale`` (distance units),
        ``objective``, ``loglik`` (NaN for WLS) and ``converged``. The ML fit starts from the WLS
        fit besides its default starts. Attributes record the settings and units.
    """
    families = list(families)
    if not families:
        raise InputError("no covariance family given")
    for fam in families:
        if fam not in QUICK_FAMILIES:
            raise InputError(f"covariance: {fam!r} is not one of {', '.join(QUICK_FAMILIES)}")
    from bayesgeo.explore.quickfit_nn import NN_ML_POINTS, QUICK_NEIGHBOURS, fit_ml_nn

    n = int(ds.sizes["obs"])
    run_ml = True if ml is None else bool(ml)
    large = n > NN_ML_POINTS
    skipped = {"converged": False, "at_bound": []}
    rows = {m: [] for m in ("wls", "ml")}
    for fam in families:
        w = fit_wls(vg, fam, nugget=nugget)
        ml_fit = fit_ml_nn if large else fit_ml
        m = ml_fit(ds, fam, trend=trend, covariates=covariates, nugget=nugget, start=w) if run_ml else skipped
        rows["wls"].append(w)
        rows["ml"].append(m)
    data = {}
    for var, (long_name, units) in _VARS.items():
        vals = [[r.get(var, math.nan) for r in rows[m]] for m in ("wls", "ml")]
        data[var] = (("method", "family"), np.asarray(vals, dtype=float), {"long_name": long_name, "units": units})
    data["converged"] = (("method", "family"), np.array([[r["converged"] for r in rows[m]] for m in ("wls", "ml")]))
    data["at_bound"] = (("method", "family"), np.array([[", ".join(r["at_bound"]) for r in rows[m]]
                                                          for m in ("wls", "ml")], dtype=str))
    vu = ds.attrs.get("value_units", "")
    du = ds.attrs.get("distance_units", "")
    for var in ("nugget", "partial_sill"):
        data[var][2]["units"] = f"({vu})^2" if vu else "squared value units"
    for var in ("practical_range", "scale"):
        data[var][2]["units"] = du or "distance units"
    out = xr.Dataset(data, coords={"method": ["wls", "ml"], "family": families})
    out.attrs.update({
        "trend_order": int(trend), "covariates": list(covariates), "nugget_fitted": int(bool(nugget)),
        "n": int(ds.sizes["obs"]), "distance_units": du, "value_units": vu,
        "wls": "Cressie (1985) weights N(h) / gamma_model(h)^2",
        "ml": ("maximum likelihood, trend profiled out by GLS (not REML)" if not large else
               f"maximum likelihood with the nearest-neighbour likelihood (m = {QUICK_NEIGHBOURS}; {n} points, "
               f"above {NN_ML_POINTS}), trend by GLS in the Vecchia model (not REML)"),
        "note": "screening estimates assuming a stationary, isotropic field",
    })
    if not run_ml:
        out.attrs["ml_skipped"] = "maximum likelihood not requested"
    return out
