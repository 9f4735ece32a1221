"""Per-fold data summaries: the R factor of ``A = [1, Φ, y]``.

For a block of rows, ``R = qr_r(A)`` is an (m × m) upper-triangular matrix, m = p + 2, with
``AᵀA = RᵀR``. Summaries merge by stacking and re-factoring (``merge``), so a fold's summary can be
built chunk by chunk, partition by partition, on one machine or many, and the result does not depend
on how the rows were cut. Everything downstream (means, standard deviations, coefficients for every
penalty strength, validation sums of squares) is small m × m algebra on these factors.

How R is computed (``qr_r``): by Cholesky QR, whose work is two or three Gram matrices and triangular
solves (BLAS-3, matrix-product speed) instead of Householder reflections (a few times slower on tall,
skinny blocks). Only R is kept; Q is never stored. The columns are first scaled by powers of two to unit
norm (exact), then a cheap condition estimate of the first Cholesky factor picks
- CholeskyQR2 (Yamamoto, Nakatsukasa, Yanagisawa & Fukaya, ETNA 44 (2015)) when the scaled block is
  well conditioned (estimate below ``CQR2_MAX_COND``): R₁ = chol(AᵀA), Q₁ = A R₁⁻¹, R = chol(Q₁ᵀQ₁) R₁;
- shifted CholeskyQR3 (Fukaya, Kannan, Nakatsukasa, Yamamoto & Yanagisawa, SIAM J. Sci. Comput. 42
  (2020)) otherwise: a first factor of AᵀA + sI with the paper's shift s = 11 (mn + m(m+1)) u ‖A‖₂²,
  then CholeskyQR2 of A R₁⁻¹, which is then well conditioned enough for it;
- Householder QR (LAPACK) when a Cholesky factorization still breaks down (a block whose columns are
  dependent to working precision: a constant or repeated column, a target the basis fits exactly),
  when the block has fewer rows than columns, or when it holds a non-finite value.
Every path gives an R with ``RᵀR = AᵀA`` to working accuracy; R is unique up to the signs of its rows,
and nothing downstream depends on those signs (``‖R v‖``, ``RᵀR`` and ``R[0, j] / R[0, 0]`` do not).

How a long pass adds rows (``absorb``): a block B of new rows is factored against the running R of the
rows before it instead of on its own. With W = B R⁻¹ (one triangular solve), ``[R; B] = [I; W] R``, and
``[I; W]`` is well conditioned whenever the new rows lie in the span the earlier rows already explore
(its condition number is at most √(1 + ‖W‖₂²), whatever the condition of B): one Cholesky step of
``I + WᵀW = SᵀS`` then gives the R factor ``S R`` as accurately as the second step of CholeskyQR2 does,
for a triangular solve and one Gram matrix of B (2·n·m² flops, against 3 to 5·n·m² to factor B on its
own and merge). A block whose ‖W‖_F² exceeds ``ABSORB_MAX_W2``, or a running R that is singular to
working precision, is factored on its own (``qr_r``) and merged instead.

Facts used (common practice, see Golub & Van Loan, *Matrix Computations*, §5.2 on QR):
- the first row of R is ``[r11, r11 · mean(Φ, y)]`` with ``r11² = n``;
- the trailing (m-1) × (m-1) block is an R factor of the column-centred ``[Φ, y]``, so its column
  norms are ``sqrt(n) · std`` (population);
- for any vector v, ``‖A v‖ = ‖R v‖``: a fold's residual sum of squares under any coefficients comes
  from its summary alone.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import blas as _blas
from scipy.linalg import lapack as _lapack
from scipy.linalg import qr as _scipy_qr

from . import blas3

CHUNK_ROWS = 16_384
CQR2_MAX_COND = 1e5  # estimated condition (1-norm) of the column-scaled block up to which CholeskyQR2 is used
ABSORB_MAX_W2 = 1e4  # ‖B R⁻¹‖_F² up to which a block B is absorbed into the running R (``absorb``)
ABSORB_MIN_RCOND = 1e3 * np.finfo(float).eps  # a running R less well conditioned (column-scaled) is not used
PRECOND_ONE_STEP = 1e3  # estimated κ(S) of a preconditioned block up to which one Cholesky step is kept (``preconditioned_r``)
TPQRT_BLOCK = 32  # block size of ``dtpqrt`` in ``merge``
SEGMENTS = 2  # row segments of a long ``Summary.of``, each absorbed in order, merged at the end
_U = np.finfo(float).eps / 2  # unit roundoff


def qr_r(A: np.ndarray) -> np.ndarray:
    """Square (m × m) R factor of ``A`` (rows may be fewer than m; the rest is zero)."""
    n, m = A.shape
    if n == 0:
        return np.zeros((m, m))
    R = cholesky_qr_r(A) if n >= m else None
    return R if R is not None else householder_r(A)


def householder_r(A: np.ndarray) -> np.ndarray:
    """R factor of ``A`` by LAPACK's Householder QR (the fallback of ``qr_r``)."""
    n, m = A.shape
    R = _scipy_qr(A, mode="r", overwrite_a=False, check_finite=False)[0]
    if R.shape[0] < m:
        R = np.vstack([R, np.zeros((m - R.shape[0], m))])
    return np.triu(R[:m])


def _chol(G: np.ndarray) -> np.ndarray | None:
    """Upper Cholesky factor of the symmetric G (its upper triangle is read), or None if not positive
    definite to working precision."""
    c, info = _lapack.dpotrf(G, lower=0, clean=1, overwrite_a=1)
    if info != 0 or not np.all(np.diag(c) > 0):
        return None
    return c


def _gram(A: np.ndarray) -> np.ndarray:
    return A.T @ A  # numpy calls the symmetric rank-k update (syrk) for this form


SOLVE_LEAF = 32  # columns up to which ``_solve_right`` calls dtrsm directly


def _solve_right(A: np.ndarray, S: np.ndarray) -> np.ndarray:
    """``A S⁻¹`` for upper-triangular S (a triangular solve, BLAS-3), in A's memory order."""
    if A.flags.f_contiguous:
        return _solve_blocked(np.array(A, dtype=np.float64, order="F"), np.asfortranarray(S))
    # A (C order) is Aᵀ in Fortran order: solve Sᵀ Xᵀ = Aᵀ from the left
    return _blas.dtrsm(1.0, S, np.ascontiguousarray(A).T, side=0, lower=0, trans_a=1).T


def _solve_blocked(X: np.ndarray, S: np.ndarray) -> np.ndarray:
    """``X S⁻¹`` in place for column-major X: the columns split in two, ``X₁ ← X₁ S₁₁⁻¹``, then
    ``X₂ ← (X₂ − X₁ S₁₂) S₂₂⁻¹``, recursively, so most of the work is a matrix product (dgemm), which
    OpenBLAS runs at about 1.5 times the speed of its dtrsm on these tall blocks; the same substitution,
    ordered in blocks (common practice: how blocked BLAS-3 triangular solves are built)."""
    m = S.shape[0]
    if X.shape[0] == 0:
        return X
    if m <= SOLVE_LEAF:
        return blas3.trsm_right_upper(S, X)  # in place, without holding the GIL (``blas3``)
    h = m // 2
    X1, X2 = X[:, :h], X[:, h:]
    _solve_blocked(X1, np.asfortranarray(S[:h, :h]))
    blas3.gemm_subtract(X1, np.asfortranarray(S[:h, h:]), X2)
    _solve_blocked(X2, np.asfortranarray(S[h:, h:]))
    return X


def cholesky_qr_r(A: np.ndarray) -> np.ndarray | None:
    """R factor of a tall block ``A`` (n ≥ m) by CholeskyQR2 or shifted CholeskyQR3 (see the module
    docstring), or None when the block needs Householder QR."""
    n, m = A.shape
    A = np.asarray(A, dtype=np.float64)
    norms = np.sqrt(np.einsum("ij,ij->j", A, A))
    if not np.all(np.isfinite(norms)) or not np.all(norms > 0) or not np.all(np.isfinite(A)):
        return None
    # scale columns to unit norm by powers of two (exact): R(A) = R(A D) D⁻¹
    d = np.exp2(-np.round(np.log2(norms)))
    G = _gram(A) * np.outer(d, d)
    R1 = _chol(G.copy())
    if R1 is not None:
        rcond, info = _lapack.dtrcon(R1, norm="1", uplo="U", diag="N")
        well = info == 0 and rcond * CQR2_MAX_COND >= 1.0
    else:
        well = False
    if not well:  # shifted first step: ‖A D‖₂² ≤ ‖A D‖_F² = m
        shift = 11.0 * (m * n + m * (m + 1)) * _U * float(np.trace(G))
        G[np.diag_indices(m)] += shift
        R1 = _chol(G)
        if R1 is None:
            return None
    S = R1 / d[None, :]  # R₁ D⁻¹: upper triangular, A S⁻¹ = (A D) R₁⁻¹
    Q = _solve_right(A, S)
    steps = 1 if well else 2
    for step in range(steps):
        R2 = _chol(_gram(Q))
        if R2 is None:
            return None
        S = R2 @ S
        if step + 1 < steps:
            Q = _solve_right(Q, R2)
    if not np.all(np.isfinite(S)):
        return None
    return np.triu(S)


def absorb(R: np.ndarray | None, B: np.ndarray) -> np.ndarray:
    """R factor of ``[R; B]``: the rows of B added to the rows whose R factor is ``R`` (None: no rows yet).
    See the module docstring; the result does not depend on whether the fast path is taken, only its cost."""
    if R is None:
        return qr_r(B)
    if B.shape[0] == 0:
        return R
    S = _absorbed(R, B)
    return S if S is not None else merge([R, qr_r(B)])


def _usable(R: np.ndarray) -> bool:
    """Whether R is finite and, column-scaled to a unit diagonal, not singular to working precision (its
    1-norm condition estimate), so that ``B R⁻¹`` is worth computing."""
    d = np.abs(np.diag(R))
    if not np.all(d > 0) or not np.all(np.isfinite(d)):
        return False
    rcond, info = _lapack.dtrcon(np.asfortranarray(R / d[None, :]), norm="1", uplo="U", diag="N")
    return info == 0 and rcond >= ABSORB_MIN_RCOND


def preconditioned_r(P: np.ndarray, B: np.ndarray) -> np.ndarray | None:
    """R factor of a tall block B (n ≥ m) whose first Cholesky QR step is replaced by ``P``, the R factor
    of other rows drawn like B's (a sibling fold), or None when that does not pay (then ``qr_r``).

    With W = B P⁻¹ (one triangular solve), ``B = W P``, and W is well conditioned whenever B's rows
    explore the same directions as P's, whatever the condition of B: CholeskyQR of W, ``WᵀW = SᵀS``, then
    gives the R factor ``S P``. This is CholeskyQR2's second step with P as its first factor (Yamamoto,
    Nakatsukasa, Yanagisawa & Fukaya, ETNA 44 (2015)): the residual ``B − Q S P`` is at rounding level and
    ``QᵀQ`` departs from I by about κ(W)² u, so ``‖R v‖ = ‖B v‖ (1 + O(κ(W)² u))`` in every direction v.
    One step is kept while the 1-norm estimate of κ(S) is at most ``PRECOND_ONE_STEP`` (κ(W)² u ≤ 1e-12);
    up to ``CQR2_MAX_COND`` a second Cholesky QR step of ``W S⁻¹`` follows (CholeskyQR2 of W); beyond,
    None. Cost: 2·n·m² flops (one solve, one Gram), against 5·n·m² for shifted CholeskyQR3 of B."""
    n, m = B.shape
    if n < m or P.shape != (m, m) or not _usable(P):
        return None
    P = np.asfortranarray(P, dtype=np.float64)
    W = _solve_right(np.asarray(B, dtype=np.float64), P)
    G = _gram(W)
    if not np.isfinite(float(np.trace(G))):
        return None
    S = _chol(G)
    if S is None:
        return None
    rcond, info = _lapack.dtrcon(S, norm="1", uplo="U", diag="N")
    if info != 0 or not rcond * CQR2_MAX_COND >= 1.0:
        return None
    if rcond * PRECOND_ONE_STEP < 1.0:
        S2 = _chol(_gram(_solve_right(W, np.asfortranarray(S))))
        if S2 is None:
            return None
        S = S2 @ S
    out = np.triu(_blas.dtrmm(1.0, np.asfortranarray(S), P, side=0, lower=0))  # S P, both upper triangular
    return out if np.all(np.isfinite(out)) else None


def _absorbed(R: np.ndarray, B: np.ndarray) -> np.ndarray | None:
    m = R.shape[0]
    # the running R column-scaled to a unit diagonal: its 1-norm condition estimate says if it is usable
    if not _usable(R):
        return None
    W = _solve_right(np.asarray(B, dtype=np.float64), np.asfortranarray(R))
    G = _gram(W)
    if not float(np.trace(G)) <= ABSORB_MAX_W2:  # also false for a non-finite W
        return None
    G[np.diag_indices(m)] += 1.0
    S = _chol(G)
    if S is None:
        return None
    out = np.triu(_blas.dtrmm(1.0, S, np.asfortranarray(R), side=0, lower=0))  # S R, both upper triangular
    return out if np.all(np.isfinite(out)) else None


def merge(factors: list[np.ndarray]) -> np.ndarray:
    """R factor of the union of the row blocks whose R factors are given.

    Square factors are merged pairwise by LAPACK's triangular-pentagonal Householder QR (``dtpqrt``: the
    QR of ``[R₁; R₂]`` that touches only the upper triangle of R₂, about m³ flops instead of the 8·m³ of
    a Cholesky QR of the stacked 2m × m matrix); Householder QR of the stack is backward stable, so the
    merged R is as accurate as the factors. Anything else is stacked and factored (``qr_r``)."""
    factors = [f for f in factors if f is not None]
    if len(factors) == 1:
        return factors[0]
    m = factors[0].shape[1]
    if all(f.shape == (m, m) for f in factors) and m:
        R = np.array(factors[0], dtype=np.float64, order="F")
        for F in factors[1:]:
            F = np.asarray(F, dtype=np.float64)
            upper = not np.any(np.tril(F, -1))
            a, _, _, info = _lapack.dtpqrt(m if upper else 0, min(m, TPQRT_BLOCK), R,
                                           np.array(F, order="F"), overwrite_a=1, overwrite_b=1)
            if info != 0:
                return qr_r(np.vstack(factors))
            R = a
        R = np.triu(R)
        neg = np.diag(R) < 0
        R[neg] *= -1.0  # the signs of R's rows are free (module docstring): a positive diagonal, as Cholesky QR gives
        return R
    return qr_r(np.vstack(factors))


@dataclass
class Summary:
    """The R factor of ``[1, Φ, y]`` over some rows, and how many rows (the sum of the row weights when the
    rows are weighted, see ``of``)."""

    R: np.ndarray
    n: int

    @staticmethod
    def of(Phi: np.ndarray, y: np.ndarray, chunk_rows: int = CHUNK_ROWS, on_block=None, threads: int = 1,
           weights: np.ndarray | None = None, precondition: np.ndarray | None = None) -> "Summary":
        """``on_block(rows)``, if given, is called after each chunk of rows (progress of a long pass), in
        the calling thread. The chunks are absorbed (``absorb``) into the running R of ``SEGMENTS`` fixed
        runs of chunks, merged at the end; ``threads`` > 1 works on the runs at once (the result is the
        same).

        ``weights`` (n,), non-negative: the summary of the rows scaled by √w, ``[√w, √w Φ, √w y]``, whose
        ``RᵀR`` holds the weighted cross-products; ``n`` is then Σw, so every mean, scale, penalty and
        metric computed from it is the weighted one (weighted least squares; a zero weight drops the row).

        ``precondition``: the R factor of other rows like these (a sibling fold's summary), used as the
        first step of each run's first chunk (``preconditioned_r``) instead of factoring it from scratch."""
        from .parallel import ordered_map

        n, p = Phi.shape
        order = "F" if p and Phi.strides[0] < Phi.strides[1] else "C"  # keep a column-major design's order
        root = None if weights is None else np.sqrt(np.asarray(weights, dtype=np.float64))

        def block(lo: int) -> np.ndarray:
            hi = min(n, lo + chunk_rows)
            A = np.empty((hi - lo, p + 2), order=order)
            A[:, 0] = 1.0
            A[:, 1:-1] = Phi[lo:hi]
            A[:, -1] = y[lo:hi]
            if root is not None:
                A *= root[lo:hi, None]
            return A

        # the chunks in SEGMENTS contiguous runs, each absorbed chunk by chunk into its own running R (a
        # fixed split, so the result does not depend on the thread count), then the runs merged
        starts = list(range(0, n, chunk_rows))
        if not starts:
            return Summary(np.zeros((p + 2, p + 2)), 0)
        runs = [r for r in np.array_split(np.array(starts), min(SEGMENTS, len(starts))) if r.size]
        done: list = []  # rows of each chunk absorbed, in order, for on_block

        def factor(run: np.ndarray) -> np.ndarray:
            R = None
            for lo in run.tolist():
                B = block(lo)
                first = None if R is not None or precondition is None else preconditioned_r(precondition, B)
                R = first if first is not None else absorb(R, B)
                done.append(min(n, lo + chunk_rows) - lo)
            return R

        if on_block is None or threads <= 1 or len(runs) == 1:
            parts = []
            for R in ordered_map(factor, runs, threads):
                parts.append(R)
                if on_block is not None:
                    while done:
                        on_block(done.pop(0))
        else:  # runs on threads, progress reported from this thread as their chunks finish
            parts = _with_progress(factor, runs, threads, done, on_block)
        total = n if root is None else float(np.sum(np.asarray(weights, dtype=np.float64)))
        return Summary(merge(parts), total)

    @staticmethod
    def of_grouped(codes: np.ndarray, levels: int, Phi: np.ndarray, y: np.ndarray,
                   weights: np.ndarray | None = None, precondition: np.ndarray | None = None,
                   threads: int = 1) -> tuple["Summary", np.ndarray]:
        """Summary of ``[1, E, Φ, y]`` where E (n × levels) is the one-hot block of ``codes`` (n,) (every
        code in ``[0, levels)``), without E in any row-level factorization; also the R factor of the inner
        ``[1, Φ_c, y_c]`` (a ``precondition`` for sibling atoms' inner factors).

        E's columns have disjoint supports, so they are orthogonal, and with c_g the (weighted) row count
        of level g and M the per-level means of ``[Φ, y]``, ``[Φ, y] = E M + [Φ_c, y_c]`` where the
        level-centred ``[Φ_c, y_c]`` is orthogonal to E. Hence, exactly,
        ``AᵀA = KᵀK`` for the small matrix K whose rows are, per level, ``√c_g · [1, e_g, M_g]`` and, below
        them, ``[0, 0, R_c]`` with R_c the inner R factor of the centred block (``of``, so Cholesky QR with
        its guards, or Householder QR); R is then the R factor of K (Householder QR of a (levels + p + 2)-
        square matrix: the intercept column is the sum of E's, so K is rank deficient, which Householder
        QR takes in its stride, and nothing downstream depends on which of the R factors with ``RᵀR = KᵀK``
        it is: module docstring). Accuracy: the per-level sums (a sparse product, ``Eᵀ [Φ, y]``) and the
        centring have the rounding of a mean, a backward error of order u·|x| in each row, as in the
        centring any QR of ``[1, Φ, y]`` performs; no Gram matrix of the rows is formed, so the condition
        number is not squared. Cost: the row-level factorization has p + 2 columns instead of
        levels + p + 2 (its flops fall by ((levels + p + 2) / (p + 2))²)."""
        from scipy import sparse

        n, p = Phi.shape
        codes = np.asarray(codes, dtype=np.int64)
        w = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
        Et = sparse.csr_matrix((w, (codes, np.arange(n))), shape=(levels, n))  # Eᵀ diag(w)
        N = np.empty((n, p + 1), order="F")
        N[:, :p] = Phi
        N[:, p] = y
        count = np.asarray(Et.sum(axis=1)).ravel()  # Σ w per level
        sums = np.asarray(Et @ N)
        seen = count > 0
        means = np.zeros_like(sums)
        means[seen] = sums[seen] / count[seen, None]
        N -= means[codes]
        inner = Summary.of(N[:, :p], N[:, p], weights=weights, precondition=precondition, threads=threads)
        m = 1 + levels + p + 1
        K = np.zeros((levels + p + 2, m))
        root = np.sqrt(count)
        K[:levels, 0] = root
        K[np.arange(levels), 1 + np.arange(levels)] = root
        K[:levels, 1 + levels:] = root[:, None] * means
        K[levels:, 1 + levels:] = inner.R[:, 1:]
        K = K[np.concatenate([seen, np.ones(p + 2, dtype=bool)])]  # a level without rows here gives a zero row
        total = n if weights is None else float(np.sum(w))
        return Summary(householder_r(K), total), inner.R

    @staticmethod
    def combine(items: list["Summary"]) -> "Summary":
        kept = [s for s in items if s.n > 0]
        if not kept:
            return Summary(np.zeros_like(items[0].R), 0)
        return Summary(merge([s.R for s in kept]), sum(s.n for s in kept))

    def permuted(self, order: list[int]) -> "Summary":
        """Summary of A[:, order]: ``A P = Q (R P)``, so an R factor of ``R P`` serves (no rows needed)."""
        return Summary(qr_r(self.R[:, order]), self.n)

    def leading(self, k: int) -> "Summary":
        """Summary of ``[1, Φ[:, :k-1], y]`` from the summary of ``[1, Φ, y]``: exact, because an R
        factor's leading columns depend only on the leading columns of A, and y's component outside
        their span has norm ‖R[k:, -1]‖. Nested bases (polynomial degrees) share one pass this way."""
        m = self.R.shape[0]
        if k + 1 == m:
            return self
        R = np.zeros((k + 1, k + 1))
        R[:k, :k] = self.R[:k, :k]
        R[:k, k] = self.R[:k, -1]
        R[k, k] = np.linalg.norm(self.R[k:, -1])
        return Summary(R, self.n)

    def centred(self) -> tuple[np.ndarray, np.ndarray]:
        """(means of [Φ, y], R factor of the column-centred [Φ, y])."""
        r11 = self.R[0, 0]
        means = self.R[0, 1:] / r11
        return means, self.R[1:, 1:]

    def sse(self, V: np.ndarray) -> np.ndarray:
        """Residual sums of squares ``‖A v‖²`` for each column v of V (m × L)."""
        E = self.R @ V
        return np.einsum("ij,ij->j", E, E)

    def total_ss(self) -> float:
        """Sum of squares of y about its own mean over these rows."""
        return float(np.sum(self.R[1:, -1] ** 2))


def _with_progress(factor, runs, threads: int, done: list, on_block) -> list[np.ndarray]:
    """``factor`` over ``runs`` on threads; meanwhile ``on_block(rows)`` in this thread for every chunk
    the threads report in ``done``."""
    import time
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=min(threads, len(runs)), thread_name_prefix="tikhon-rows") as pool:
        futures = [pool.submit(factor, r) for r in runs]
        while not all(f.done() for f in futures):
            while done:
                on_block(done.pop(0))
            time.sleep(0.01)
        while done:
            on_block(done.pop(0))
        return [f.result() for f in futures]
