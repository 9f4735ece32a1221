"""Penalized least squares for every strength at once, from a training summary.

Inside a fold (and at the refit) basis columns are centred and scaled to unit population variance on
that fold's training rows; a column that is constant there keeps scale 1 (and coefficient 0). The
intercept is never penalized. With ``Z`` the scaled, centred columns and ``y_c`` the centred target:

- L2 minimizes ``‖y_c − Zβ‖² + λ‖β‖²`` — ``sklearn.linear_model.Ridge(alpha=λ)`` after
  ``StandardScaler``. With the SVD ``Z = U S Vᵀ`` of the summary block, ``β(λ) = V diag(s/(s²+λ)) Uᵀ y_c``
  for every λ at once. λ = 0 gives the minimum-norm least-squares solution (singular values below
  ``eps · max(n, p) · s_max`` are dropped, as ``numpy.linalg.lstsq`` does).
- L1 / elastic net minimize scikit-learn's ``ElasticNet`` objective
  ``1/(2n) ‖y_c − Zβ‖² + λρ‖β‖₁ + λ(1−ρ)/2 ‖β‖²`` by coordinate descent (``sklearn.linear_model.enet_path``)
  on the small summary block in place of the rows: ``‖y_c − Zβ‖²`` equals ``‖c_y − Cβ‖²`` plus a
  constant, where ``[C, c_y]`` is the summary block, so with the strength rescaled by n / (p + 1)
  the minimizer is the same.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from .summaries import Summary

ENET_TOL = 1e-10
ENET_MAX_ITER = 1_000_000  # cheap: each sweep touches only the (p+1) × p summary block


@dataclass
class Fit:
    """Coefficients of one penalty family over a strength grid, for one training summary."""

    strengths: np.ndarray  # (L,)
    beta: np.ndarray  # (L, p) coefficients of the scaled columns
    intercept: np.ndarray  # (L,)
    mean: np.ndarray  # (p,) column means on the training rows
    scale: np.ndarray  # (p,) column scales on the training rows
    y_mean: float
    n: int
    singular: np.ndarray | None = None  # (r,) singular values of Z (L2 only)
    right: np.ndarray | None = None  # (r, p) right singular vectors of Z (L2 only)

    @property
    def weights(self) -> np.ndarray:
        """(L, p) coefficients on the raw (unscaled, uncentred) basis columns."""
        return self.beta / self.scale

    def residual_operator(self) -> np.ndarray:
        """(p + 2, L): column l is ``v`` with ``A v = y − b_l − Φ w_l`` for ``A = [1, Φ, y]``."""
        L, p = self.beta.shape
        V = np.empty((p + 2, L))
        V[0] = -self.intercept
        V[1:-1] = -self.weights.T
        V[-1] = 1.0
        return V

    def df(self) -> np.ndarray:
        """(L,) complexity of each fit, intercept excluded: the effective degrees of freedom for L2
        (``effective_df``), the number of nonzero coefficients for L1 / elastic net (an unbiased estimate
        of their degrees of freedom: Zou, Hastie & Tibshirani, "On the degrees of freedom of the lasso",
        Annals of Statistics 35(5), 2007)."""
        if self.singular is not None:
            return self.effective_df()
        return np.count_nonzero(self.beta, axis=1).astype(float)

    def effective_df(self) -> np.ndarray:
        """``df(λ) = Σ s_j² / (s_j² + λ)`` (Hastie, Tibshirani & Friedman, ESL eq. 3.50), intercept excluded."""
        if self.singular is None:
            raise ValueError("effective degrees of freedom are defined here for the l2 penalty")
        s2 = self.singular[:, None] ** 2
        lam = self.strengths[None, :]
        with np.errstate(divide="ignore", invalid="ignore"):
            frac = np.where(s2 > 0, s2 / (s2 + lam), 0.0)
        return frac.sum(axis=0)


def centred_scaled(summary: Summary) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, np.ndarray]:
    """(Z block, c_y, column means, column scales, y mean) of a training summary."""
    means, C = summary.centred()
    p = C.shape[1] - 1
    norms = np.sqrt(np.einsum("ij,ij->j", C[:, :p], C[:, :p]))
    std = norms / np.sqrt(summary.n)
    # A column constant on these rows (up to rounding) keeps scale 1; StandardScaler does the same.
    const = std <= 10 * np.finfo(float).eps * np.maximum(1.0, np.abs(means[:p]))
    scale = np.where(const, 1.0, std)
    Z = C[:, :p] / scale
    Z[:, const] = 0.0
    return Z, C[:, p], means[:p], scale, float(means[p])


def fit_l2(summary: Summary, strengths: np.ndarray) -> Fit:
    Z, cy, mean, scale, y_mean = centred_scaled(summary)
    U, s, Vt = np.linalg.svd(Z, full_matrices=False)
    p = Z.shape[1]
    cutoff = np.finfo(float).eps * max(summary.n, p) * (s[0] if s.size else 0.0)
    keep = s > cutoff
    U, s, Vt = U[:, keep], s[keep], Vt[keep]
    uty = U.T @ cy
    lam = np.asarray(strengths, dtype=float)
    D = s[None, :] / (s[None, :] ** 2 + lam[:, None])  # (L, r)
    beta = (D * uty[None, :]) @ Vt  # (L, p)
    intercept = y_mean - (beta / scale) @ mean
    return Fit(lam, beta, intercept, mean, scale, y_mean, summary.n, s, Vt)


def fit_enet(summary: Summary, strengths: np.ndarray, l1_ratio: float) -> Fit:
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.linear_model import enet_path

    Z, cy, mean, scale, y_mean = centred_scaled(summary)
    m, p = Z.shape
    lam = np.asarray(strengths, dtype=float)
    order = np.argsort(-lam)  # a decreasing path, warm-started
    alphas = lam[order] * summary.n / m
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        _, coefs, _ = enet_path(
            np.asfortranarray(Z), cy, l1_ratio=l1_ratio, alphas=alphas, tol=ENET_TOL, max_iter=ENET_MAX_ITER,
            precompute=False, check_input=True,
        )
    beta = np.empty((lam.size, p))
    beta[order] = coefs.T
    intercept = y_mean - (beta / scale) @ mean
    return Fit(lam, beta, intercept, mean, scale, y_mean, summary.n)


def fit(summary: Summary, kind: str, strengths: np.ndarray, l1_ratio: float | None) -> Fit:
    if kind == "l2":
        return fit_l2(summary, strengths)
    return fit_enet(summary, strengths, 1.0 if l1_ratio is None else l1_ratio)


def leverage_factor(Z: np.ndarray, strength: float, kind: str, l1_ratio: float | None, n: int,
                    beta: np.ndarray) -> np.ndarray:
    """Matrix F with ``h(x) = 1/n + ‖F z‖²`` for a scaled, centred basis row z.

    L2: ``(ZᵀZ + λI)⁻¹ = V diag(1/(s²+λ)) Vᵀ`` (pseudo-inverse where s = 0 and λ = 0). L1 / elastic
    net: the same on the active columns with the ridge part of the penalty, ``n λ (1 − ρ)``, which is
    the leverage of the final fit viewed as a ridge fit on its active set (common practice).
    """
    p = Z.shape[1]
    if kind == "l2":
        cols = np.arange(p)
        lam = strength
    else:
        cols = np.flatnonzero(beta != 0)
        lam = n * strength * (1.0 - (1.0 if l1_ratio is None else l1_ratio))
    F = np.zeros((p, p))
    if cols.size == 0:
        return F[:0]
    _, s, Vt = np.linalg.svd(Z[:, cols], full_matrices=False)
    cutoff = np.finfo(float).eps * max(n, p) * (s[0] if s.size else 0.0)
    denom = s ** 2 + lam
    inv = np.where((s > cutoff) & (denom > 0), 1.0 / np.sqrt(np.where(denom > 0, denom, 1.0)), 0.0)
    Fa = inv[:, None] * Vt  # (r, |cols|)
    out = np.zeros((Fa.shape[0], p))
    out[:, cols] = Fa
    return out
