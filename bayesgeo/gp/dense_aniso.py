"""The exact (dense) likelihood with geometric anisotropy: value and analytic gradient from one factorisation.

The anisotropic distance h of every pair (:mod:`bayesgeo.gp.anisotropy`) is computed from the coordinates
and the anisotropy vector alpha, the isotropic kernel (:func:`bayesgeo.gp.dense._kernel`) gives log N(r | 0, K)
and its gradient in the scale, sills and residuals, and one more pass over the pairs gives the gradient in
alpha (Rasmussen and Williams 2006, eq. 5.9, with dK / d alpha_k by the chain rule):

    dK_ij / d alpha_k = sigma2 rho'(u) / phi * dh / d alpha_k = -sigma2 dlog_ij (d h^2 / d alpha_k) / (2 h^2),

where dlog = -u rho'(u) (u = h / phi) is the kernel's own d rho / d log(phi). Extra cost against the
isotropic likelihood: two O(n^2) passes (distances, then the alpha gradient) besides the n^3 factorisation.
"""

from __future__ import annotations

import math
import sys

import numba
import numpy as np
import pytensor.tensor as pt
from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key

from bayesgeo.gp import _lapack
from bayesgeo.gp import anisotropy as _an
from bayesgeo.gp import dense as _dense
from bayesgeo.gp._logp_op import LogpGradOp, source_version

__all__ = ["aniso_loglik_and_grad", "marginal_loglik_aniso"]


@numba.njit(nogil=True, cache=True)
def _kernel_aniso(code, resid, xy, phi, s2, t2, a1, a2, work, addrs, grad_r, extra, dist):
    """(logp, g_phi, g_s2, g_t2, g_a1, g_a2); ``xy`` (n, 2) scaled coordinates, ``dist`` (n, n) scratch."""
    n = resid.shape[0]
    ninf = -np.inf
    if not (math.isfinite(a1) and math.isfinite(a2)):
        grad_r[:] = 0.0
        return ninf, 0.0, 0.0, 0.0, 0.0, 0.0
    ch, sc, tt = _an.shape_terms(a1, a2)
    for i in range(n):
        for j in range(i + 1, n):
            h2, _, _ = _an.h2_and_grad(xy[j, 0] - xy[i, 0], xy[j, 1] - xy[i, 1], a1, a2, ch, sc, tt)
            dist[i, j] = math.sqrt(max(h2, 0.0))
    logp, g_phi, g_s2, g_t2 = _dense._kernel(code, resid, dist, phi, s2, t2, work, addrs, grad_r, extra)
    if not math.isfinite(logp):
        return ninf, 0.0, 0.0, 0.0, 0.0, 0.0
    inv_phi = 1.0 / phi
    s_1 = 0.0
    s_2 = 0.0
    for i in range(n):
        ai = -grad_r[i]  # alpha = K^-1 r
        for j in range(i + 1, n):
            h = dist[i, j]
            if not h > 0.0:
                continue
            w = ai * (-grad_r[j]) - work[i, j]  # W = alpha alpha^T - K^-1 (upper triangle of work)
            f = w * _dense.dlog_code(code, h * inv_phi, work[j, i]) / (2.0 * h * h)  # R in the lower triangle
            _, g1, g2 = _an.h2_and_grad(xy[j, 0] - xy[i, 0], xy[j, 1] - xy[i, 1], a1, a2, ch, sc, tt)
            s_1 += f * g1
            s_2 += f * g2
    return logp, g_phi, g_s2, g_t2, -s2 * s_1, -s2 * s_2


def aniso_loglik_and_grad(resid, xy, covariance, scale, partial_sill, nugget, alpha, *, extra=None):
    """log N(resid | 0, K) with anisotropic distances, and its gradient.

    Parameters
    ----------
    resid : ndarray (n,)
    xy : ndarray (n, 2)
        Planar coordinates in the units of ``scale``.
    covariance : Covariance
        One of :data:`bayesgeo.gp.dense.FAST_FAMILIES`.
    scale, partial_sill, nugget : float
        phi (geometric-mean scale), sigma2, tau2.
    alpha : sequence of 2 floats
        The anisotropy vector (:func:`bayesgeo.gp.anisotropy.anisotropy_vector`).
    extra : ndarray (n, n), optional
        A constant added to K (:func:`bayesgeo.gp.dense.loglik_and_grad`).

    Returns
    -------
    logp, d_resid, d_scale, d_partial_sill, d_nugget, d_alpha (2,)
    """
    return _call(_dense._check_family(covariance), resid, xy, scale, partial_sill, nugget, alpha[0], alpha[1], extra)


def _call(family, resid, xy, scale, partial_sill, nugget, a1, a2, extra=None):
    resid = np.ascontiguousarray(resid, dtype=float)
    xy = np.ascontiguousarray(xy, dtype=float)
    n = resid.shape[0]
    if resid.ndim != 1 or xy.shape != (n, 2):
        raise ValueError(f"resid must have shape (n,) and xy (n, 2); got {resid.shape} and {xy.shape}")
    extra = _dense._NO_EXTRA if extra is None or np.size(extra) == 0 else np.ascontiguousarray(extra, dtype=float)
    grad_r = np.empty(n)
    out = _kernel_aniso(_dense.FAST_FAMILIES.index(family), resid, xy, float(scale), float(partial_sill),
                        float(nugget), float(a1), float(a2), _lapack.workspace(n), _lapack.lapack_addresses(), grad_r,
                        extra, np.zeros((n, n)))
    logp, g_phi, g_s2, g_t2, g_1, g_2 = out
    return logp, grad_r, g_phi, g_s2, g_t2, np.array([g_1, g_2])


_SOURCE_VERSION = source_version(_lapack, _an, _dense, sys.modules[__name__])


class GPAnisoLogpGrad(LogpGradOp):
    """Outputs (logp, d/d resid, d/d scale, d/d partial_sill, d/d nugget, d/d alpha_1, d/d alpha_2).

    Inputs: resid (n,), xy (n, 2) constant, scale, partial_sill, nugget, alpha_1, alpha_2 (scalars) and,
    when ``with_extra``, a constant (n, n) matrix added to K.
    """

    __props__ = ("family", "with_extra")
    n_params = 5

    def __init__(self, family: str, with_extra: bool = False):
        self.family = _dense._check_family(_dense_family(family))
        self.with_extra = bool(with_extra)

    def make_node(self, resid, xy, scale, partial_sill, nugget, a1, a2, extra=None):
        resid = pt.as_tensor_variable(resid).astype("float64")
        xy = pt.as_tensor_variable(xy).astype("float64")
        scalars = [pt.as_tensor_variable(v).astype("float64") for v in (scale, partial_sill, nugget, a1, a2)]
        if resid.type.ndim != 1 or xy.type.ndim != 2 or any(s.type.ndim != 0 for s in scalars):
            raise TypeError("GPAnisoLogpGrad needs resid (n,), xy (n, 2) and five scalars")
        inputs = [resid, xy, *scalars]
        if self.with_extra:
            inputs.append(pt.as_tensor_variable(extra).astype("float64"))
        return self.apply(inputs)

    def constant_inputs(self, n_inputs):
        return (1, 7) if self.with_extra else (1,)

    def kernel(self, inputs):
        logp, grad_r, g_phi, g_s2, g_t2, g_a = _call(self.family, *inputs)
        return logp, grad_r, g_phi, g_s2, g_t2, g_a[0], g_a[1]


def _dense_family(family: str):
    from bayesgeo.gp.covariance import get_covariance

    return get_covariance(family)


@register_funcify_default_op_cache_key(GPAnisoLogpGrad)
def _numba_funcify_aniso(op, node=None, **kwargs):
    code = _dense.FAST_FAMILIES.index(op.family)
    kernel = _kernel_aniso
    workspace_nb = _lapack.workspace_nb

    @numba.njit
    def run(resid, xy, scale, psill, nugget, a1, a2, extra):
        n = resid.shape[0]
        grad_r = np.empty(n)
        work, addrs = workspace_nb(n)
        logp, g_phi, g_s2, g_t2, g_1, g_2 = kernel(code, resid, xy, scale.item(), psill.item(), nugget.item(),
                                                   a1.item(), a2.item(), work, addrs, grad_r, extra,
                                                   np.zeros((n, n)))
        return (np.asarray(logp), grad_r, np.asarray(g_phi), np.asarray(g_s2), np.asarray(g_t2), np.asarray(g_1),
                np.asarray(g_2))

    if op.with_extra:
        return run, _SOURCE_VERSION

    @numba.njit
    def run_plain(resid, xy, scale, psill, nugget, a1, a2):
        return run(resid, xy, scale, psill, nugget, a1, a2, np.zeros((0, 0)))

    return run_plain, _SOURCE_VERSION


def marginal_loglik_aniso(resid, xy: np.ndarray, covariance, scale, partial_sill, nugget, alpha, *,
                          extra: np.ndarray | None = None):
    """PyTensor scalar log N(resid | 0, K (+ extra)) with anisotropic distances (one Op, analytic gradient).

    ``xy`` (n, 2) planar coordinates in the units of ``scale`` (a constant); ``alpha`` a length-2 tensor, the
    anisotropy vector; the other arguments as :func:`bayesgeo.gp.dense.marginal_loglik`.
    """
    xy = pt.constant(np.ascontiguousarray(xy, dtype=float))
    op = GPAnisoLogpGrad(covariance.name, with_extra=extra is not None)
    args = [resid, xy, scale, partial_sill, nugget, alpha[0], alpha[1]]
    if extra is not None:
        args.append(pt.constant(np.ascontiguousarray(extra, dtype=float)))
    return op(*args)[0]
