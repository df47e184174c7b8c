"""Weighted least squares of a model semivariogram to an empirical one (Cressie 1985), with the helpers
the quick fits share.

The criterion, with the model value in the denominator (dimensionless)::

    sum_j N(h_j) [gamma_hat(h_j) / gamma(h_j; theta) - 1]^2

References
----------
Cressie, N. (1985). Fitting variogram models by weighted least squares. *Mathematical Geology*
17, 563-586.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import xarray as xr
from scipy import optimize

from bayesgeo.common.validate import InputError
from bayesgeo.gp.covariance import Covariance, get_covariance

__all__ = ["fit_wls"]


_PARAMS = ("nugget", "partial_sill", "scale")


def _resolve(covariance: str | Covariance, nu: float | None) -> Covariance:
    if isinstance(covariance, Covariance):
        if nu is not None and nu != covariance.nu:
            raise InputError(f"nu={nu} conflicts with the covariance given ({covariance.label})")
        return covariance
    try:
        return get_covariance(covariance, nu)
    except (ValueError, TypeError) as err:
        raise InputError(str(err)) from None


def _at_bound(theta: np.ndarray, lo: np.ndarray, hi: np.ndarray, names: Sequence[str]) -> list[str]:
    """Names of log parameters within 1e-4 of a bound (``"scale (upper)"`` ...)."""
    out = []
    for t, a, b, name in zip(theta, lo, hi, names):
        if t - a < 1e-4:
            out.append(f"{name} (lower)")
        elif b - t < 1e-4:
            out.append(f"{name} (upper)")
    return out


def _wls_start(h: np.ndarray, g: np.ndarray, cov: Covariance, nugget: bool) -> tuple[float, float, float]:
    """Starting nugget, partial sill and practical range from the shape of the empirical curve."""
    k = max(2, len(g) // 3)
    plateau = float(np.mean(g[-k:]))
    plateau = max(plateau, float(np.max(g)) * 0.5)
    tau = float(np.clip(g[0], 0.02 * plateau, 0.8 * plateau)) if nugget else 0.0
    sig = max(plateau - tau, 0.05 * plateau)
    reach = np.flatnonzero(g >= 0.95 * plateau)
    prange = float(h[reach[0]]) if reach.size else float(h[-1])
    return tau, sig, max(prange, float(h[0]))


def fit_wls(vg: xr.Dataset, covariance: str | Covariance, *, nugget: bool = True,
            nu: float | None = None) -> dict:
    """Fit a covariance family to an empirical semivariogram by weighted least squares.

    Parameters
    ----------
    vg : xarray.Dataset
        Empirical semivariogram on dimension ``bin`` with coordinate ``lag`` (distance units) and
        variables ``semivariance`` (squared value units) and ``pairs`` (pair counts N(h)), as made
        by :func:`bayesgeo.explore.variogram.semivariogram`. Bins without pairs or with a NaN value are
        skipped.
    covariance : str or Covariance
        Family name (see :data:`bayesgeo.gp.covariance.FAMILIES`) or a :class:`Covariance`.
    nugget : bool, default True
        Fit a nugget; if False the nugget is fixed at zero.
    nu : float, optional
        Smoothness, for ``"matern"`` only.

    Returns
    -------
    dict
        ``covariance`` (name), ``nu``, ``nugget`` and ``partial_sill`` (squared value units),
        ``practical_range`` and ``scale`` (distance units), ``objective`` (Cressie's criterion,
        dimensionless), ``converged`` (bool), ``at_bound`` (parameters stopped at a search bound)
        and ``method`` (``"wls"``).

    Notes
    -----
    Minimises sum_j N(h_j) [gamma_hat(h_j) / gamma(h_j; theta) - 1]^2 (Cressie 1985) over
    log(tau2), log(sigma2), log(phi) with ``scipy.optimize.least_squares`` (trust-region
    reflective, analytic Jacobian), from three starting practical ranges (0.5, 1 and 2 times the
    lag where the curve first reaches 95 % of its plateau); the best fit is kept. Search bounds on
    the standardised scale (largest lag 1, largest semivariance 1): practical range in
    [1e-3, 20], partial sill in [1e-6, 1e3], nugget in [1e-8, 1e3].

    Raises
    ------
    InputError
        Fewer usable bins than parameters + 1, or a semivariogram that is zero everywhere.
    """
    cov = _resolve(covariance, nu)
    for name in ("semivariance", "pairs"):
        if name not in vg:
            raise InputError(f"semivariogram has no variable {name!r} (expected the output of explore.semivariogram)")
    if vg["semivariance"].ndim != 1:
        raise InputError(f"the semivariogram has dimensions {vg['semivariance'].dims}; fit one direction at a "
                         "time (e.g. vg.isel(azimuth=0)) or the omnidirectional semivariogram")
    lag = np.asarray(vg["lag"].values, dtype=float)
    gam = np.asarray(vg["semivariance"].values, dtype=float)
    npairs = np.asarray(vg["pairs"].values, dtype=float)
    ok = np.isfinite(lag) & np.isfinite(gam) & (npairs > 0) & (lag > 0)
    nparam = 3 if nugget else 2
    if ok.sum() < nparam + 1:
        raise InputError(f"only {int(ok.sum())} semivariogram bins hold pairs; a {nparam}-parameter "
                         f"fit needs at least {nparam + 1} (use more bins or a larger maximum lag)")
    lag, gam, npairs = lag[ok], gam[ok], npairs[ok]
    hs, gs = float(lag.max()), float(gam.max())
    if not gs > 0:
        raise InputError("every semivariance is zero: nothing varies to fit")
    h, g, sw = lag / hs, gam / gs, np.sqrt(npairs)

    names = list(_PARAMS if nugget else _PARAMS[1:])
    lo = np.log([1e-8, 1e-6, 1e-3 / cov.range_factor])
    hi = np.log([1e3, 1e3, 20.0 / cov.range_factor])
    if not nugget:
        lo, hi = lo[1:], hi[1:]

    def model(theta):
        tau = math.exp(theta[0]) if nugget else 0.0
        sig, phi = math.exp(theta[-2]), math.exp(theta[-1])
        rho = cov.correlation(h, phi)
        return tau, sig, phi, rho, tau + sig * (1.0 - rho)

    def resid(theta):
        gm = model(theta)[-1]
        return sw * (g / gm - 1.0)

    def jac(theta):
        tau, sig, phi, rho, gm = model(theta)
        cols = [sig * (1.0 - rho), -sig * cov.correlation_dlogscale(h, phi)]
        if nugget:
            cols.insert(0, np.full_like(h, tau))
        return (-sw * g / gm**2)[:, None] * np.column_stack(cols)

    tau0, sig0, pr0 = _wls_start(h, g, cov, nugget)
    best = None
    for mult in (1.0, 0.5, 2.0):
        x0 = np.log([max(tau0, 1e-6), sig0, pr0 * mult / cov.range_factor])
        x0 = np.clip(x0 if nugget else x0[1:], lo + 1e-3, hi - 1e-3)
        res = optimize.least_squares(resid, x0, jac=jac, bounds=(lo, hi), method="trf",
                                     xtol=1e-12, ftol=1e-12, gtol=1e-12, max_nfev=2000)
        if best is None or res.cost < best.cost - 1e-12 * max(1.0, best.cost):
            best = res
    tau, sig, phi = model(best.x)[:3]
    return {
        "method": "wls",
        "covariance": cov.name,
        "nu": cov.nu,
        "nugget": tau * gs,
        "partial_sill": sig * gs,
        "practical_range": float(cov.practical_range(phi * hs)),
        "scale": phi * hs,
        "objective": float(2.0 * best.cost),
        "converged": bool(best.success),
        "at_bound": _at_bound(best.x, lo, hi, names),
    }


# --- shared by the maximum-likelihood quick fits (bayesgeo.explore.quickfit, quickfit_nn) ------------------


def _single_site(ds: xr.Dataset) -> None:
    if "site" in ds.coords and np.unique(ds["site"].values).size > 1:
        labels = ", ".join(map(str, np.unique(ds["site"].values)[:5]))
        raise InputError(f"the data hold several sites ({labels}, ...); fit each site on its own "
                         "(select it with ds.where(ds.site == label, drop=True))")


def _design(ds: xr.Dataset, trend: int, covariates: Sequence[str]) -> tuple[np.ndarray, list[str]]:
    from bayesgeo.explore.trend import design_matrix

    xmat = design_matrix(ds, trend, tuple(covariates))
    return np.asarray(xmat.values, dtype=float), [str(t) for t in xmat["term"].values]


def search_space(cov: Covariance, nugget: bool, start: dict | None, s: float, length: float):
    """Parameter names, log-scale bounds and starting points of the ML quick fits (standardised scale: values
    divided by ``s``, distances by ``length``): the default (nugget 0.1, partial sill 0.9, practical range 1/3),
    0.3 and 3 times that range, and first ``start`` (data units) when given."""
    names = list(_PARAMS if nugget else _PARAMS[1:])
    lo = np.log([1e-8, 1e-4, 1e-3 / cov.range_factor])
    hi = np.log([1e2, 1e2, 10.0 / cov.range_factor])
    if not nugget:
        lo, hi = lo[1:], hi[1:]
    raw = [(0.1, 0.9, 1.0 / 3.0), (0.1, 0.9, 0.1), (0.1, 0.9, 1.0)]
    if start is not None:
        try:
            raw.insert(0, (start["nugget"] / s**2, start["partial_sill"] / s**2, start["practical_range"] / length))
        except (KeyError, TypeError):
            raise InputError("start must give nugget, partial_sill and practical_range") from None
    starts = []
    for tau0, sig0, pr0 in raw:
        with np.errstate(invalid="ignore", divide="ignore"):
            x0 = np.log([max(tau0, 1e-6), max(sig0, 1e-3), max(pr0, 1e-3) / cov.range_factor])
        starts.append(np.clip(x0 if nugget else x0[1:], lo + 1e-3, hi - 1e-3))
    return names, lo, hi, starts
