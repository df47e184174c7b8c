"""The nearest-neighbour (Vecchia) likelihood with geometric anisotropy: value and analytic gradient.

The isotropic kernel (:func:`bayesgeo.gp._nn_kernels.nn_logp_grad`) with every distance replaced by the
anisotropic one of :mod:`bayesgeo.gp.anisotropy` (planar coordinates only), and two more gradient entries,
for the anisotropy vector alpha. For a parameter theta the point-i terms are (the kernel's notation)

    df = dK_ii - 2 b^T dc + b^T dC b,     dq = g^T dc - b^T dC g,     d log p_i = pf df + w dq,

and for alpha_k, with u = h / phi and dlog = -u rho'(u), every covariance entry has

    dK / d alpha_k = -sigma2 dlog (d h^2 / d alpha_k) / (2 h^2)        (dK_ii / d alpha_k = 0),

the same structure as the scale's derivative sigma2 dlog / phi with another weight per pair. The ordering
and neighbour sets stay those of the isotropic model (Euclidean nearest earlier points): any fixed choice
gives a valid Vecchia likelihood; its accuracy for strongly anisotropic fields is checked against the exact
likelihood in ``tests/test_anisotropy.py``.
"""

from __future__ import annotations

import math
import sys

import numba
import numpy as np
import pytensor.tensor as pt
from pytensor.link.numba.dispatch.basic import register_funcify_default_op_cache_key

from bayesgeo.common.defaults import JITTER
from bayesgeo.gp import _nn_kernels as _nb
from bayesgeo.gp import anisotropy as _an
from bayesgeo.gp._logp_op import LogpGradOp, source_version
from bayesgeo.gp.dense import FAST_FAMILIES, dlog_code, rho_code

__all__ = ["nn_aniso_loglik_and_grad", "nn_loglik_aniso"]


@numba.njit(cache=True, inline="always")
def _pair(code, dx, dy, a1, a2, ch, sc, tt, inv_phi):
    """(rho, dlog, weight_1, weight_2) of one separation: weight_k = -dlog (d h^2 / d alpha_k) / (2 h^2)."""
    h2, g1, g2 = _an.h2_and_grad(dx, dy, a1, a2, ch, sc, tt)
    h = math.sqrt(max(h2, 0.0))
    u = h * inv_phi
    r = rho_code(code, u)
    dl = dlog_code(code, u, r)
    if not h2 > 0.0:
        return r, dl, 0.0, 0.0
    f = -dl / (2.0 * h2)
    return r, dl, f * g1, f * g2


@numba.njit(nogil=True, cache=True)
def nn_aniso_kernel(code, inv_ds, resid, coords, nbr, phi, s2, t2, a1, a2, grad_r):
    """(logp, d phi, d s2, d t2, d alpha_1, d alpha_2); writes d resid to ``grad_r`` (module docstring)."""
    n, m = nbr.shape
    ninf = -np.inf
    for i in range(n):
        grad_r[i] = 0.0
    if not (phi > 0.0 and s2 >= 0.0 and t2 >= 0.0 and math.isfinite(phi) and math.isfinite(s2)
            and math.isfinite(t2) and math.isfinite(a1) and math.isfinite(a2)):
        return ninf, 0.0, 0.0, 0.0, 0.0, 0.0
    ch, sc, tt = _an.shape_terms(a1, a2)
    inv_phi = 1.0 / phi
    diag = s2 * (1.0 + JITTER) + t2
    chol = np.empty((m, m))
    rr = np.empty((m, m))
    gg = np.empty((m, m))
    w1 = np.empty((m, m))
    w2 = np.empty((m, m))
    rc = np.empty(m)
    gc = np.empty(m)
    c1 = np.empty(m)
    c2 = np.empty(m)
    b = np.empty(m)
    g = np.empty(m)
    yn = np.empty(m)
    lin = np.empty((4, 2))  # rows: rho, dlog, alpha_1, alpha_2; columns: . b, . g
    quad = np.empty((4, 2))
    logp = 0.0
    d = np.zeros(5)  # phi, s2, t2, alpha_1, alpha_2
    for i in range(n):
        k = 0
        while k < m and nbr[i, k] >= 0:
            k += 1
        xi = coords[i, 0] * inv_ds
        yi = coords[i, 1] * inv_ds
        for a in range(k):
            ja = nbr[i, a]
            xa = coords[ja, 0] * inv_ds
            ya = coords[ja, 1] * inv_ds
            r, dl, f1, f2 = _pair(code, xa - xi, ya - yi, a1, a2, ch, sc, tt, inv_phi)
            rc[a], gc[a], c1[a], c2[a] = r, dl, f1, f2
            b[a] = s2 * r
            yn[a] = resid[ja]
            g[a] = yn[a]
            chol[a, a] = diag
            for c in range(a):
                jc = nbr[i, c]
                r, dl, f1, f2 = _pair(code, coords[jc, 0] * inv_ds - xa, coords[jc, 1] * inv_ds - ya, a1, a2, ch,
                                      sc, tt, inv_phi)
                rr[a, c], gg[a, c], w1[a, c], w2[a, c] = r, dl, f1, f2
                chol[a, c] = s2 * r
        ok, lp_i, f, w = _nb._point_step(chol, k, b, g, rc, yn, s2, diag, resid[i], grad_r, nbr[i], i)
        if not ok:
            for j in range(n):
                grad_r[j] = 0.0
            return ninf, 0.0, 0.0, 0.0, 0.0, 0.0
        inv_f = 1.0 / f
        logp += lp_i
        # linear (v . b, v . g) and pair (sum_{a>c} V_ac (b_a b_c), (b_a g_c + b_c g_a)) forms
        bb = bg = 0.0
        lin[:] = 0.0
        quad[:] = 0.0
        for a in range(k):
            ba = b[a]
            ga = g[a]
            bb += ba * ba
            bg += ba * ga
            for row, v in enumerate((rc[a], gc[a], c1[a], c2[a])):
                lin[row, 0] += v * ba
                lin[row, 1] += v * ga
            for c in range(a):
                pb = ba * b[c]
                pg = ba * g[c] + b[c] * ga
                for row, v in enumerate((rr[a, c], gg[a, c], w1[a, c], w2[a, c])):
                    quad[row, 0] += v * pb
                    quad[row, 1] += v * pg
        pf = 0.5 * (w * w - inv_f)
        df = (1.0 + JITTER) - 2.0 * lin[0, 0] + (1.0 + JITTER) * bb + 2.0 * quad[0, 0]
        d[1] += pf * df + w * (lin[0, 1] - ((1.0 + JITTER) * bg + quad[0, 1]))
        d[2] += pf * (1.0 + bb) + w * (-bg)
        d[0] += s2 * inv_phi * (pf * (-2.0 * lin[1, 0] + 2.0 * quad[1, 0]) + w * (lin[1, 1] - quad[1, 1]))
        for row in (2, 3):
            d[row + 1] += s2 * (pf * (-2.0 * lin[row, 0] + 2.0 * quad[row, 0]) + w * (lin[row, 1] - quad[row, 1]))
    if not math.isfinite(logp):
        for j in range(n):
            grad_r[j] = 0.0
        return ninf, 0.0, 0.0, 0.0, 0.0, 0.0
    return logp, d[0], d[1], d[2], d[3], d[4]


def nn_aniso_loglik_and_grad(resid, xy, covariance, scale, partial_sill, nugget, alpha, *, nbr,
                             distance_scale: float = 1.0):
    """Vecchia log-likelihood with anisotropic distances and its gradient (NumPy in, NumPy out).

    ``nbr`` the neighbour sets (:func:`bayesgeo.gp.nn.nearest_previous`), ``xy`` planar coordinates, distances
    divided by ``distance_scale``; returns ``(logp, d_resid, d_scale, d_partial_sill, d_nugget, d_alpha (2,))``.
    """
    resid = np.ascontiguousarray(resid, dtype=float)
    grad_r = np.empty(resid.shape[0])
    out = nn_aniso_kernel(FAST_FAMILIES.index(covariance.name if hasattr(covariance, "name") else covariance),
                          1.0 / float(distance_scale), resid, np.ascontiguousarray(xy, dtype=float),
                          np.ascontiguousarray(nbr, dtype=np.int64), float(scale), float(partial_sill), float(nugget),
                          float(alpha[0]), float(alpha[1]), grad_r)
    return out[0], grad_r, out[1], out[2], out[3], np.array([out[4], out[5]])


class NNAnisoLogpGrad(LogpGradOp):
    """Outputs (logp, d/d resid, d/d scale, d/d partial_sill, d/d nugget, d/d alpha_1, d/d alpha_2).

    Inputs: resid (n,), coords (n, 2), nbr (n, m) int64 (constants), then five scalars.
    """

    __props__ = ("family", "inv_ds")
    n_params = 5

    def __init__(self, family: str, inv_ds: float = 1.0):
        if family not in FAST_FAMILIES:
            raise ValueError(f"no nearest-neighbour kernel for covariance {family!r}")
        self.family = family
        self.inv_ds = float(inv_ds)

    def make_node(self, resid, coords, nbr, scale, partial_sill, nugget, a1, a2):
        resid = pt.as_tensor_variable(resid).astype("float64")
        coords = pt.as_tensor_variable(coords).astype("float64")
        nbr = pt.as_tensor_variable(nbr).astype("int64")
        scalars = [pt.as_tensor_variable(v).astype("float64") for v in (scale, partial_sill, nugget, a1, a2)]
        return self.apply([resid, coords, nbr, *scalars])

    def constant_inputs(self, n_inputs):
        return (1, 2)

    def kernel(self, inputs):
        resid, coords, nbr, scale, psill, nugget, a1, a2 = inputs
        grad_r = np.empty(resid.shape[0])
        res = nn_aniso_kernel(FAST_FAMILIES.index(self.family), self.inv_ds, np.ascontiguousarray(resid),
                              np.ascontiguousarray(coords), np.ascontiguousarray(nbr), float(scale), float(psill),
                              float(nugget), float(a1), float(a2), grad_r)
        return res[0], grad_r, res[1], res[2], res[3], res[4], res[5]


_SOURCE_VERSION = source_version(_nb, _an, sys.modules[__name__])


@register_funcify_default_op_cache_key(NNAnisoLogpGrad)
def _numba_funcify(op, node=None, **kwargs):
    code = FAST_FAMILIES.index(op.family)
    inv_ds = op.inv_ds
    kernel = nn_aniso_kernel

    @numba.njit
    def run(resid, coords, nbr, scale, psill, nugget, a1, a2):
        grad_r = np.empty(resid.shape[0])
        lp, g0, g1, g2, g3, g4 = kernel(code, inv_ds, np.ascontiguousarray(resid), np.ascontiguousarray(coords),
                                        np.ascontiguousarray(nbr), scale.item(), psill.item(), nugget.item(),
                                        a1.item(), a2.item(), grad_r)
        return (np.asarray(lp), grad_r, np.asarray(g0), np.asarray(g1), np.asarray(g2), np.asarray(g3),
                np.asarray(g4))

    return run, _SOURCE_VERSION


def nn_loglik_aniso(resid, xy, covariance, scale, partial_sill, nugget, alpha, *, nbr, distance_scale: float):
    """PyTensor scalar: the Vecchia likelihood with anisotropic distances (``alpha`` a length-2 tensor;
    ``nbr`` and ``xy`` constants of the graph, planar coordinates divided by ``distance_scale``)."""
    op = NNAnisoLogpGrad(covariance.name, 1.0 / float(distance_scale))
    return op(resid, pt.constant(np.ascontiguousarray(xy, dtype=float)),
              pt.constant(np.ascontiguousarray(nbr, dtype=np.int64)), scale, partial_sill, nugget, alpha[0],
              alpha[1])[0]
