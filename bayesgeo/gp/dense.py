"""Gaussian-process marginal log-likelihood with the latent field integrated out.

    y = X beta + w + e,   w ~ GP(0, sigma2 rho(d / phi)),   e ~ N(0, tau2 I)
    log p(y | beta, phi, sigma2, tau2) = log N(r | 0, K),   r = y - X beta,
    K = sigma2 R(phi) + (tau2 + jitter) I.

Jitter policy: ``JITTER`` times the partial sill is added to the diagonal, so that a model
without nugget (or a Gaussian covariance, whose matrices are nearly singular) still factorises;
on the standardised scale used by the model this is about 1e-6 of the data variance.

Three implementations share this definition:

* :func:`loglik_numpy`: plain NumPy/SciPy, used by the quick maximum-likelihood fits and as a test
  reference;
* :func:`loglik_and_grad`: the value and its analytic gradient from one Cholesky factorisation
  (Numba kernel calling LAPACK ``dpotrf``/``dpotrs``/``dpotri``);
* :func:`marginal_loglik`: a PyTensor scalar for the PyMC model, by default one PyTensor Op around
  that kernel (native under Numba, hence under nutpie), or ``method="reference"`` for the
  automatic-differentiation graph through ``pt.linalg.cholesky``.

Gradient (Rasmussen and Williams 2006, *Gaussian Processes for Machine Learning*, eq. 5.9): with
alpha = K^-1 r,

    d logp / d r     = -alpha
    d logp / d theta = 0.5 tr((alpha alpha^T - K^-1) dK / dtheta),

with dK/dphi = sigma2 (-u rho'(u)) / phi (u = d / phi), dK/dsigma2 = R + JITTER I and
dK/dtau2 = I. K^-1 comes from the Cholesky factor (LAPACK ``dpotri``), so value and gradient cost
about n^3 / 3 + 2 n^3 / 3 flops, against about 4 n^3 for reverse-mode differentiation through a
Cholesky factorisation.
"""

from __future__ import annotations

import math
import sys

import numba
import numpy as np
import pytensor.tensor as pt
from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key
from scipy import linalg

from bayesgeo.gp import _lapack
from bayesgeo.gp._logp_op import LogpGradOp, source_version
from bayesgeo.gp.covariance import CLOSED_FORMS, KERNEL_FAMILIES, Covariance
from bayesgeo.common.defaults import JITTER, LOG_2PI as _LOG2PI

__all__ = ["FAST_FAMILIES", "JITTER", "covariance_matrix", "loglik_and_grad", "loglik_numpy", "marginal_loglik",
           "solve_covariance"]


#: Families with a closed-form Numba kernel (the code table of :mod:`bayesgeo.gp.covariance`); the general
#: ``matern`` uses the reference graph.
FAST_FAMILIES = KERNEL_FAMILIES

_TILE = 32  # tile edge for the mirrored (row/column) passes over the matrix: 2 x 8 kB in L1


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


# --- Numba kernels ------------------------------------------------------------------------------
# The family formulas are those of the one table (:data:`bayesgeo.gp.covariance.CLOSED_FORMS`),
# compiled here for NumPy scalars. The family is a run-time number so one compiled (and
# disk-cached) kernel serves all five; the branch is loop-invariant and predictable.

_RHO = tuple(numba.njit(inline="always")(CLOSED_FORMS[name].rho) for name in KERNEL_FAMILIES)
_DLOG = tuple(numba.njit(inline="always")(CLOSED_FORMS[name].dlog) for name in KERNEL_FAMILIES)
_RHO0, _RHO1, _RHO2, _RHO3, _RHO4 = _RHO
_DLOG0, _DLOG1, _DLOG2, _DLOG3, _DLOG4 = _DLOG


@numba.njit(cache=True, inline="always")
def rho_code(code, u):
    """Correlation rho(u) of family number ``code`` (:func:`bayesgeo.gp.covariance.kernel_code`)."""
    if code == 0:
        return _RHO0(u, np)
    if code == 1:
        return _RHO1(u, np)
    if code == 2:
        return _RHO2(u, np)
    if code == 3:
        return _RHO3(u, np)
    return _RHO4(u, np)


@numba.njit(cache=True, inline="always")
def dlog_code(code, u, r):
    """-u rho'(u) = d rho / d log(phi) of family number ``code``, given rho(u) = r."""
    if code == 0:
        return _DLOG0(u, r, np)
    if code == 1:
        return _DLOG1(u, r, np)
    if code == 2:
        return _DLOG2(u, r, np)
    if code == 3:
        return _DLOG3(u, r, np)
    return _DLOG4(u, r, np)


@numba.njit(cache=True, inline="always")
def _fill(code, dist, inv_phi, s2, diag, work, lower):
    """K = s2 rho + diag on the diagonal into the upper triangle of ``work`` and, when ``lower``, the
    correlation R into its strictly lower triangle; tile by tile so the mirrored writes stay in cache."""
    n = dist.shape[0]
    for ib in range(0, n, _TILE):
        ie = min(ib + _TILE, n)
        for jb in range(ib, n, _TILE):
            je = min(jb + _TILE, n)
            for i in range(ib, ie):
                j0 = i + 1 if jb == ib else jb
                for j in range(j0, je):
                    r = rho_code(code, dist[i, j] * inv_phi)
                    work[i, j] = s2 * r
                    if lower:
                        work[j, i] = r
    for i in range(n):
        work[i, i] = diag


@numba.njit(nogil=True, cache=True)
def _kernel(code, resid, dist, phi, s2, t2, work, addrs, grad_r, extra):
    """Family ``code``: fill ``work``, factor, invert; return (logp, g_phi, g_s2, g_t2) and write -alpha to grad_r.

    ``addrs`` are the LAPACK addresses from :func:`bayesgeo.gp._lapack.lapack_addresses`. ``extra``
    is a constant (n, n) matrix added to K (its upper triangle is read), or a (0, 0) array for none;
    it does not depend on the parameters, so the gradient formulas are unchanged.

    ``work`` (n, n) is scratch: its upper triangle holds K, then its factor, then K^-1; its
    strictly lower triangle keeps the correlation R. Invalid parameters or a failed
    factorisation give logp = -inf and a zero gradient.
    """
    n = resid.shape[0]
    ninf = -np.inf
    grad_r[:] = 0.0
    if not (phi > 0.0 and s2 >= 0.0 and t2 >= 0.0 and math.isfinite(phi) and math.isfinite(s2)
            and math.isfinite(t2)):
        return ninf, 0.0, 0.0, 0.0
    inv_phi = 1.0 / phi
    diag = s2 * (1.0 + JITTER) + t2
    _fill(code, dist, inv_phi, s2, diag, work, True)
    if extra.shape[0] > 0:
        for i in range(n):
            for j in range(i, n):
                work[i, j] += extra[i, j]
    info = _lapack.potrf_upper(work, addrs)
    if info != 0:
        return ninf, 0.0, 0.0, 0.0
    logdet = 0.0
    for i in range(n):
        logdet += math.log(work[i, i])
    logdet *= 2.0
    alpha = resid.copy()
    _lapack.potrs_upper(work, alpha, addrs)
    quad = 0.0
    for i in range(n):
        quad += resid[i] * alpha[i]
    logp = -0.5 * (quad + logdet + n * 1.8378770664093453)  # log(2 pi)
    if not math.isfinite(logp):
        return ninf, 0.0, 0.0, 0.0
    info = _lapack.potri_upper(work, addrs)
    if info != 0:
        return ninf, 0.0, 0.0, 0.0
    # 0.5 tr(W dK), W = alpha alpha^T - K^-1, summed over pairs i < j (factor 2) and the diagonal
    s_r = 0.0
    s_g = 0.0
    for ib in range(0, n, _TILE):
        ie = min(ib + _TILE, n)
        for jb in range(ib, n, _TILE):
            je = min(jb + _TILE, n)
            for i in range(ib, ie):
                ai = alpha[i]
                j0 = i + 1 if jb == ib else jb
                for j in range(j0, je):
                    w = ai * alpha[j] - work[i, j]
                    r = work[j, i]
                    s_r += w * r
                    s_g += w * dlog_code(code, dist[i, j] * inv_phi, r)
    s_d = 0.0
    for i in range(n):
        s_d += alpha[i] * alpha[i] - work[i, i]
    for i in range(n):
        grad_r[i] = -alpha[i]
    g_t2 = 0.5 * s_d
    g_s2 = s_r + 0.5 * (1.0 + JITTER) * s_d
    g_phi = s2 * inv_phi * s_g
    return logp, g_phi, g_s2, g_t2


@numba.njit(nogil=True, cache=True)
def _solve_kernel(code, dist, phi, s2, t2, rhs, work, addrs):
    """Fill ``work`` with K (upper triangle, as :func:`_kernel`), factor it and overwrite each row of
    ``rhs`` (k, n) with K^-1 times it. Returns LAPACK's ``info`` (0: success)."""
    _fill(code, dist, 1.0 / phi, s2, s2 * (1.0 + JITTER) + t2, work, False)
    info = _lapack.potrf_upper(work, addrs)
    if info != 0:
        return info
    for c in range(rhs.shape[0]):
        b = rhs[c].copy()
        _lapack.potrs_upper(work, b, addrs)
        rhs[c] = b
    return 0


def solve_covariance(dist: np.ndarray, covariance: Covariance, scale: float, partial_sill: float,
                     nugget: float, rhs: np.ndarray) -> np.ndarray:
    """K^-1 rhs for the K of :func:`covariance_matrix` (jitter included), ``rhs`` of shape (n, k).

    Families of :data:`FAST_FAMILIES` use the Numba kernel (K built in place, LAPACK ``dpotrf``);
    others go through SciPy. Raises ``numpy.linalg.LinAlgError`` when K is not positive definite.
    """
    rhs = np.asarray(rhs, dtype=float)
    if covariance.name not in FAST_FAMILIES:
        k = covariance_matrix(dist, covariance, scale, partial_sill, nugget)
        return linalg.cho_solve(linalg.cho_factor(k, lower=True, check_finite=False), rhs, check_finite=False)
    dist = np.ascontiguousarray(dist, dtype=float)
    out = np.ascontiguousarray(rhs.T)
    info = _solve_kernel(FAST_FAMILIES.index(covariance.name), dist, float(scale), float(partial_sill),
                         float(nugget), out, _lapack.workspace(dist.shape[0]), _lapack.lapack_addresses())
    if info != 0:
        raise np.linalg.LinAlgError(f"covariance matrix not positive definite (LAPACK info {info})")
    return out.T


# PyTensor caches compiled Numba code on disk under a key made of the Op's properties and this
# number: derive it from the source of the kernel modules so that an edit invalidates the cache.
_SOURCE_VERSION = source_version(_lapack, sys.modules[__name__])


def _check_family(covariance: Covariance) -> str:
    if covariance.name not in FAST_FAMILIES:
        raise ValueError(f"covariance {covariance.name!r} has no fast kernel; "
                         f"the fast path covers: {', '.join(FAST_FAMILIES)}")
    return covariance.name


def loglik_and_grad(resid: np.ndarray, dist: np.ndarray, covariance: Covariance, scale: float,
                    partial_sill: float, nugget: float, *,
                    extra: np.ndarray | None = None) -> tuple[float, np.ndarray, float, float, float]:
    """Log-likelihood and its analytic gradient from one Cholesky factorisation.

    Parameters
    ----------
    resid : ndarray, shape (n,)
        Data minus trend.
    dist : ndarray, shape (n, n)
        Symmetric distances between the sites (units of ``scale``); only the strict upper
        triangle is read (the diagonal is taken as zero distance).
    covariance : Covariance
        One of :data:`FAST_FAMILIES`.
    scale, partial_sill, nugget : float
        phi (distance units), sigma2 and tau2 (squared data units).
    extra : ndarray, shape (n, n), optional
        A constant symmetric matrix added to K (for example b^2 F F^T, the covariance of a
        trend with a Normal(0, b^2) prior integrated out).

    Returns
    -------
    logp : float
        log N(resid | 0, K (+ extra)); ``-inf`` for invalid parameters or a matrix that is not
        positive definite.
    d_resid : ndarray, shape (n,)
        d logp / d resid = -K^-1 resid.
    d_scale, d_partial_sill, d_nugget : float
        d logp / d phi, d sigma2, d tau2 (zero where logp is -inf).

    References
    ----------
    Rasmussen, C. E. and Williams, C. K. I. (2006). *Gaussian Processes for Machine Learning*,
    MIT Press, sec. 5.4.1, eq. 5.9.
    """
    return _loglik_and_grad(_check_family(covariance), resid, dist, scale, partial_sill, nugget, extra)


_NO_EXTRA = np.zeros((0, 0))


def _loglik_and_grad(family, resid, dist, scale, partial_sill, nugget, extra=None):
    resid = np.ascontiguousarray(resid, dtype=float)
    dist = np.ascontiguousarray(dist, dtype=float)
    n = resid.shape[0]
    if resid.ndim != 1 or dist.shape != (n, n):
        raise ValueError(f"resid must have shape (n,) and dist (n, n); got {resid.shape} and {dist.shape}")
    extra = _NO_EXTRA if extra is None or np.size(extra) == 0 else np.ascontiguousarray(extra, dtype=float)
    if extra.shape not in ((0, 0), (n, n)):
        raise ValueError(f"extra must have shape (n, n) = {(n, n)}; got {extra.shape}")
    grad_r = np.empty(n)
    logp, g_phi, g_s2, g_t2 = _kernel(FAST_FAMILIES.index(family), resid, dist, float(scale),
                                      float(partial_sill), float(nugget), _lapack.workspace(n),
                                      _lapack.lapack_addresses(), grad_r, extra)
    return logp, grad_r, g_phi, g_s2, g_t2


# --- PyTensor Op --------------------------------------------------------------------------------


class GPLogpGrad(LogpGradOp):
    """Outputs (logp, d logp/d resid, d logp/d scale, d logp/d partial_sill, d logp/d nugget).

    Inputs: resid (n,), dist (n, n), scale, partial_sill, nugget (scalars) and, when
    ``with_extra``, a constant (n, n) matrix added to K. One factorisation serves the value and the
    whole gradient; :meth:`pullback` only scales the stored gradient. ``perform`` (Python linkers)
    and the Numba implementation (nutpie, Numba linker) run the same compiled kernel.
    """

    __props__ = ("family", "with_extra")

    def __init__(self, family: str, with_extra: bool = False):
        if family not in FAST_FAMILIES:
            raise ValueError(f"no fast kernel for covariance {family!r}; choose one of: {', '.join(FAST_FAMILIES)}")
        self.family = family
        self.with_extra = bool(with_extra)

    def make_node(self, resid, dist, scale, partial_sill, nugget, extra=None):
        resid = pt.as_tensor_variable(resid).astype("float64")
        dist = pt.as_tensor_variable(dist).astype("float64")
        scalars = [pt.as_tensor_variable(v).astype("float64") for v in (scale, partial_sill, nugget)]
        if resid.type.ndim != 1 or dist.type.ndim != 2 or any(s.type.ndim != 0 for s in scalars):
            raise TypeError("GPLogpGrad needs resid (n,), dist (n, n) and three scalars")
        inputs = [resid, dist, *scalars]
        if self.with_extra:
            if extra is None:
                raise TypeError("GPLogpGrad(with_extra=True) needs the extra (n, n) matrix")
            extra = pt.as_tensor_variable(extra).astype("float64")
            if extra.type.ndim != 2:
                raise TypeError("GPLogpGrad: extra must be an (n, n) matrix")
            inputs.append(extra)
        elif extra is not None:
            raise TypeError("GPLogpGrad: extra given to an Op built without with_extra=True")
        return self.apply(inputs)

    def constant_inputs(self, n_inputs):
        return (1, 5) if self.with_extra else (1,)  # dist and extra: constants of the model

    def kernel(self, inputs):
        return _loglik_and_grad(self.family, *inputs)


@register_funcify_default_op_cache_key(GPLogpGrad)
def _numba_funcify_gp_logp_grad(op, node=None, **kwargs):
    code = FAST_FAMILIES.index(op.family)
    kernel = _kernel
    workspace_nb = _lapack.workspace_nb

    if op.with_extra:
        @numba.njit
        def gp_logp_grad_extra(resid, dist, scale, psill, nugget, extra):
            n = resid.shape[0]
            grad_r = np.empty(n)
            work, addrs = workspace_nb(n)
            logp, g_phi, g_s2, g_t2 = kernel(code, resid, dist, scale.item(), psill.item(), nugget.item(), work,
                                             addrs, grad_r, extra)
            return np.asarray(logp), grad_r, np.asarray(g_phi), np.asarray(g_s2), np.asarray(g_t2)

        return gp_logp_grad_extra, _SOURCE_VERSION

    @numba.njit
    def gp_logp_grad(resid, dist, scale, psill, nugget):
        n = resid.shape[0]
        grad_r = np.empty(n)
        work, addrs = workspace_nb(n)
        logp, g_phi, g_s2, g_t2 = kernel(code, resid, dist, scale.item(), psill.item(), nugget.item(), work,
                                         addrs, grad_r, np.zeros((0, 0)))
        return np.asarray(logp), grad_r, np.asarray(g_phi), np.asarray(g_s2), np.asarray(g_t2)

    return gp_logp_grad, _SOURCE_VERSION


def marginal_loglik(resid, dist: np.ndarray, covariance: Covariance, scale, partial_sill, nugget, *,
                    method: str = "auto", extra: np.ndarray | None = None):
    """PyTensor scalar log N(resid | 0, K), or log N(resid | 0, K + extra).

    Parameters
    ----------
    resid : TensorVariable, shape (n,)
        Data minus trend, on the model's (standardised) scale.
    dist : ndarray, shape (n, n)
        Distances between the observation sites (a constant of the model).
    covariance : Covariance
        Family from :func:`bayesgeo.gp.covariance.get_covariance`.
    scale, partial_sill, nugget : TensorVariable or float
        Scalars: scale parameter phi (distance units of ``dist``), sigma2 and tau2.
    method : {"auto", "fast", "reference"}
        ``"fast"``: one Op computing value and analytic gradient from one factorisation (families
        in :data:`FAST_FAMILIES`); ``"reference"``: ``pt.linalg.cholesky`` and automatic
        differentiation (any family, slower: about 4 n^3 flops per gradient); ``"auto"`` (default):
        fast where available, else reference (the general ``matern``, whose Bessel function has
        no closed form in the Numba kernel).
    extra : ndarray, shape (n, n), optional
        A constant symmetric matrix added to K, for example b^2 F F^T: the covariance of a trend
        F beta with beta ~ Normal(0, b^2 I) integrated out (Rasmussen and Williams 2006, sec. 2.7).

    Returns
    -------
    TensorVariable
        Scalar log-likelihood; ``-inf`` where K is not positive definite (fast path) so that a
        sampler rejects the point.
    """
    if method not in ("auto", "fast", "reference"):
        raise ValueError(f"method must be 'auto', 'fast' or 'reference', got {method!r}")
    dist = np.ascontiguousarray(dist, dtype=float)
    n = dist.shape[0]
    if extra is not None:
        extra = np.ascontiguousarray(extra, dtype=float)
        if extra.shape != (n, n):
            raise ValueError(f"extra must have shape {(n, n)}, got {extra.shape}")
    if method == "fast" or (method == "auto" and covariance.name in FAST_FAMILIES):
        if extra is None:
            return GPLogpGrad(_check_family(covariance))(resid, pt.constant(dist), scale, partial_sill, nugget)[0]
        op = GPLogpGrad(_check_family(covariance), with_extra=True)
        return op(resid, pt.constant(dist), scale, partial_sill, nugget, pt.constant(extra))[0]

    k = partial_sill * covariance.pt_correlation(pt.as_tensor(dist), scale)
    k = k + (nugget + JITTER * partial_sill) * pt.eye(n)
    if extra is not None:
        k = k + pt.constant(extra)
    chol = pt.linalg.cholesky(k, lower=True)
    z = pt.linalg.solve_triangular(chol, resid, lower=True)
    logdet = 2.0 * pt.sum(pt.log(pt.diag(chol)))
    return -0.5 * (pt.dot(z, z) + logdet + n * _LOG2PI)
