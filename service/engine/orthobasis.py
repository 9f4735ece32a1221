"""A well-conditioned basis with the span of a polynomial's monomials: a fold summary from one Gram matrix.

A fold summary is the R factor of ``A = [1, Φ, y]`` (``summaries``). Made from the Gram matrix AᵀA alone it
would keep only about u·κ(A)² of relative accuracy in A's weakest direction (common practice: the normal
equations square the condition number), and the standardized monomials of degree 6 in four inputs have
κ(A) ≈ 1e5 (``benchmarks/bench_scale.py`` prints it): 1e-6. That is why ``summaries.absorb`` adds a
triangular solve per block, which costs as much as the Gram itself.

This module builds instead a basis Ψ with exactly the span of the monomials of total degree ≤ D, close to
orthonormal over the rows, at the cost of the monomials (one multiply per term per row), so that one Gram
matrix of ``[1, Ψ, y]`` per fold is accurate; it then maps the summary back to the monomials by one small
(m × m) factorization. Ψ is built from the scan's sample of rows:

1. whitening: ``z = x W`` with W = C^(-1/2), C the covariance of the standardized inputs x on the sample (an
   invertible linear change of variables maps the polynomials of total degree ≤ D onto themselves);
2. for every whitened input z_j, the polynomials p_{j,0..D} orthonormal over the sample's values of z_j, by
   Stieltjes' procedure (the three-term recurrence ``b_{k+1} p_{k+1} = (z − a_k) p_k − b_k p_{k−1}``, p_0 = 1,
   with a_k and b_{k+1} computed from the sample: the discretized Stieltjes procedure, see W. Gautschi,
   *Orthogonal Polynomials: Computation and Approximation*, Oxford 2004, §2.2; the section from memory);
3. ``ψ_α(z) = Π_j p_{j,α_j}(z_j)`` for every exponent α of the basis, in the basis's own order: each one the
   product of a term of lower degree and one univariate value.

With products across inputs and correlated inputs the columns are not orthonormal, but whitening removes the
largest part of it: on ``bench_scale``'s data (two of its four inputs correlated at 0.8), κ([1, Ψ]) = 31 and
κ([1, Ψ, y]) = 314, against 1e5 for the monomials (measured on 400,000 rows).

**Back to the monomials.** ``[1, Φ, y] = [1, Ψ, y] N`` for the (m × m) matrix N that this module computes from
W and the recurrences (each monomial x^α expanded in z through ``x = z W⁻¹``, each z-monomial in the p_{j,k}
through the recurrence: ``z p_k = b_{k+1} p_{k+1} + a_k p_k + b_k p_{k−1}``). If ``R_Ψ`` is an R factor of
``[1, Ψ, y]`` then ``AᵀA = Nᵀ R_Ψᵀ R_Ψ N``, so the R factor of the (m × m) matrix ``R_Ψ N`` (Householder QR,
backward stable) is an R factor of A: the summary, in the monomial basis and column order, as every later step
expects (nested degrees stay leading blocks).

**Accuracy and the guard.** R_Ψ comes from the Cholesky factor of the fold's Gram matrix of ``[1, Ψ, y]``,
whose relative accuracy in any direction v, ``‖R_Ψ v‖ = ‖[1, Ψ, y] v‖ (1 + δ)``, has |δ| of order u·κ², κ the
condition number of ``[1, Ψ, y]`` with its columns scaled to unit norm. ``r_factor`` computes κ (from the
eigenvalues of the m × m Gram matrix, to about 1e-8 relative at the limit) and refuses the Gram (returns None)
when κ exceeds ``ORTHO_MAX_COND`` (1e3: |δ| up to about 1e-10 in the weakest direction only): the caller then
summarizes those rows the exact way (``summaries.absorb``). The target's column is part of κ: a target that
the basis fits almost exactly (R² → 1) makes ``[1, Ψ, y]`` ill conditioned and takes the exact way. ``build`` refuses up front (None) when
the sample's own κ([1, Ψ]) exceeds half the limit, when the inputs are collinear on the sample, or when an
input has too few distinct values for the degree (its orthogonal polynomials stop before D).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import lapack as _lapack

from . import blas3
from .summaries import CHUNK_ROWS, householder_r

ORTHO_MAX_COND = 1e3  # κ₂ of the column-scaled [1, Ψ, y] of a fold up to which its Gram matrix is used
MIN_SAMPLE_PER_TERM = 20  # sample rows per column of [1, Ψ] needed to build the basis
_TINY = 1e-8  # relative size below which a recurrence norm or a covariance eigenvalue means "degenerate"


@dataclass(frozen=True)
class OrthoBasis:
    """Ψ for a polynomial basis of exponents ``powers`` (p × d, every exponent of total degree 1..D, each
    once), the map N back to the monomials, and how to expand Ψ (see the module docstring).

    whiten: (d × d) W; a, b: (d × D) recurrence coefficients a_k and (d × (D + 1)) norms b_k (b[:, 0] unused);
    N: (p + 2) × (p + 2) with ``[1, Φ, y] = [1, Ψ, y] N``; steps: per column of Ψ, (that column, its parent
    column or −1, the index of its univariate factor in the table ``univariate`` returns), parents first."""

    powers: np.ndarray
    whiten: np.ndarray
    a: np.ndarray
    b: np.ndarray
    N: np.ndarray
    steps: tuple[tuple[int, int, int], ...]  # (column, parent column or -1, univariate column)

    @property
    def width(self) -> int:
        """Columns of ``[1, Ψ, y]``."""
        return int(self.powers.shape[0]) + 2

    @property
    def degree(self) -> int:
        return int(self.a.shape[1])

    def univariate(self, Xs: np.ndarray) -> np.ndarray:
        """(n × d·(D + 1)) column-major table of p_{j,k}(z_j) for the rows ``Xs`` (n × d, standardized); column
        ``j·(D + 1) + k`` holds p_{j,k}."""
        n, d = Xs.shape
        D = self.degree
        Z = np.asfortranarray(Xs @ self.whiten)
        U = np.empty((n, d * (D + 1)), order="F")
        for j in range(d):
            c = j * (D + 1)
            z = Z[:, j]
            U[:, c] = 1.0
            for k in range(D):
                q = (z - self.a[j, k]) * U[:, c + k]
                if k:
                    q -= self.b[j, k] * U[:, c + k - 1]
                np.divide(q, self.b[j, k + 1], out=U[:, c + k + 1])
        return U

    def expand_into(self, Xs: np.ndarray, out: np.ndarray) -> np.ndarray:
        """Ψ of the rows ``Xs`` (n × d, standardized as the model's inputs) into ``out`` (n × p), best a
        column-major view: one multiply per term per row once the univariate table is made."""
        U = self.univariate(Xs)
        for col, parent, u in self.steps:
            if parent < 0:
                out[:, col] = U[:, u]
            else:
                np.multiply(out[:, parent], U[:, u], out=out[:, col])
        return out

    def design(self, Xs: np.ndarray, y: np.ndarray | None, root_w: np.ndarray | None = None,
               buf: np.ndarray | None = None) -> np.ndarray:
        """``[1, Ψ, y]`` of some rows, column-major (n × m), or ``[1, Ψ]`` when ``y`` is None; each row scaled
        by ``root_w`` (n,) when given (the square roots of the row weights, as ``Summary.of`` scales them).
        ``buf``: a column-major array of at least n rows and m columns to build it in (its leading block is
        returned), reused from call to call so that no fresh pages are touched."""
        A = (np.empty((Xs.shape[0], self.width - (y is None)), order="F") if buf is None
             else buf[:Xs.shape[0], :self.width - (y is None)])
        A[:, 0] = 1.0
        self.expand_into(Xs, A[:, 1:self.width - 1])
        if y is not None:
            A[:, -1] = y
        if root_w is not None:
            A *= root_w[:, None]
        return A

    def gram(self, Xs: np.ndarray, y: np.ndarray | None) -> np.ndarray:
        """Gram matrix of ``[1, Ψ, y]`` (or of ``[1, Ψ]`` when ``y`` is None) over the rows ``Xs`` (n × d,
        standardized), made ``CHUNK_ROWS`` rows at a time so the design is never whole in memory."""
        m = self.width - (y is None)
        G = np.zeros((m, m))
        for lo in range(0, Xs.shape[0], CHUNK_ROWS):
            A = self.design(Xs[lo:lo + CHUNK_ROWS], None if y is None else y[lo:lo + CHUNK_ROWS])
            G += A.T @ A  # numpy calls the symmetric rank-k update (syrk) for this form, without the GIL
        return G

    def r_factor(self, G: np.ndarray) -> np.ndarray | None:
        """R factor of ``[1, Φ, y]`` (monomials, m × m, positive diagonal) from ``G``, the Gram matrix of
        ``[1, Ψ, y]`` over the same rows; None when G is not accurate enough for it (see the module
        docstring: not finite, not positive definite, or κ above ``ORTHO_MAX_COND``)."""
        G = np.asarray(G, dtype=np.float64)
        diag = np.diag(G)
        if G.shape != (self.width,) * 2 or not np.all(np.isfinite(G)) or not np.all(diag > 0):
            return None
        s = np.exp2(-np.round(np.log2(np.sqrt(diag))))  # powers of two: the scaling is exact
        Gs = G * np.outer(s, s)
        Rs, info = _lapack.dpotrf(Gs, lower=0, clean=1)
        if info != 0 or not np.all(np.diag(Rs) > 0):
            return None
        # κ₂ of the scaled [1, Ψ, y] from the eigenvalues of its Gram matrix (κ², each known to about m·u·κ² ≤
        # 1e-8 relative below the limit: exact enough to decide, at about half the cost of R's singular values)
        ev = np.linalg.eigvalsh(Gs)
        if not ev[0] > 0 or ev[-1] / ev[0] > ORTHO_MAX_COND ** 2:
            return None
        R = householder_r((Rs / s[None, :]) @ self.N)
        R[np.diag(R) < 0] *= -1.0  # the signs of R's rows are free (``summaries``): a positive diagonal
        return R if np.all(np.isfinite(R)) else None


def _stieltjes(z: np.ndarray, D: int) -> tuple[np.ndarray, np.ndarray] | None:
    """Recurrence coefficients (a (D,), b (D + 1,)) of the polynomials orthonormal over the values ``z``, or
    None when z has too few distinct values for degree D."""
    a, b = np.zeros(D), np.zeros(D + 1)
    prev, cur = np.zeros_like(z), np.ones_like(z)
    for k in range(D):
        a[k] = float(np.mean(z * cur * cur))
        q = (z - a[k]) * cur - (b[k] * prev if k else 0.0)
        b[k + 1] = float(np.sqrt(np.mean(q * q)))
        if not b[k + 1] > _TINY * max(1.0, float(np.sqrt(np.mean(z * z)))) ** (k + 1):
            return None
        prev, cur = cur, q / b[k + 1]
    return a, b


def _monomials_in_p(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """((D + 1) × (D + 1)) C with ``z^k = Σ_l C[l, k] p_l(z)``, from ``z p_l = b_{l+1} p_{l+1} + a_l p_l +
    b_l p_{l−1}``."""
    D = a.size
    C = np.zeros((D + 1, D + 1))
    C[0, 0] = 1.0
    for k in range(D):
        for l in range(k + 1):
            c = C[l, k]
            C[l + 1, k + 1] += c * b[l + 1]
            C[l, k + 1] += c * a[l]
            if l:
                C[l - 1, k + 1] += c * b[l]
    return C


def build(powers: np.ndarray, sample: np.ndarray, *, check: bool = True) -> OrthoBasis | None:
    """Ψ for the polynomial basis ``powers`` (p × d) from ``sample`` (rows × d, standardized inputs), or None
    when this basis or sample does not allow it (see the module docstring). ``check=False`` leaves out the
    sample's own κ([1, Ψ]) (a Gram matrix of the whole sample): for a caller whose sample is all its rows,
    the folds' own guards (``r_factor``) then decide at the cost of that one Gram pass."""
    from .basis import polynomial_powers

    powers = np.asarray(powers, dtype=np.int64)
    p, d = powers.shape
    if p == 0 or d == 0:
        return None
    D = int(powers.sum(axis=1).max())
    full = polynomial_powers(d, D)
    if full.shape != powers.shape or {tuple(r) for r in full} != {tuple(r) for r in powers}:
        return None  # whitening keeps only the space of *all* polynomials of total degree ≤ D
    sample = np.asarray(sample, dtype=np.float64)
    if sample.shape[1] != d or sample.shape[0] < MIN_SAMPLE_PER_TERM * (p + 1) or not np.all(np.isfinite(sample)):
        return None
    ev, V = np.linalg.eigh(np.cov(sample.T, bias=True).reshape(d, d))
    if not ev[0] > _TINY * ev[-1]:
        return None  # collinear inputs: the exact way
    W = (V / np.sqrt(ev)) @ V.T
    W_inv = (V * np.sqrt(ev)) @ V.T
    Zs = sample @ W
    a, b = np.zeros((d, D)), np.zeros((d, D + 1))
    for j in range(d):
        rec = _stieltjes(Zs[:, j], D)
        if rec is None:
            return None
        a[j], b[j] = rec
    # every exponent of total degree ≤ D: row 0 the constant, row 1 + i the basis's column i, found by an
    # integer code (base D + 1: every exponent looked up here is at most D)
    m0 = p + 1
    allp = np.zeros((m0, d), dtype=np.int64)
    allp[1:] = powers
    if float(D + 1) ** d < 2.0 ** 62:
        place = (D + 1) ** np.arange(d, dtype=np.int64)
        code = allp @ place
        by_code = np.argsort(code)

        def lookup(rows: np.ndarray) -> np.ndarray:
            return by_code[np.searchsorted(code, rows @ place, sorter=by_code)]
    else:  # the code would overflow int64: by the exponents' bytes
        index = {r.tobytes(): i for i, r in enumerate(allp)}

        def lookup(rows: np.ndarray) -> np.ndarray:
            return np.array([index[np.ascontiguousarray(r).tobytes()] for r in rows], dtype=np.int64)

    # raised[k][r]: the row of exponent low[r] plus one unit of input k, for the rows below degree D
    low = np.flatnonzero(allp.sum(axis=1) < D)
    raised = [lookup(allp[low] + np.eye(d, dtype=np.int64)[k]) for k in range(d)]
    # parents first (by degree), for each column of the basis: its last input j with a nonzero exponent,
    # - the z-coefficients of its x-monomial: x^α = x^(α − e_j) · Σ_k W⁻¹[k, j] z_k;
    # - its step in Ψ's expansion: ψ_α = ψ_(α with α_j = 0) · p_{j,α_j}(z_j)
    last = d - 1 - np.argmax(powers[:, ::-1] > 0, axis=1)  # per column, its last input with a nonzero exponent
    one = np.eye(d, dtype=np.int64)[last]
    less = lookup(powers - one)  # row of x^(α − e_j)
    without = lookup(powers - one * powers[np.arange(p), last][:, None])  # row of α with α_j = 0
    degree = powers.sum(axis=1)
    Zc = np.zeros((m0, m0))
    Zc[0, 0] = 1.0
    for level in range(1, D + 1):  # a level's parents are all in the level before: one step per level
        cols = np.flatnonzero(degree == level)
        for k in range(d):  # in input order, as the sums of one column: the same bits as column by column
            Zc[raised[k][:, None], 1 + cols] += W_inv[k, last[cols]][None, :] * Zc[low][:, less[cols]]
    order = sorted(range(p), key=lambda i: int(degree[i]))
    steps = [(i, int(without[i]) - 1, int(last[i]) * (D + 1) + int(powers[i, last[i]])) for i in order]
    # Ψ-coefficients of every z-monomial: z^β = Π_j Σ_l C_j[l, β_j] p_{j,l}
    Cz = np.ones((m0, m0))
    for j in range(d):
        Cj = _monomials_in_p(a[j], b[j])
        Cz *= Cj[allp[:, j][:, None], allp[:, j][None, :]]
    N = np.zeros((m0 + 1, m0 + 1))
    N[:m0, :m0] = Cz @ Zc
    N[m0, m0] = 1.0
    basis = OrthoBasis(powers, W, a, b, N, tuple(steps))
    if not check:
        return basis
    # the sample's own conditioning, without the target: refuse early what the Gram would refuse anyway
    G = basis.gram(sample, None)
    s = 1.0 / np.sqrt(np.diag(G))
    Rs, info = _lapack.dpotrf(G * np.outer(s, s), lower=0, clean=1)  # κ ≤ 500 here: a Gram is accurate enough
    if info != 0:
        return None
    sv = np.linalg.svd(Rs, compute_uv=False)
    if not sv[-1] > 0 or sv[0] / sv[-1] > ORTHO_MAX_COND / 2:
        return None
    return basis


SCREEN_DIRECTIONS = 16  # leading eigen-directions of the leverage form kept exactly by ``LeverageScreen``
SCREEN_MAX_SHARE = 0.25  # share of a batch's rows above which ``LeverageScreen`` is not worth it there


@dataclass(frozen=True)
class LeverageScreen:
    """Which rows can hold the largest training leverage, by a cheap upper bound, so that the exact leverage
    (a triangular product per row, ``solvers.row_leverages``) is computed for those rows only.

    The leverage of a row with standardized inputs x and design row d (monomials) is
    ``h = 1/n + ‖T (d − mean)‖²`` (``solvers.leverage_triangle``). With ``d = [1, ψ] N₀`` (``OrthoBasis.N``,
    the constant folded in with the mean: ``d − mean = ψ̃ B₀``, ψ̃ = [1, ψ]) this is ``1/n + ψ̃ Q ψ̃ᵀ`` for
    ``Q = B₀ Tᵀ T B₀ᵀ`` = V diag(μ) Vᵀ (μ descending). Keeping the K leading directions exactly and bounding
    the others by the largest of their eigenvalues gives, for c = ψ̃ V[:, :K],
    ``h ≤ 1/n + Σ_k μ_k c_k² + μ_K (‖ψ̃‖² − ‖c‖²)`` (common practice: a Rayleigh-quotient bound), K·m flops a
    row after Ψ's expansion, against the m²/2 of the exact form. Ψ being close to orthonormal, Q's spectrum is
    narrow and the bound tight: on ``bench_scale``'s degree-6 data with K = 16, 0.6% of the rows reach the
    largest leverage of a 50,000-row sample (measured on a million rows).

    ``floor`` is that largest exact leverage over the scan's sample of training rows, so a row whose bound is
    below it cannot hold the maximum: ``max(floor, exact leverages of the rows at or above it)`` is the largest
    leverage of all rows, whichever rows a batch holds and in whatever order the batches come. The bound is
    widened by a relative 1e-6 and an absolute u·μ₁·‖ψ̃‖²·m so that rounding in Q's eigen-decomposition and in
    either expansion never drops a row that holds the maximum."""

    basis: OrthoBasis
    V: np.ndarray  # (m0, K + folds): the K leading directions, then the folds' prediction coefficients
    mu: np.ndarray  # (K,)
    rest: float
    top: float
    inv_n: float
    floor: float

    @staticmethod
    def of(basis: OrthoBasis, mean: np.ndarray, T: np.ndarray, n: float, floor: float,
           fw: np.ndarray | None = None) -> "LeverageScreen":
        """``fw`` (folds × p), the coefficients of some models of the same basis (pass 3: the fold models):
        ``rows`` then also gives their predictions, from the same product (``d fwᵀ = ψ̃ N₀ fwᵀ``)."""
        m0 = basis.width - 1
        B0 = np.array(basis.N[:m0, 1:m0])
        B0[0] -= mean  # ψ̃ B₀ = d − mean, the constant ψ̃₀ = 1 carrying the mean
        B = B0 @ np.asarray(T, dtype=np.float64).T
        mu, V = np.linalg.eigh(B @ B.T)
        mu, V = np.maximum(mu[::-1], 0.0), V[:, ::-1]
        K = min(SCREEN_DIRECTIONS, m0 - 1)
        if fw is not None:
            V = np.hstack([V[:, :K], basis.N[:m0, 1:m0] @ np.asarray(fw, dtype=np.float64).T])
        return LeverageScreen(basis, np.asfortranarray(V[:, :K] if fw is None else V), mu[:K].copy(),
                              float(mu[K]), float(mu[0]), 1.0 / n, float(floor))

    def rows(self, Xs: np.ndarray, buf: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(indices of the rows of ``Xs`` (standardized inputs) whose bound reaches ``floor``, the predictions
        of the models ``fw`` given to ``of`` (rows × folds; no columns without them)). ``buf``: a column-major
        array of at least that many rows and ``basis.width - 1`` columns to expand into, reused from call to
        call (fresh pages for every block of rows would cost their first-touch faults); it is overwritten."""
        U = self.basis.design(Xs, None, buf=buf)  # [1, Ψ]
        # one product for the directions and the predictions; numpy's ``U @ V`` is slower here (``blas3.matmul``)
        CP = blas3.matmul(U, self.V)
        K = self.mu.size
        c = CP[:, :K]
        norm2 = np.einsum("ij,ij->i", U, U)
        kept = np.einsum("ij,ij->i", c, c)
        bound = self.inv_n + (c * c) @ self.mu + self.rest * np.maximum(norm2 - kept, 0.0)
        bound = bound * (1.0 + 1e-6) + (np.finfo(float).eps * U.shape[1] * self.top) * norm2
        return np.flatnonzero(bound >= self.floor), CP[:, K:]
