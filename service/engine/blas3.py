"""Triangular BLAS-3 products and solves that let other threads run meanwhile.

SciPy's Python wrappers of BLAS (``scipy.linalg.blas``) hold the GIL for the whole call, so two threads
that each run ``dtrmm`` or ``dtrsm`` on their own block take turns instead of using two cores (measured on
this project's 2-core machine: two threads gave 0.95 times the speed of one; ``numpy.matmul``, which
releases the GIL, gave 1.48). The long passes (``streaming``, ``summaries``) run such calls on several
threads, so they call the same Fortran routines here through ``ctypes``, which releases the GIL for the
length of a foreign call.

The routines are the ones SciPy itself exports for Cython (``scipy.linalg.cython_blas``), so the library,
the routine and its arguments are exactly those of the SciPy wrapper each function replaces: the results
are the same bits (``tests/engine/test_blas3.py`` compares them). Where the function pointers cannot be
had (another Python implementation), each function falls back to the SciPy wrapper.

Every function works in place on column-major float64 arrays (a column slice of a column-major array is
one: its leading dimension is read from its strides), shapes below 2³¹.
"""

from __future__ import annotations

import ctypes

import numpy as np
from scipy.linalg import blas as _blas

_INT = ctypes.c_int
_PD = ctypes.POINTER(ctypes.c_double)
_PI = ctypes.POINTER(_INT)
_PC = ctypes.c_char_p


def _capsule_function(name: str, argtypes: list):
    """The C function behind ``scipy.linalg.cython_blas``'s capsule ``name``, callable without the GIL."""
    from scipy.linalg import cython_blas

    capsule = cython_blas.__pyx_capi__[name]
    get_name = ctypes.pythonapi.PyCapsule_GetName
    get_name.restype, get_name.argtypes = ctypes.c_char_p, [ctypes.py_object]
    get_pointer = ctypes.pythonapi.PyCapsule_GetPointer
    get_pointer.restype, get_pointer.argtypes = ctypes.c_void_p, [ctypes.py_object, ctypes.c_char_p]
    pointer = get_pointer(capsule, get_name(capsule))
    if not pointer:
        raise OSError(f"no function pointer in scipy.linalg.cython_blas.{name}")
    return ctypes.CFUNCTYPE(None, *argtypes)(pointer)


try:
    _DTRMM = _capsule_function("dtrmm", [_PC, _PC, _PC, _PC, _PI, _PI, _PD, _PD, _PI, _PD, _PI])
    _DTRSM = _capsule_function("dtrsm", [_PC, _PC, _PC, _PC, _PI, _PI, _PD, _PD, _PI, _PD, _PI])
    _DGEMM = _capsule_function("dgemm", [_PC, _PC, _PI, _PI, _PI, _PD, _PD, _PI, _PD, _PI, _PD, _PD, _PI])
    AVAILABLE = True
except (AttributeError, KeyError, OSError, ImportError, ValueError):  # pragma: no cover (not CPython)
    _DTRMM = _DTRSM = _DGEMM = None
    AVAILABLE = False


def _ld(a: np.ndarray) -> int | None:
    """The leading dimension of a column-major float64 array (unit stride down a column), else None."""
    if a.dtype != np.float64 or a.ndim != 2 or a.strides[0] != 8 or a.strides[1] % 8:
        return None
    ld = a.strides[1] // 8
    if a.shape[1] > 1 and ld < a.shape[0]:
        return None
    if max(a.shape[0], a.shape[1], ld) >= 2**31:
        return None
    return max(ld, a.shape[0], 1)


def _fit(what: str, *shapes: tuple[int, ...]) -> None:
    raise ValueError(f"blas3.{what}: shapes {' and '.join(str(tuple(x)) for x in shapes)} do not fit")


def _ptr(a: np.ndarray):
    return a.ctypes.data_as(_PD)


def _i(v: int):
    return ctypes.byref(_INT(v))


def _d(v: float):
    return ctypes.byref(ctypes.c_double(v))


def _right_upper(what: str, routine, wrapper, trans: bytes, T: np.ndarray, X: np.ndarray) -> np.ndarray:
    """``X ← X op(T)`` in place by a right-side triangular BLAS routine (T upper, not unit), or by SciPy's
    wrapper ``wrapper`` (with the same arguments) where ``routine`` cannot take the arrays."""
    if T.shape != (X.shape[1],) * 2:
        _fit(what, T.shape, X.shape)
    ldx, ldt = _ld(X), _ld(T)
    if not AVAILABLE or ldx is None or ldt is None or not X.flags.writeable:
        out = wrapper(1.0, np.asfortranarray(T), X, side=1, lower=0, trans_a=int(trans == b"T"), overwrite_b=1)
        if out is not X and not np.shares_memory(out, X):
            X[...] = out
        return X
    if X.size:
        routine(b"R", b"U", trans, b"N", _i(X.shape[0]), _i(X.shape[1]), _d(1.0), _ptr(T), _i(ldt), _ptr(X), _i(ldx))
    return X


def trmm_right_upper_t(T: np.ndarray, D: np.ndarray) -> np.ndarray:
    """``D ← D Tᵀ`` in place, T upper triangular (p × p), D (rows × p); returns D. The same as
    ``scipy.linalg.blas.dtrmm(1.0, T, D, side=1, lower=0, trans_a=1, overwrite_b=1)``."""
    return _right_upper("trmm_right_upper_t", _DTRMM, _blas.dtrmm, b"T", T, D)


def trsm_right_upper(S: np.ndarray, X: np.ndarray) -> np.ndarray:
    """``X ← X S⁻¹`` in place, S upper triangular (p × p), X (rows × p); returns X. The same as
    ``scipy.linalg.blas.dtrsm(1.0, S, X, side=1, lower=0, trans_a=0, overwrite_b=1)``."""
    return _right_upper("trsm_right_upper", _DTRSM, _blas.dtrsm, b"N", S, X)


def _gemm(what: str, alpha: float, beta: float, A: np.ndarray, B: np.ndarray, C: np.ndarray) -> np.ndarray:
    """``C ← alpha A B + beta C`` in place by dgemm, or by SciPy's wrapper where dgemm cannot take the arrays."""
    if A.shape[1] != B.shape[0] or C.shape != (A.shape[0], B.shape[1]):
        _fit(what, A.shape, B.shape, C.shape)
    if C.size == 0 or A.shape[1] == 0:  # nothing to add (both callers pass beta 1 or a zero C)
        return C
    lda, ldb, ldc = _ld(A), _ld(B), _ld(C)
    if not AVAILABLE or None in (lda, ldb, ldc) or not C.flags.writeable:
        out = _blas.dgemm(alpha, A, B, beta=beta, c=C, overwrite_c=1)
        if out is not C and not np.shares_memory(out, C):
            C[...] = out
        return C
    _DGEMM(b"N", b"N", _i(C.shape[0]), _i(C.shape[1]), _i(A.shape[1]), _d(alpha), _ptr(A), _i(lda), _ptr(B),
           _i(ldb), _d(beta), _ptr(C), _i(ldc))
    return C


def gemm_subtract(A: np.ndarray, B: np.ndarray, C: np.ndarray) -> np.ndarray:
    """``C ← C − A B`` in place, A (rows × k), B (k × cols), C (rows × cols); returns C. The same as
    ``scipy.linalg.blas.dgemm(-1.0, A, B, beta=1.0, c=C, overwrite_c=1)``."""
    return _gemm("gemm_subtract", -1.0, 1.0, A, B, C)


def matmul(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """``A B`` (rows × cols, column-major) for column-major A (rows × k) and B (k × cols). The same as
    ``scipy.linalg.blas.dgemm(1.0, A, B)``. On a tall A and a narrow B (a few columns), numpy's ``A @ B``
    took four times longer here (measured: 16,384 × 210 by 210 × 16, 8.7 ms against 1.8 ms, one thread)."""
    C = np.zeros((A.shape[0], B.shape[1]), order="F")
    return _gemm("matmul", 1.0, 0.0, A, B, C)
