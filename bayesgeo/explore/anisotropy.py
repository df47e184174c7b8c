"""A first guess at geometric anisotropy from directional semivariograms.

Under geometric anisotropy (:mod:`bayesgeo.gp.anisotropy`) with the major axis at azimuth theta, major range
R_maj and minor range R_min, the practical range seen along azimuth beta is the radius of an ellipse:

    1 / R(beta)^2 = cos^2(beta - theta) / R_maj^2 + sin^2(beta - theta) / R_min^2
                  = A - D cos(2 (beta - theta)),   A = (1/R_maj^2 + 1/R_min^2) / 2,  D = (1/R_min^2 - 1/R_maj^2) / 2,

which is linear in (1, cos 2 beta, sin 2 beta). Geometric anisotropy keeps the nugget and the sill the same in
every direction, so :func:`suggest_anisotropy` takes them from a weighted least-squares fit of the
omnidirectional semivariogram (:func:`bayesgeo.explore.wls.fit_wls`, exponential family) and fits only the
practical range in each direction (the same weighted criterion of Cressie 1985, one parameter, bounded scalar
search), then solves the linear least-squares problem for A and (B, C) = -D (cos 2 theta, sin 2 theta) and
reports theta and r = R_maj / R_min = sqrt((A + D) / (A - D)). With four directions and three unknowns this is a rough guess from noisy curves: a
prompt to try ``fit --anisotropy`` (whose posterior is the answer), not an estimate to report.
"""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from bayesgeo.common.validate import InputError
from bayesgeo.explore.wls import fit_wls

__all__ = ["ellipse_from_ranges", "suggest_anisotropy"]


def ellipse_from_ranges(azimuths, ranges) -> tuple[float, float]:
    """(theta in degrees [0, 180), ratio >= 1) of the ellipse 1/R^2 = A + B cos 2 beta + C sin 2 beta fitted to
    practical ranges along ``azimuths`` (degrees); ratio is inf when the fit is not an ellipse (A <= D)."""
    beta = np.radians(np.asarray(azimuths, dtype=float))
    y = 1.0 / np.asarray(ranges, dtype=float) ** 2
    x = np.column_stack([np.ones_like(beta), np.cos(2 * beta), np.sin(2 * beta)])
    (a, b, c), *_ = np.linalg.lstsq(x, y, rcond=None)
    d = math.hypot(b, c)
    theta = math.degrees(0.5 * math.atan2(-c, -b)) % 180.0
    return theta, (math.sqrt((a + d) / (a - d)) if a > d else math.inf)


def _direction_range(vg: xr.Dataset, tau2: float, sigma2: float, cov, limit: float) -> float | None:
    """Practical range minimising sum N(h) (gamma_hat / gamma(h) - 1)^2 with nugget and sill fixed."""
    from scipy.optimize import minimize_scalar

    lag = np.asarray(vg["lag"].values, dtype=float)
    gam = np.asarray(vg["semivariance"].values, dtype=float)
    npairs = np.asarray(vg["pairs"].values, dtype=float)
    ok = np.isfinite(lag) & np.isfinite(gam) & (npairs > 0) & (lag > 0)
    if ok.sum() < 3:
        return None
    lag, gam, npairs = lag[ok], gam[ok], npairs[ok]

    def loss(log_r):
        model = tau2 + sigma2 * (1.0 - cov.correlation(lag, math.exp(log_r) / cov.range_factor))
        return float(np.sum(npairs * (gam / model - 1.0) ** 2))

    lo, hi = math.log(1e-3 * limit), math.log(20.0 * limit)
    res = minimize_scalar(loss, bounds=(lo, hi), method="bounded", options={"xatol": 1e-6})
    if not res.success or min(res.x - lo, hi - res.x) < 1e-3:
        return None  # failed, or stopped at a search bound
    return float(math.exp(res.x))


def suggest_anisotropy(dvg: xr.Dataset, vg: xr.Dataset, *, nugget: bool = True) -> dict | None:
    """Direction and ratio suggested by directional semivariograms (module docstring).

    Parameters
    ----------
    dvg : xarray.Dataset
        :func:`bayesgeo.explore.variogram.directional_semivariograms` output (dimension ``azimuth``).
    vg : xarray.Dataset
        The omnidirectional semivariogram (:func:`bayesgeo.explore.variogram.semivariogram`) of the same data:
        its fit gives the nugget and sill shared by every direction.
    nugget : bool
        Fit a nugget.

    Returns
    -------
    dict or None
        ``angle`` (degrees clockwise from north of the longest range, [0, 180)), ``ratio`` (>= 1; inf when the
        ranges do not form an ellipse), ``ranges`` (practical range per azimuth, distance units; None where the
        fit failed), ``azimuths`` and ``method``; None when the omnidirectional fit fails or fewer than three
        directions are fitted.
    """
    from bayesgeo.gp.covariance import get_covariance

    cov = get_covariance("exponential")
    try:
        omni = fit_wls(vg, cov, nugget=nugget)
    except InputError:
        return None
    if not omni["converged"]:
        return None
    limit = float(np.nanmax(np.asarray(dvg["lag"].values, dtype=float)))
    azimuths = [float(a) for a in np.atleast_1d(dvg["azimuth"].values)]
    ranges = [_direction_range(dvg.isel(azimuth=i), float(omni["nugget"]), float(omni["partial_sill"]), cov, limit)
              for i in range(len(azimuths))]
    good = [(a, r) for a, r in zip(azimuths, ranges) if r is not None]
    if len(good) < 3:
        return None
    angle, ratio = ellipse_from_ranges(*zip(*good))
    return {"angle": angle, "ratio": ratio, "azimuths": azimuths, "ranges": ranges,
            "method": "ellipse 1/R^2 = A + B cos 2b + C sin 2b fitted to the practical ranges of the directional "
                      "semivariograms (exponential family, nugget and sill of the omnidirectional WLS fit); a "
                      "rough guess: fit --anisotropy gives the posterior"}
