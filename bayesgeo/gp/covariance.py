"""Covariance families: one registry used by every stage.

Every family is isotropic and stationary and is written as a correlation function of the scaled
distance ``u = d / scale``. The partial sill ``sigma2`` multiplies the correlation; the nugget
``tau2`` is added at distance zero only:

    C(d)     = sigma2 * rho(d / scale) + tau2 * [d == 0]
    gamma(d) = sigma2 * (1 - rho(d / scale)) + tau2     for d > 0, and gamma(0) = 0,

so that gamma(d) = C(0) - C(d) and rho(d) = C(d) / C(0) for a field without nugget.

Conventions for the scale parameter ``phi`` (Diggle and Ribeiro 2007, *Model-based
Geostatistics*, sec. 3.4):

* ``exponential``: rho = exp(-u)
* ``matern32``:    rho = (1 + u) exp(-u)                   (Matérn nu = 3/2 in the u = d/phi form)
* ``matern52``:    rho = (1 + u + u^2 / 3) exp(-u)         (Matérn nu = 5/2)
* ``matern``:      rho = 2^(1 - nu) / Gamma(nu) u^nu K_nu(u), any nu > 0
* ``gaussian``:    rho = exp(-u^2)
* ``spherical``:   rho = 1 - 1.5 u + 0.5 u^3 for u < 1, else 0; the scale is the range itself.

The *practical range* is the distance at which the correlation falls to 0.05 (for the spherical
model, the range itself).
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Callable, NamedTuple

import numpy as np
from scipy import optimize, special

__all__ = [
    "FAMILIES",
    "CLOSED_FORMS",
    "KERNEL_FAMILIES",
    "kernel_code",
    "PRACTICAL_RANGE_CORRELATION",
    "Covariance",
    "get_covariance",
]

#: Correlation that defines the practical range (common practice).
PRACTICAL_RANGE_CORRELATION = 0.05

Array = np.ndarray


# --- closed-form families: each formula written once -------------------------------------------
# ``rho(u, xp)`` is the correlation and ``dlog(u, r, xp)`` is -u rho'(u) = d rho / d log(scale) given
# r = rho(u) (so the derivative reuses the stored correlation: no second exponential). Both are
# generic in the array namespace ``xp``: NumPy arrays (``xp = numpy``, the ``Covariance`` methods),
# PyTensor tensors (``xp = pytensor.tensor``, :meth:`Covariance.pt_correlation`) and NumPy scalars
# inside Numba (:func:`bayesgeo.gp.dense.rho_code`, which serves the dense, kriging and
# nearest-neighbour kernels). The spherical form clips u at 1, where its polynomial is exactly 0.


def _exp_rho(u, xp):
    return xp.exp(-u)


def _exp_dlog(u, r, xp):
    return u * r


def _m32_rho(u, xp):
    return (1.0 + u) * xp.exp(-u)


def _m32_dlog(u, r, xp):
    return r * u * u / (1.0 + u)


def _m52_rho(u, xp):
    return (1.0 + u + u * u / 3.0) * xp.exp(-u)


def _m52_dlog(u, r, xp):
    return r * u * u * (1.0 + u) / (3.0 + 3.0 * u + u * u)


def _gauss_rho(u, xp):
    return xp.exp(-u * u)


def _gauss_dlog(u, r, xp):
    return 2.0 * u * u * r


def _sph_rho(u, xp):
    v = xp.minimum(u, 1.0)
    return 1.0 - 1.5 * v + 0.5 * v * v * v


def _sph_dlog(u, r, xp):
    v = xp.minimum(u, 1.0)
    return 1.5 * v - 1.5 * v * v * v


class ClosedForm(NamedTuple):
    """One closed-form family of the table: label, smoothness, formulas, microergodic power."""

    label: str
    nu: float | None
    rho: Callable
    dlog: Callable
    microergodic_power: float | None


#: The one table of closed-form families. Its order is the family code of the Numba kernels
#: (:data:`KERNEL_FAMILIES`, :func:`kernel_code`).
CLOSED_FORMS: dict[str, ClosedForm] = {
    "exponential": ClosedForm("Exponential", 0.5, _exp_rho, _exp_dlog, 1.0),
    "matern32": ClosedForm("Matérn 3/2", 1.5, _m32_rho, _m32_dlog, 3.0),
    "matern52": ClosedForm("Matérn 5/2", 2.5, _m52_rho, _m52_dlog, 5.0),
    "gaussian": ClosedForm("Gaussian", None, _gauss_rho, _gauss_dlog, None),
    "spherical": ClosedForm("Spherical", None, _sph_rho, _sph_dlog, 1.0),
}


def _numpy_forms(form: ClosedForm) -> tuple[Callable[[Array], Array], Callable[[Array], Array]]:
    """rho(u) and -u rho'(u) of a closed-form family on NumPy arrays."""
    def rho(u):
        return form.rho(np.asarray(u, dtype=float), np)

    def dlog(u):
        u = np.asarray(u, dtype=float)
        return form.dlog(u, form.rho(u, np), np)

    return rho, dlog


# --- the general Matérn (Bessel form): NumPy/SciPy and PyTensor -----------------------------------


def _matern_part(u: Array, nu: float, power: float, order: float, at_zero: float) -> Array:
    """2^(1 - nu) / Gamma(nu) u^power K_order(u), ``at_zero`` at u = 0 and where it does not evaluate."""
    u = np.asarray(u, dtype=float)
    out = np.full_like(u, at_zero)
    pos = u > 0
    up = u[pos]
    with np.errstate(under="ignore", over="ignore", invalid="ignore"):
        val = 2.0 ** (1.0 - nu) / special.gamma(nu) * up**power * special.kv(order, up)
    out[pos] = np.where(np.isfinite(val), val, 0.0)
    return out


def _matern_rho(u: Array, nu: float) -> Array:
    return _matern_part(u, nu, nu, nu, 1.0)


def _matern_dlog(u: Array, nu: float) -> Array:
    # d/du [u^nu K_nu(u)] = -u^nu K_{nu-1}(u)  (Abramowitz and Stegun 9.6.28)
    return _matern_part(u, nu, nu + 1.0, nu - 1.0, 0.0)


# --- PyTensor forms (imported lazily: the exploratory stage does not need PyTensor) -------------


def _pt_rho(name: str, u, nu: float | None):
    import pytensor.tensor as pt

    if name in CLOSED_FORMS:
        return CLOSED_FORMS[name].rho(u, pt)
    # the general Matérn: kv has a gradient in its second argument only, so nu stays a fixed number.
    safe = pt.maximum(u, 1e-12)
    val = 2.0 ** (1.0 - nu) / math.gamma(nu) * safe**nu * pt.kv(nu, safe)
    return pt.switch(pt.gt(u, 1e-12), val, 1.0)


@dataclass(frozen=True)
class Covariance:
    """One covariance family, with its smoothness fixed.

    Attributes
    ----------
    name : str
        Registry name used on the command line and in JSON (``"matern32"``, ...).
    nu : float or None
        Matérn smoothness; ``0.5`` for exponential, ``None`` for gaussian and spherical.
    label : str
        Human-readable name for tables and figures.
    range_factor : float
        Practical range divided by the scale parameter.
    microergodic_power : float or None
        Power ``p`` in the microergodic parameter ``sigma2 / scale**p`` (Zhang 2004): ``2 nu`` for
        Matérn-class models, 1 for spherical (linear behaviour at the origin), ``None`` for
        gaussian, which has no such finite combination.
    """

    name: str
    nu: float | None
    label: str
    range_factor: float
    microergodic_power: float | None
    _rho: Callable[[Array], Array] = field(repr=False, compare=False)
    _dlog: Callable[[Array], Array] = field(repr=False, compare=False)

    # numpy -------------------------------------------------------------------------------------
    def correlation(self, d: Array, scale: float) -> Array:
        """Correlation rho(d) at distances ``d`` (data distance units) for a scale ``scale``."""
        _check_positive(scale, "scale")
        return self._rho(np.asarray(d, dtype=float) / scale)

    def correlation_dlogscale(self, d: Array, scale: float) -> Array:
        """Derivative of rho(d) with respect to log(scale), used by analytic gradients."""
        _check_positive(scale, "scale")
        return self._dlog(np.asarray(d, dtype=float) / scale)

    def covariance(self, d: Array, scale: float, partial_sill: float, nugget: float = 0.0) -> Array:
        """Covariance C(d) = sigma2 rho(d) + tau2 [d == 0], in squared data units."""
        d = np.asarray(d, dtype=float)
        _check_nonnegative(nugget, "nugget")
        return partial_sill * self.correlation(d, scale) + np.where(d == 0.0, nugget, 0.0)

    def semivariance(self, d: Array, scale: float, partial_sill: float, nugget: float = 0.0) -> Array:
        """Semivariance gamma(d) = sigma2 (1 - rho(d)) + tau2 for d > 0 and 0 at d = 0."""
        d = np.asarray(d, dtype=float)
        _check_nonnegative(nugget, "nugget")
        g = partial_sill * (1.0 - self.correlation(d, scale)) + nugget
        return np.where(d > 0.0, g, 0.0)

    def practical_range(self, scale):
        """Practical range (distance where rho = 0.05; the range itself for spherical)."""
        return self.range_factor * np.asarray(scale, dtype=float)

    def scale_from_range(self, practical_range):
        """Scale parameter giving the stated practical range."""
        return np.asarray(practical_range, dtype=float) / self.range_factor

    def microergodic(self, partial_sill, scale):
        """Zhang's (2004) microergodic parameter sigma2 / scale**p, or NaN where undefined."""
        if self.microergodic_power is None:
            return np.full(np.broadcast(partial_sill, scale).shape, np.nan)
        return np.asarray(partial_sill) / np.asarray(scale, dtype=float) ** self.microergodic_power

    # pytensor ----------------------------------------------------------------------------------
    def pt_correlation(self, d, scale):
        """PyTensor expression of rho(d / scale); ``d`` and ``scale`` are tensors or arrays."""
        return _pt_rho(self.name, d / scale, self.nu)

    def to_attrs(self) -> dict:
        """Attributes that record this family in a NetCDF file."""
        return {"covariance": self.name, "nu": float("nan") if self.nu is None else self.nu}


def _check_positive(value, what: str) -> None:
    if np.any(np.asarray(value) <= 0) or not np.all(np.isfinite(value)):
        raise ValueError(f"{what} must be positive and finite, got {value!r}")


def _check_nonnegative(value, what: str) -> None:
    if np.any(np.asarray(value) < 0) or not np.all(np.isfinite(value)):
        raise ValueError(f"{what} must be non-negative and finite, got {value!r}")


def _root_factor(rho: Callable[[Array], Array]) -> float:
    """Solve rho(u) = 0.05 for u by bracketing (rho decreases monotonically)."""
    f = lambda u: float(rho(np.array([u]))[0]) - PRACTICAL_RANGE_CORRELATION  # noqa: E731
    hi = 1.0
    while f(hi) > 0:
        hi *= 2.0
    return optimize.brentq(f, 1e-9, hi, xtol=1e-13)


#: Names accepted by :func:`get_covariance`.
FAMILIES: tuple[str, ...] = (*CLOSED_FORMS, "matern")

#: The one family-code table of the Numba kernels (likelihood, kriging, nearest-neighbour): family
#: ``KERNEL_FAMILIES[c]`` is code ``c``. The general ``matern`` (Bessel function) has no code.
KERNEL_FAMILIES: tuple[str, ...] = tuple(CLOSED_FORMS)


def kernel_code(name: str) -> int | None:
    """The Numba kernel code of family ``name`` (:data:`KERNEL_FAMILIES`), or None for the general Matérn."""
    return KERNEL_FAMILIES.index(name) if name in KERNEL_FAMILIES else None


@functools.lru_cache(maxsize=64)
def get_covariance(name: str, nu: float | None = None) -> Covariance:
    """Look up a covariance family by name.

    Parameters
    ----------
    name : str
        One of :data:`FAMILIES`: ``exponential``, ``matern32``, ``matern52``, ``gaussian``,
        ``spherical`` or ``matern`` (general smoothness, Bessel form).
    nu : float, optional
        Smoothness, required for ``matern`` and refused for the others.

    Returns
    -------
    Covariance

    Raises
    ------
    ValueError
        For an unknown name, a missing or invalid ``nu``.
    """
    if not isinstance(name, str):
        raise TypeError(f"covariance name must be a string, got {type(name).__name__}")
    key = name.strip().lower()
    if key in CLOSED_FORMS:
        if nu is not None:
            raise ValueError(f"covariance {key!r} has a fixed smoothness; nu applies to 'matern' only")
        form = CLOSED_FORMS[key]
        rho, dlog = _numpy_forms(form)
        factor = 1.0 if key == "spherical" else _root_factor(rho)
        return Covariance(key, form.nu, form.label, factor, form.microergodic_power, rho, dlog)
    if key == "matern":
        if nu is None:
            raise ValueError("covariance 'matern' needs its smoothness nu (e.g. nu=1.0)")
        nu = float(nu)
        if not (0.0 < nu <= 50.0):
            raise ValueError(f"Matérn smoothness nu must be in (0, 50], got {nu}")
        rho = functools.partial(_matern_rho, nu=nu)
        dlog = functools.partial(_matern_dlog, nu=nu)
        return Covariance("matern", nu, f"Matérn nu={nu:g}", _root_factor(rho), 2.0 * nu, rho, dlog)
    raise ValueError(f"unknown covariance {name!r}; choose one of: {', '.join(FAMILIES)}")
