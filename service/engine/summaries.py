"""Per-fold data summaries: the R factor of ``A = [1, Φ, y]``.

For a block of rows, ``R = qr_r(A)`` is an (m × m) upper-triangular matrix, m = p + 2, with
``AᵀA = RᵀR``. Summaries merge by stacking and re-factoring (``merge``), so a fold's summary can be
built chunk by chunk, partition by partition, on one machine or many, and the result does not depend
on how the rows were cut. Everything downstream (means, standard deviations, coefficients for every
penalty strength, validation sums of squares) is small m × m algebra on these factors.

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
from scipy.linalg import qr as _scipy_qr

CHUNK_ROWS = 16_384


def qr_r(A: np.ndarray) -> np.ndarray:
    """Square (m × m) R factor of ``A`` (rows may be fewer than m; the rest is zero)."""
    n, m = A.shape
    if n == 0:
        return np.zeros((m, m))
    R = _scipy_qr(A, mode="r", overwrite_a=False, check_finite=False)[0]
    if R.shape[0] < m:
        R = np.vstack([R, np.zeros((m - R.shape[0], m))])
    return np.triu(R[:m])


def merge(factors: list[np.ndarray]) -> np.ndarray:
    """R factor of the union of the row blocks whose R factors are given."""
    factors = [f for f in factors if f is not None]
    if len(factors) == 1:
        return factors[0]
    return qr_r(np.vstack(factors))


@dataclass
class Summary:
    """The R factor of ``[1, Φ, y]`` over some rows, and how many rows (the sum of the row weights when the
    rows are weighted, see ``of``)."""

    R: np.ndarray
    n: int

    @staticmethod
    def of(Phi: np.ndarray, y: np.ndarray, chunk_rows: int = CHUNK_ROWS, on_block=None,
           weights: np.ndarray | None = None) -> "Summary":
        """``on_block(rows)``, if given, is called after each chunk of rows (progress of a long pass).

        ``weights`` (n,), non-negative: the summary of the rows scaled by √w, ``[√w, √w Φ, √w y]``, whose
        ``RᵀR`` holds the weighted cross-products; ``n`` is then Σw, so every mean, scale, penalty and
        metric computed from it is the weighted one (weighted least squares; a zero weight drops the row)."""
        n, p = Phi.shape
        parts = []
        root = None if weights is None else np.sqrt(np.asarray(weights, dtype=np.float64))
        for lo in range(0, n, chunk_rows):
            hi = min(n, lo + chunk_rows)
            A = np.empty((hi - lo, p + 2), order="F")
            A[:, 0] = 1.0
            A[:, 1:-1] = Phi[lo:hi]
            A[:, -1] = y[lo:hi]
            if root is not None:
                A *= root[lo:hi, None]
            parts.append(qr_r(A))
            if on_block is not None:
                on_block(hi - lo)
        if not parts:
            return Summary(np.zeros((p + 2, p + 2)), 0)
        total = n if root is None else float(np.sum(np.asarray(weights, dtype=np.float64)))
        return Summary(merge(parts), total)

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
