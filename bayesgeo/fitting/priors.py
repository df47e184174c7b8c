"""Priors for the range, the sills and the trend of the single-site Gaussian-process model.

All prior settings are stated in *data units* (distance units of the coordinates, units of the
modelled values: log units under ``transform="log"``); :mod:`bayesgeo.fitting.model` rescales them to its
internal standardised scale.

Defaults (justified in ``docs/model.md``):

* Practical range rho and partial-sill sd sigma: the penalised-complexity (PC) prior for a Matérn
  field in two dimensions (Fuglstad, Simpson, Lindgren and Rue 2019, JASA 114, 445-452)::

      P(rho < r0) = a1,  P(sigma > s0) = a2
      1 / rho ~ Exponential(lambda1),  lambda1 = -ln(a1) r0    (rho ~ InverseGamma(1, lambda1))
      sigma   ~ Exponential(lambda2),  lambda2 = -ln(a2) / s0

  Default ``r0`` = 5% of the largest distance between two data points, ``a1 = 0.05``; default
  ``s0`` = 2 x the sd of the (transformed, detrended) values, ``a2 = 0.05``.
* Nugget sd tau: the PC prior of a Gaussian noise sd is exponential (Simpson, Rue, Riebler,
  Martins and Sørbye 2017, Statistical Science 32, 1-28), ``P(tau > t0) = a3`` with the same
  defaults as sigma.
* Trend coefficients on the standardised scale: independent Normal(0, 2.5), a weakly informative
  scale (common practice for standardised regression coefficients).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, replace

import numpy as np
import xarray as xr

from bayesgeo.gp.covariance import get_covariance
from bayesgeo.common.validate import InputError

__all__ = [
    "DEFAULT_TAIL",
    "DEFAULT_RANGE_FRACTION",
    "DEFAULT_SD_FACTOR",
    "DEFAULT_BETA_SD",
    "Priors",
    "default_priors",
    "resolve_priors",
    "pc_range_rate",
    "pc_sd_rate",
    "pc_range_logpdf",
    "pc_sd_logpdf",
    "prior_draws",
    "prior_semivariogram",
    "plot_prior_semivariogram",
]

#: Default tail probability of each PC prior.
DEFAULT_TAIL = 0.05
#: Default r0 as a fraction of the largest inter-point distance.
DEFAULT_RANGE_FRACTION = 0.05
#: Default s0 (and t0) as a multiple of the sd of the detrended values.
DEFAULT_SD_FACTOR = 2.0
#: Default sd of the Normal prior of the standardised trend coefficients.
DEFAULT_BETA_SD = 2.5


@dataclass(frozen=True)
class Priors:
    """Prior settings in data units; ``None`` fields take data-derived defaults.

    Attributes
    ----------
    range : (r0, a1) or None
        ``P(practical range < r0) = a1``; r0 in distance units, 0 < a1 < 1.
    sd : (s0, a2) or None
        ``P(sigma > s0) = a2`` for the sd of the spatial field (sqrt of the partial sill),
        s0 in units of the modelled values.
    nugget : (t0, a3) or None
        ``P(tau > t0) = a3`` for the nugget sd (sqrt of the nugget).
    beta_sd : float or None
        Sd of the Normal(0, beta_sd) prior of each trend coefficient on the standardised scale
        (values divided by their sd; design columns as built by :mod:`bayesgeo.explore.trend`).
    """

    range: tuple[float, float] | None = None
    sd: tuple[float, float] | None = None
    nugget: tuple[float, float] | None = None
    beta_sd: float | None = None

    def to_dict(self) -> dict:
        """Plain dictionary (JSON-able), with the rates of the PC priors when resolved."""
        out = {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(self).items()}
        if self.range is not None:
            out["range_rate"] = pc_range_rate(*self.range)
        if self.sd is not None:
            out["sd_rate"] = pc_sd_rate(*self.sd)
        if self.nugget is not None:
            out["nugget_rate"] = pc_sd_rate(*self.nugget)
        return out

    @classmethod
    def from_dict(cls, d: Mapping | None) -> Priors:
        """Inverse of :meth:`to_dict` (extra keys such as rates are ignored)."""
        d = dict(d or {})
        unknown = set(d) - {"range", "sd", "nugget", "beta_sd", "range_rate", "sd_rate", "nugget_rate"}
        if unknown:
            raise InputError(f"priors: unknown key(s) {', '.join(sorted(unknown))}; "
                             "accepted: range, sd, nugget, beta_sd")
        pair = lambda v: None if v is None else tuple(v)  # noqa: E731  (checked by resolve_priors)
        return cls(range=pair(d.get("range")), sd=pair(d.get("sd")), nugget=pair(d.get("nugget")),
                   beta_sd=d.get("beta_sd"))


def pc_range_rate(r0: float, a1: float) -> float:
    """lambda1 = -ln(a1) r0, the rate of 1/rho in the PC prior (Fuglstad et al. 2019, d = 2)."""
    return -math.log(a1) * r0


def pc_sd_rate(s0: float, a2: float) -> float:
    """lambda2 = -ln(a2) / s0, the rate of the exponential PC prior of an sd."""
    return -math.log(a2) / s0


def pc_range_logpdf(rho, r0: float, a1: float):
    """log density of the PC range prior: log(lambda1) - 2 log(rho) - lambda1 / rho (rho > 0)."""
    lam = pc_range_rate(r0, a1)
    rho = np.asarray(rho, dtype=float)
    with np.errstate(divide="ignore"):
        return np.where(rho > 0, math.log(lam) - 2.0 * np.log(rho) - lam / rho, -np.inf)


def pc_sd_logpdf(sigma, s0: float, a2: float):
    """log density of the exponential PC prior of an sd: log(lambda2) - lambda2 sigma (sigma >= 0)."""
    lam = pc_sd_rate(s0, a2)
    sigma = np.asarray(sigma, dtype=float)
    return np.where(sigma >= 0, math.log(lam) - lam * sigma, -np.inf)


def _check_pair(pair, what: str, option: str) -> tuple[float, float]:
    try:
        v0, prob = (float(pair[0]), float(pair[1]))
    except (TypeError, ValueError, IndexError):
        raise InputError(f"{option}: expected two numbers ({what} and a probability), got {pair!r}") from None
    if not (math.isfinite(v0) and v0 > 0):
        raise InputError(f"{option}: {what} must be a positive number, got {pair[0]!r}")
    if not (0.0 < prob < 1.0):
        raise InputError(f"{option}: the probability must be strictly between 0 and 1, got {pair[1]!r}")
    return v0, prob


def default_priors(*, extent: float, value_sd: float) -> Priors:
    """The documented defaults for data whose largest inter-point distance is ``extent`` and whose
    (transformed, detrended) values have sd ``value_sd``."""
    if not (extent > 0 and value_sd > 0):
        raise InputError(f"priors: need a positive extent and sd of the values, got {extent!r}, {value_sd!r}")
    s0 = DEFAULT_SD_FACTOR * value_sd
    return Priors(range=(DEFAULT_RANGE_FRACTION * extent, DEFAULT_TAIL), sd=(s0, DEFAULT_TAIL),
                  nugget=(s0, DEFAULT_TAIL), beta_sd=DEFAULT_BETA_SD)


def resolve_priors(priors: Priors | Mapping | None, *, extent: float, value_sd: float) -> Priors:
    """Fill the ``None`` fields of ``priors`` with :func:`default_priors` and check every number.

    Raises
    ------
    InputError
        Naming the argument (``priors["range"]``, ``priors["sd"]``, ``priors["nugget"]``) of a bad value.
    """
    if priors is None:
        priors = Priors()
    elif isinstance(priors, Mapping):
        priors = Priors.from_dict(priors)
    elif not isinstance(priors, Priors):
        raise InputError(f"priors: expected a Priors or a dict, got {type(priors).__name__}")
    base = default_priors(extent=extent, value_sd=value_sd)
    out = replace(
        base,
        range=base.range if priors.range is None else _check_pair(priors.range, "R0 (distance)", 'priors["range"]'),
        sd=base.sd if priors.sd is None else _check_pair(priors.sd, "S0 (sd)", 'priors["sd"]'),
        nugget=base.nugget if priors.nugget is None else _check_pair(priors.nugget, "T0 (sd)", 'priors["nugget"]'),
    )
    if priors.beta_sd is not None:
        try:
            b = float(priors.beta_sd)
        except (TypeError, ValueError):
            b = float("nan")
        if not (math.isfinite(b) and b > 0):
            raise InputError(f"priors: beta_sd must be a positive number, got {priors.beta_sd!r}")
        out = replace(out, beta_sd=b)
    return out


def prior_draws(priors: Priors, *, draws: int = 4000, nugget: bool = True, seed: int = 0) -> dict[str, np.ndarray]:
    """Independent draws of practical range, sigma and tau from resolved ``priors`` (data units)."""
    if priors.range is None or priors.sd is None or priors.nugget is None:
        raise ValueError("prior_draws needs resolved priors (see resolve_priors)")
    rng = np.random.default_rng(seed)
    lam1 = pc_range_rate(*priors.range)
    out = {
        "practical_range": lam1 / rng.exponential(1.0, draws),
        "sd": rng.exponential(1.0 / pc_sd_rate(*priors.sd), draws),
    }
    out["nugget_sd"] = rng.exponential(1.0 / pc_sd_rate(*priors.nugget), draws) if nugget else np.zeros(draws)
    return out


def prior_semivariogram(priors: Priors, lags, *, covariance: str = "matern32", nu: float | None = None,
                        nugget: bool = True, draws: int = 4000, seed: int = 0,
                        probs: tuple[float, float, float] = (0.05, 0.5, 0.95)) -> xr.Dataset:
    """Prior predictive check: the band of semivariograms implied by the priors.

    Parameters
    ----------
    priors : Priors
        Resolved priors in data units (:func:`resolve_priors`).
    lags : array_like
        Lags (distance units) at which to evaluate gamma(h) = sigma^2 (1 - rho(h)) + tau^2.
    covariance, nu : str, float
        Covariance family (:func:`bayesgeo.gp.covariance.get_covariance`).
    nugget : bool
        Include the nugget.
    draws, seed : int
        Number of prior draws and the seed of the generator.
    probs : three floats
        Lower, middle and upper probabilities of the band.

    Returns
    -------
    xarray.Dataset
        Along ``lag``: ``low``, ``median``, ``high`` in squared units of the modelled values.
    """
    cov = get_covariance(covariance, nu)
    lags = np.asarray(lags, dtype=float)
    if lags.ndim != 1 or np.any(lags < 0) or not np.all(np.isfinite(lags)):
        raise InputError("prior_semivariogram: lags must be a 1-D array of non-negative distances")
    p = prior_draws(priors, draws=draws, nugget=nugget, seed=seed)
    scale = cov.scale_from_range(p["practical_range"])
    corr = cov.correlation(lags[None, :], scale[:, None])
    gam = p["sd"][:, None] ** 2 * (1.0 - corr) + p["nugget_sd"][:, None] ** 2
    gam[:, lags == 0] = 0.0
    q = np.quantile(gam, probs, axis=0)
    ds = xr.Dataset(
        {"low": ("lag", q[0]), "median": ("lag", q[1]), "high": ("lag", q[2])},
        coords={"lag": lags},
        attrs={"what": "prior predictive semivariogram band", "probs": list(probs), "draws": draws,
               "seed": seed, "covariance": cov.name, "nu": float("nan") if cov.nu is None else cov.nu,
               "nugget": int(nugget), "priors": str(priors.to_dict())},
    )
    return ds


def plot_prior_semivariogram(band: xr.Dataset, empirical: xr.Dataset | None = None, *, ax=None,
                             distance_units: str = "", value_units: str = ""):
    """Figure of the prior band (:func:`prior_semivariogram`) against an empirical semivariogram.

    ``empirical`` is a Dataset with coordinate ``lag`` and variable ``semivariance`` (as returned by
    :func:`bayesgeo.explore.variogram.semivariogram`). Returns the matplotlib Figure.
    """
    import matplotlib.pyplot as plt

    if ax is None:
        fig, ax = plt.subplots(figsize=(6.4, 4.2))
    else:
        fig = ax.figure
    lag = band["lag"].values
    lo, hi = band.attrs.get("probs", (0.05, 0.5, 0.95))[0::2]
    ax.fill_between(lag, band["low"].values, band["high"].values, color="#9ecae1", alpha=0.6,
                    label=f"prior {100 * lo:g}-{100 * hi:g}%")
    ax.plot(lag, band["median"].values, color="#08519c", lw=1.5, label="prior median")
    if empirical is not None:
        ax.plot(empirical["lag"].values, empirical["semivariance"].values, "o", color="#d94801",
                label="empirical")
    ax.set_xlabel(f"lag ({distance_units})" if distance_units else "lag")
    ax.set_ylabel(f"semivariance ({value_units})$^2$" if value_units else "semivariance")
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    ax.legend(frameon=False)
    ax.set_title("Prior predictive check: semivariogram")
    return fig
