"""LAPACK Cholesky routines callable from Numba-compiled code, and reusable work buffers.

SciPy ships the LAPACK it was built with and exports each routine's address through
``scipy.linalg.cython_lapack`` (read with ``numba.extending.get_cython_function_address``).
Compiled code receives those addresses at run time (:func:`lapack_addresses`) rather than as
constants, so PyTensor's on-disk Numba cache stays valid from one process to the next (a ctypes
function object baked into compiled code would make Numba refuse to cache it).

Only three routines are needed: ``dpotrf`` (Cholesky factor), ``dpotrs`` (solve with the factor)
and ``dpotri`` (inverse from the factor). They work in place on one triangle of a square matrix
and leave the other triangle untouched.

Layout note: a C-ordered (row-major) NumPy array seen by Fortran is its transpose, so asking
LAPACK for its lower triangle (``uplo='L'``) works in the *upper* triangle of the NumPy array and
leaves the strictly lower triangle of the NumPy array as it was.

Reference: Anderson et al. (1999), *LAPACK Users' Guide*, 3rd ed., SIAM (xPOTRF, xPOTRS, xPOTRI).
"""

from __future__ import annotations

import threading

import numba
import numpy as np
from llvmlite import ir
from numba.core import types
from numba.extending import get_cython_function_address, intrinsic

__all__ = [
    "cholesky_inverse_upper",
    "clear_workspaces",
    "lapack_addresses",
    "potrf_upper",
    "potri_upper",
    "potrs_upper",
    "workspace",
    "workspace_nb",
]

#: Index of each routine in the array returned by :func:`lapack_addresses`.
POTRF, POTRS, POTRI = 0, 1, 2

_ADDRESSES = np.array([get_cython_function_address("scipy.linalg.cython_lapack", name)
                       for name in ("dpotrf", "dpotrs", "dpotri")], dtype=np.int64)
_UPLO_L = ord("L")


def lapack_addresses() -> np.ndarray:
    """Addresses of dpotrf, dpotrs, dpotri in this process (int64 array; index with POTRF, ...)."""
    return _ADDRESSES


@intrinsic
def _call_fortran(typingctx, addr, arrays):
    """Call the Fortran routine at ``addr`` with the data pointers of a tuple of arrays."""
    if not isinstance(addr, types.Integer) or not isinstance(arrays, types.BaseTuple):
        return None
    if not all(isinstance(t, types.Array) for t in arrays.types):
        return None

    def codegen(context, builder, signature, args):
        addr_v, tup = args
        i8p = ir.IntType(8).as_pointer()
        fnty = ir.FunctionType(ir.VoidType(), [i8p] * len(arrays.types))
        fn = builder.inttoptr(addr_v, fnty.as_pointer())
        ptrs = []
        for i, ty in enumerate(arrays.types):
            ary = context.make_array(ty)(context, builder, builder.extract_value(tup, i))
            ptrs.append(builder.bitcast(ary.data, i8p))
        builder.call(fn, ptrs)
        return context.get_dummy_value()

    return types.void(addr, arrays), codegen


@numba.njit(nogil=True, cache=True)
def potrf_upper(a: np.ndarray, addrs: np.ndarray) -> int:
    """Cholesky factor in place of the upper triangle of C-ordered ``a`` (``a = U^T U``).

    Returns LAPACK's ``info``: 0 on success, k > 0 if the leading minor of order k is not
    positive definite. The strictly lower triangle is not touched.
    """
    uplo = np.full(1, _UPLO_L, dtype=np.uint8)
    nn = np.full(1, a.shape[0], dtype=np.int32)
    info = np.zeros(1, dtype=np.int32)
    _call_fortran(addrs[POTRF], (uplo, nn, a, nn, info))
    return info[0]


@numba.njit(nogil=True, cache=True)
def potrs_upper(a: np.ndarray, b: np.ndarray, addrs: np.ndarray) -> int:
    """Solve a x = b in place of the vector ``b``, ``a`` holding the factor from :func:`potrf_upper`."""
    uplo = np.full(1, _UPLO_L, dtype=np.uint8)
    nn = np.full(1, a.shape[0], dtype=np.int32)
    one = np.ones(1, dtype=np.int32)
    info = np.zeros(1, dtype=np.int32)
    _call_fortran(addrs[POTRS], (uplo, nn, one, a, nn, b, nn, info))
    return info[0]


@numba.njit(nogil=True, cache=True)
def potri_upper(a: np.ndarray, addrs: np.ndarray) -> int:
    """Overwrite the upper-triangle factor from :func:`potrf_upper` with the upper triangle of a^-1."""
    uplo = np.full(1, _UPLO_L, dtype=np.uint8)
    nn = np.full(1, a.shape[0], dtype=np.int32)
    info = np.zeros(1, dtype=np.int32)
    _call_fortran(addrs[POTRI], (uplo, nn, a, nn, info))
    return info[0]


@numba.njit(nogil=True, cache=True)
def cholesky_inverse_upper(a: np.ndarray, addrs: np.ndarray) -> tuple[int, float]:
    """Factor and invert in place: returns (info, log det a); the upper triangle then holds a^-1.

    On failure (``info != 0``) the log determinant is NaN and the upper triangle is undefined.
    """
    info = potrf_upper(a, addrs)
    if info != 0:
        return info, np.nan
    logdet = 0.0
    for i in range(a.shape[0]):
        logdet += np.log(a[i, i])
    info = potri_upper(a, addrs)
    return info, 2.0 * logdet


# --- reusable per-thread work buffers -----------------------------------------------------------
# Fresh multi-megabyte allocations are expensive on small virtual machines (first-touch page faults
# cost about as much as a dpotrf at n = 1,000), so each thread keeps one square buffer and reuses it.
# Keyed by thread id: sampler chains run in separate threads, so no buffer is ever shared.

_POOL: dict[int, np.ndarray] = {}
_POOL_LOCK = threading.Lock()
_POOL_MAX = 16


def workspace(n: int) -> np.ndarray:
    """A C-contiguous (n, n) float64 scratch matrix owned by the calling thread (contents undefined)."""
    key = threading.get_ident()
    with _POOL_LOCK:
        buf = _POOL.get(key)
        if buf is None or buf.size < n * n:
            buf = np.empty(n * n)
            _POOL.pop(key, None)
            while len(_POOL) >= _POOL_MAX:  # forget the oldest threads' buffers
                _POOL.pop(next(iter(_POOL)))
            _POOL[key] = buf
    return buf[: n * n].reshape(n, n)


def clear_workspaces() -> None:
    """Release every thread's scratch buffer."""
    with _POOL_LOCK:
        _POOL.clear()


@numba.njit(cache=True)
def workspace_nb(n: int) -> tuple[np.ndarray, np.ndarray]:
    """(:func:`workspace`, :func:`lapack_addresses`) from Numba code (one short trip to Python)."""
    with numba.objmode(buf="float64[:, ::1]", addrs="int64[::1]"):
        buf = workspace(n)
        addrs = lapack_addresses()
    return buf, addrs
