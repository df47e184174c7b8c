"""Numba kernels of the nearest-neighbour (Vecchia) likelihood and prediction.

Every kernel works on one point (or target) at a time with at most ``m`` neighbours, so memory
is O(m^2) scratch plus the inputs and time is O(n m^3). Distances are computed from the
coordinates on the fly (``metric`` 0: planar, 1: great-circle from degrees) and multiplied by
``inv_ds`` (1 / the model's distance scale), so no n x m x m array is ever stored.

The covariance family is a run-time number, the index in
:data:`bayesgeo.gp.dense.FAST_FAMILIES`; the correlation rho(u) and d rho / d log(phi) come
from the dense kernel's helpers so both likelihoods use one definition.

Notation for point i with neighbour set N (k <= m points, earlier in the ordering):

    C = K[N, N],  c = K[N, i],  b = C^-1 c,  g = C^-1 y_N,
    f = K_ii - c^T b,  e = y_i - b^T y_N,
    log p_i = -0.5 (log 2 pi + log f + e^2 / f),

and for a parameter theta with derivatives dC, dc, dK_ii (differentiating b = C^-1 c):

    df = dK_ii - 2 b^T dc + b^T dC b,    de = -(g^T dc - b^T dC g),
    d log p_i = 0.5 (e^2 / f^2 - 1 / f) df - (e / f) de.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from bayesgeo.gp.dense import dlog_code, rho_code

from bayesgeo.common.defaults import JITTER
from bayesgeo.common.defaults import EARTH_RADIUS_KM as _EARTH_RADIUS_KM, LOG_2PI as _LOG2PI

_DEG = math.pi / 180.0


@numba.njit(cache=True, inline="always")
def _distance(ax, ay, bx, by, metric):
    """Planar distance, or haversine great-circle distance in km between (lon, lat) degrees."""
    if metric == 0:
        dx = ax - bx
        dy = ay - by
        return math.sqrt(dx * dx + dy * dy)
    la1 = ay * _DEG
    la2 = by * _DEG
    s1 = math.sin(0.5 * (la2 - la1))
    s2 = math.sin(0.5 * (bx - ax) * _DEG)
    a = s1 * s1 + math.cos(la1) * math.cos(la2) * s2 * s2
    a = min(max(a, 0.0), 1.0)
    return 2.0 * _EARTH_RADIUS_KM * math.asin(math.sqrt(a))


@numba.njit(cache=True, inline="always")
def _cholesky(a, k):
    """In-place lower Cholesky factor of the leading k x k block of ``a``; False if not positive definite."""
    for j in range(k):
        s = a[j, j]
        for p in range(j):
            s -= a[j, p] * a[j, p]
        if not s > 0.0:
            return False
        ljj = math.sqrt(s)
        a[j, j] = ljj
        for i in range(j + 1, k):
            t = a[i, j]
            for p in range(j):
                t -= a[i, p] * a[j, p]
            a[i, j] = t / ljj
    return True


@numba.njit(cache=True, inline="always")
def _cho_solve(a, k, x):
    """Solve (L L^T) z = x in place of x[:k], L the lower factor in ``a``."""
    for i in range(k):
        t = x[i]
        for p in range(i):
            t -= a[i, p] * x[p]
        x[i] = t / a[i, i]
    for i in range(k - 1, -1, -1):
        t = x[i]
        for p in range(i + 1, k):
            t -= a[p, i] * x[p]
        x[i] = t / a[i, i]


@numba.njit(cache=True, inline="always")
def _point_step(chol, k, b, g, rc, yn, s2, diag, resid_i, grad_r, nbr_row, i):
    """One point's conditional: factor ``chol``, b = C^-1 c and g = C^-1 y_N in place, f and e; the
    log-density term; d logp / d resid scattered into ``grad_r``. Returns (ok, logp_i, f, w = e / f);
    ok False when the neighbour matrix is not positive definite or f <= 0 (the caller returns -inf)."""
    if not _cholesky(chol, k):
        return False, 0.0, 0.0, 0.0
    _cho_solve(chol, k, b)
    _cho_solve(chol, k, g)
    f = diag
    e = resid_i
    for a in range(k):
        f -= s2 * rc[a] * b[a]
        e -= b[a] * yn[a]
    if not f > 0.0:
        return False, 0.0, 0.0, 0.0
    w = e * (1.0 / f)
    grad_r[i] -= w
    for a in range(k):
        grad_r[nbr_row[a]] += w * b[a]
    return True, -0.5 * (_LOG2PI + math.log(f) + e * w), f, w


@numba.njit(nogil=True, cache=True)
def nn_logp_grad(code, metric, inv_ds, resid, coords, nbr, phi, s2, t2, grad_r):
    """Vecchia log-likelihood and gradient; returns (logp, d phi, d s2, d t2), writes d resid to grad_r.

    ``nbr`` (n, m) holds for each point (original indexing) the indices of its conditioning set,
    padded with -1. Invalid parameters or a matrix that is not positive definite give -inf and a
    zero gradient.
    """
    n, m = nbr.shape
    ninf = -np.inf
    for i in range(n):
        grad_r[i] = 0.0
    if not (phi > 0.0 and s2 >= 0.0 and t2 >= 0.0 and math.isfinite(phi) and math.isfinite(s2)
            and math.isfinite(t2)):
        return ninf, 0.0, 0.0, 0.0
    inv_phi = 1.0 / phi
    diag = s2 * (1.0 + JITTER) + t2
    chol = np.empty((m, m))
    rr = np.empty((m, m))   # correlation among neighbours (strict lower triangle)
    gg = np.empty((m, m))   # d rho / d log(phi) among neighbours (strict lower triangle)
    rc = np.empty(m)
    gc = np.empty(m)
    b = np.empty(m)
    g = np.empty(m)
    yn = np.empty(m)
    logp = 0.0
    d_phi = 0.0
    d_s2 = 0.0
    d_t2 = 0.0
    for i in range(n):
        k = 0
        while k < m and nbr[i, k] >= 0:
            k += 1
        xi = coords[i, 0]
        yi = coords[i, 1]
        for a in range(k):
            ja = nbr[i, a]
            xa = coords[ja, 0]
            ya = coords[ja, 1]
            u = _distance(xi, yi, xa, ya, metric) * inv_ds * inv_phi
            r = rho_code(code, u)
            rc[a] = r
            gc[a] = dlog_code(code, u, r)
            b[a] = s2 * r
            yn[a] = resid[ja]
            g[a] = yn[a]
            chol[a, a] = diag
            for c in range(a):
                jc = nbr[i, c]
                u = _distance(xa, ya, coords[jc, 0], coords[jc, 1], metric) * inv_ds * inv_phi
                r = rho_code(code, u)
                rr[a, c] = r
                gg[a, c] = dlog_code(code, u, r)
                chol[a, c] = s2 * r
        ok, lp_i, f, w = _point_step(chol, k, b, g, rc, yn, s2, diag, resid[i], grad_r, nbr[i], i)
        if not ok:
            for j in range(n):
                grad_r[j] = 0.0
            return ninf, 0.0, 0.0, 0.0
        inv_f = 1.0 / f
        logp += lp_i
        # quadratic forms b^T dC b and b^T dC g, diagonal and off-diagonal parts separately
        bb = 0.0
        bg = 0.0
        rcb = 0.0
        rcg = 0.0
        gcb = 0.0
        gcg = 0.0
        rbb = 0.0
        rbg = 0.0
        gbb = 0.0
        gbg = 0.0
        for a in range(k):
            ba = b[a]
            ga = g[a]
            bb += ba * ba
            bg += ba * ga
            rcb += rc[a] * ba
            rcg += rc[a] * ga
            gcb += gc[a] * ba
            gcg += gc[a] * ga
            for c in range(a):
                pb = ba * b[c]
                pg = ba * g[c] + b[c] * ga
                rbb += rr[a, c] * pb
                rbg += rr[a, c] * pg
                gbb += gg[a, c] * pb
                gbg += gg[a, c] * pg
        pf = 0.5 * (w * w - inv_f)
        # partial sill: dC = R (+ JITTER on the diagonal), dc = rho, dK_ii = 1 + JITTER
        df = (1.0 + JITTER) - 2.0 * rcb + (1.0 + JITTER) * bb + 2.0 * rbb
        dq = rcg - ((1.0 + JITTER) * bg + rbg)
        d_s2 += pf * df + w * dq
        # nugget: dC = I, dc = 0, dK_ii = 1
        d_t2 += pf * (1.0 + bb) + w * (-bg)
        # scale: dC = s2 G / phi (zero diagonal), dc = s2 gc / phi, dK_ii = 0
        df = s2 * inv_phi * (-2.0 * gcb + 2.0 * gbb)
        dq = s2 * inv_phi * (gcg - gbg)
        d_phi += pf * df + w * dq
    if not math.isfinite(logp):
        for j in range(n):
            grad_r[j] = 0.0
        return ninf, 0.0, 0.0, 0.0
    return logp, d_phi, d_s2, d_t2


@numba.njit(nogil=True, cache=True)
def nn_moments(code, metric, xy_obs, values, design_obs, xy_new, design_new, nbr, phi, s2, t2, beta,
               include_nugget, jitter, mean, var):
    """Per draw and target: simple-kriging mean and variance from the target's neighbours.

    ``nbr`` (T, m) indexes the data (padded with -1); ``phi``, ``s2``, ``t2`` (D,), ``beta`` (D, p);
    writes ``mean`` and ``var`` (D, T). A draw whose neighbour matrix does not factorise gets NaN.
    """
    n_t, m = nbr.shape
    n_d = phi.shape[0]
    p = beta.shape[1]
    dnn = np.empty((m, m))
    dcn = np.empty(m)
    chol = np.empty((m, m))
    c = np.empty(m)
    b = np.empty(m)
    for t in range(n_t):
        k = 0
        while k < m and nbr[t, k] >= 0:
            k += 1
        for a in range(k):
            ja = nbr[t, a]
            dcn[a] = _distance(xy_new[t, 0], xy_new[t, 1], xy_obs[ja, 0], xy_obs[ja, 1], metric)
            for q in range(a):
                jq = nbr[t, q]
                dnn[a, q] = _distance(xy_obs[ja, 0], xy_obs[ja, 1], xy_obs[jq, 0], xy_obs[jq, 1], metric)
        for d in range(n_d):
            inv_phi = 1.0 / phi[d]
            sd2 = s2[d]
            for a in range(k):
                c[a] = sd2 * rho_code(code, dcn[a] * inv_phi)
                b[a] = c[a]
                chol[a, a] = sd2 * (1.0 + jitter) + t2[d]
                for q in range(a):
                    chol[a, q] = sd2 * rho_code(code, dnn[a, q] * inv_phi)
            mu = 0.0
            for j in range(p):
                mu += design_new[t, j] * beta[d, j]
            if not _cholesky(chol, k):
                mean[d, t] = np.nan
                var[d, t] = np.nan
                continue
            _cho_solve(chol, k, b)
            v = sd2 + (t2[d] if include_nugget else 0.0)
            for a in range(k):
                ja = nbr[t, a]
                r = values[ja]
                for j in range(p):
                    r -= design_obs[ja, j] * beta[d, j]
                mu += b[a] * r
                v -= c[a] * b[a]
            mean[d, t] = mu
            var[d, t] = max(v, 0.0)


# --- maximin ordering ---------------------------------------------------------------------------
# A static k-d tree (median splits, leaves of at most ``leaf`` points) answers the ball queries of
# the exact maximin algorithm; a binary max-heap of (distance, index) entries with lazy deletion
# picks the next point. Distances are summed left to right, (dx^2 + dy^2) + dz^2, exactly as
# NumPy's ``((a - b) ** 2).sum(axis=1)`` rounds them, so ties resolve as in the NumPy version.


@numba.njit(cache=True)
def _kd_build(pts, leaf):
    """k-d tree over ``pts`` (n, dim): (perm, lo, hi, left, right, bmin, bmax, n_nodes); leaves have left = -1."""
    n, dim = pts.shape
    cap = 2 * n + 1
    perm = np.arange(n)
    lo = np.empty(cap, np.int64)
    hi = np.empty(cap, np.int64)
    left = np.full(cap, -1, np.int64)
    right = np.full(cap, -1, np.int64)
    bmin = np.empty((cap, dim))
    bmax = np.empty((cap, dim))
    stack = np.empty(cap, np.int64)
    lo[0] = 0
    hi[0] = n
    n_nodes = 1
    top = 0
    stack[0] = 0
    while top >= 0:
        node = stack[top]
        top -= 1
        a = lo[node]
        b = hi[node]
        for j in range(dim):
            bmin[node, j] = np.inf
            bmax[node, j] = -np.inf
        for t in range(a, b):
            q = perm[t]
            for j in range(dim):
                v = pts[q, j]
                if v < bmin[node, j]:
                    bmin[node, j] = v
                if v > bmax[node, j]:
                    bmax[node, j] = v
        if b - a <= leaf:
            continue
        split = 0
        for j in range(1, dim):
            if bmax[node, j] - bmin[node, j] > bmax[node, split] - bmin[node, split]:
                split = j
        seg = perm[a:b].copy()
        srt = np.argsort(pts[seg, split], kind="mergesort")
        for t in range(b - a):
            perm[a + t] = seg[srt[t]]
        mid = (a + b) // 2
        for child, c_lo, c_hi in ((n_nodes, a, mid), (n_nodes + 1, mid, b)):
            lo[child] = c_lo
            hi[child] = c_hi
            top += 1
            stack[top] = child
        left[node] = n_nodes
        right[node] = n_nodes + 1
        n_nodes += 2
    return perm, lo, hi, left, right, bmin, bmax, n_nodes


@numba.njit(cache=True, inline="always")
def _sqdist(pts, p, q):
    """Squared distance between rows p and q, summed left to right like NumPy's row sum."""
    s = 0.0
    for j in range(pts.shape[1]):
        t = pts[p, j] - pts[q, j]
        s = s + t * t
    return s


@numba.njit(cache=True, inline="always")
def _before(da, qa, db, qb):
    """Heap priority: larger distance first, then lower index."""
    return da > db or (da == db and qa < qb)


@numba.njit(cache=True)
def maximin(pts, first, leaf):
    """Exact maximin ordering of ``pts`` (n, dim) starting at index ``first`` (Guinness 2018).

    Each next point has the largest smallest distance to the points already chosen (ties: lowest
    index). When point p is chosen with smallest distance l_p, every unchosen point already has a
    smallest distance <= l_p, so only points within l_p of p can be lowered: a k-d tree ball query.
    """
    n, dim = pts.shape
    order = np.empty(n, np.int64)
    if n == 0:
        return order
    perm, lo, hi, left, right, bmin, bmax, n_nodes = _kd_build(pts, leaf)
    dmin = np.full(n, np.inf)
    done = np.zeros(n, np.bool_)
    cap = 4 * n + 16
    hd = np.empty(cap)
    hq = np.empty(cap, np.int64)
    size = 0
    stack = np.empty(n_nodes + 1, np.int64)
    p = first
    lp = np.inf
    for k in range(n):
        order[k] = p
        done[p] = True
        dmin[p] = 0.0
        if k == n - 1:
            break
        r2 = lp * lp * (1.0 + 1e-9)  # any superset of the ball gives the same result
        top = 0
        stack[0] = 0
        while top >= 0:
            node = stack[top]
            top -= 1
            gap = 0.0
            for j in range(dim):
                v = pts[p, j]
                if v < bmin[node, j]:
                    gap += (bmin[node, j] - v) ** 2
                elif v > bmax[node, j]:
                    gap += (v - bmax[node, j]) ** 2
            if gap > r2:
                continue
            if left[node] >= 0:
                top += 1
                stack[top] = left[node]
                top += 1
                stack[top] = right[node]
                continue
            for t in range(lo[node], hi[node]):
                q = perm[t]
                if done[q]:
                    continue
                d = math.sqrt(_sqdist(pts, q, p))
                if d < dmin[q]:
                    dmin[q] = d
                    if size == cap:  # grow the heap arrays
                        cap *= 2
                        hd2 = np.empty(cap)
                        hq2 = np.empty(cap, np.int64)
                        hd2[:size] = hd[:size]
                        hq2[:size] = hq[:size]
                        hd = hd2
                        hq = hq2
                    c = size  # sift up
                    size += 1
                    while c > 0:
                        par = (c - 1) // 2
                        if not _before(d, q, hd[par], hq[par]):
                            break
                        hd[c] = hd[par]
                        hq[c] = hq[par]
                        c = par
                    hd[c] = d
                    hq[c] = q
        while True:  # pop until an entry is current (lazy deletion of stale ones)
            d = hd[0]
            q = hq[0]
            size -= 1
            ld = hd[size]
            lq = hq[size]
            c = 0
            while True:  # sift the last entry down from the root
                ch = 2 * c + 1
                if ch >= size:
                    break
                if ch + 1 < size and _before(hd[ch + 1], hq[ch + 1], hd[ch], hq[ch]):
                    ch += 1
                if not _before(hd[ch], hq[ch], ld, lq):
                    break
                hd[c] = hd[ch]
                hq[c] = hq[ch]
                c = ch
            hd[c] = ld
            hq[c] = lq
            if not done[q] and d == dmin[q]:
                break
        p = q
        lp = d
    return order
