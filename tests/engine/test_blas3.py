"""``engine.blas3`` against SciPy's own BLAS wrappers: the same routine of the same library with the same
arguments, so the same bits (SciPy's ``scipy.linalg.blas`` is the reference; ``blas3`` only changes who
holds the GIL during the call)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import blas

from service.engine import blas3


def _upper(rng, p, cond=1e3):
    T = np.triu(rng.standard_normal((p, p)))
    T[np.diag_indices(p)] = np.geomspace(1.0, 1.0 / cond, p) * np.sign(rng.standard_normal(p))
    return np.asfortranarray(T)


def test_the_gil_free_path_is_taken_on_cpython():
    assert blas3.AVAILABLE


@pytest.mark.parametrize("rows,p", [(1000, 211), (37, 5), (0, 8), (5, 1)])
def test_trmm_and_trsm_give_scipys_bits(rows, p):
    rng = np.random.default_rng(rows + p)
    T = _upper(rng, p)
    D = np.asfortranarray(rng.standard_normal((rows, p)) * 10.0 ** rng.integers(-3, 4, p))
    want = blas.dtrmm(1.0, T, D.copy(order="F"), side=1, lower=0, trans_a=1)
    got = D.copy(order="F")
    assert blas3.trmm_right_upper_t(T, got) is got and np.array_equal(got, want)
    want = blas.dtrsm(1.0, T, D.copy(order="F"), side=1, lower=0, trans_a=0)
    got = D.copy(order="F")
    assert blas3.trsm_right_upper(T, got) is got and np.array_equal(got, want)


def test_gemm_on_column_slices_gives_scipys_bits():
    # how ``summaries._solve_blocked`` calls it: both operands column slices of one column-major block
    rng = np.random.default_rng(7)
    X = np.asfortranarray(rng.standard_normal((500, 211)))
    S12 = np.asfortranarray(rng.standard_normal((105, 106)))
    want = X.copy(order="F")
    out = blas.dgemm(-1.0, want[:, :105], S12, beta=1.0, c=want[:, 105:], overwrite_c=1)
    want[:, 105:] = out
    got = X.copy(order="F")
    assert blas3.gemm_subtract(got[:, :105], S12, got[:, 105:]) is not None
    assert np.array_equal(got, want) and np.array_equal(got[:, :105], X[:, :105])


@pytest.mark.parametrize("rows,k,cols", [(16384, 210, 16), (37, 5, 3), (0, 4, 2), (6, 1, 1)])
def test_matmul_gives_scipys_bits(rows, k, cols):
    # how ``orthobasis.LeverageScreen`` and pass 3 call it: a tall column-major block by a few columns
    rng = np.random.default_rng(rows + k)
    A = np.asfortranarray(rng.standard_normal((rows, k)))
    B = np.asfortranarray(rng.standard_normal((k, cols)))
    got = blas3.matmul(A, B)
    assert got.shape == (rows, cols) and got.flags.f_contiguous
    assert np.array_equal(got, blas.dgemm(1.0, A, B))
    np.testing.assert_allclose(got, A @ B, rtol=1e-12, atol=1e-12 * max(1, k))  # numpy: the same product
    C = np.ascontiguousarray(A)  # row-major: through SciPy's wrapper, the same values
    assert np.array_equal(blas3.matmul(C, B), blas.dgemm(1.0, C, B))


def test_arrays_it_cannot_pass_go_through_scipy_and_give_the_same_values():
    rng = np.random.default_rng(11)
    T = _upper(rng, 6)
    C = np.ascontiguousarray(rng.standard_normal((50, 6)))  # row-major: SciPy's wrapper copies it
    want = blas.dtrmm(1.0, T, C, side=1, lower=0, trans_a=1)
    got = C.copy()
    blas3.trmm_right_upper_t(T, got)
    assert np.array_equal(got, want)
    got = C.copy()
    blas3.trsm_right_upper(np.ascontiguousarray(T), got)  # a row-major triangle too
    assert np.array_equal(got, blas.dtrsm(1.0, T, C, side=1, lower=0, trans_a=0))
    with pytest.raises(ValueError, match="do not fit"):  # shapes that do not fit are refused before any call
        blas3.gemm_subtract(np.zeros((4, 3), order="F"), np.zeros((2, 5), order="F"), np.zeros((4, 5), order="F"))


def test_the_solve_undoes_the_product():
    # X S⁻¹ S = X to rounding: common practice (the definition of the triangular solve)
    rng = np.random.default_rng(3)
    S = np.asfortranarray(np.eye(40) * 2.0 + np.triu(rng.standard_normal((40, 40)), 1) / 40)  # well conditioned
    X = np.asfortranarray(rng.standard_normal((300, 40)))
    Y = blas3.trsm_right_upper(S, X.copy(order="F"))
    np.testing.assert_allclose(Y @ S, X, rtol=0, atol=1e-12 * np.abs(X).max() * 40)
