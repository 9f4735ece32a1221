"""Penalized least squares for every strength at once, from a training summary.

Inside a fold (and at the refit) basis columns are centred and scaled to unit population variance on
that fold's training rows; a column that is constant there keeps scale 1 (and coefficient 0). The
intercept is never penalized. With ``Z`` the scaled, centred columns and ``y_c`` the centred target:

- L2 minimizes ``‖y_c − Zβ‖² + λ‖β‖²`` — ``sklearn.linear_model.Ridge(alpha=λ)`` after
  ``StandardScaler``. With the SVD ``Z = U S Vᵀ`` of the summary block, ``β(λ) = V diag(s/(s²+λ)) Uᵀ y_c``
  for every λ at once. λ = 0 gives the minimum-norm least-squares solution (singular values below
  ``eps · max(n, p) · s_max`` are dropped, as ``numpy.linalg.lstsq`` does).
- L1 / elastic net minimize scikit-learn's ``ElasticNet`` objective
  ``1/(2n) ‖y_c − Zβ‖² + λρ‖β‖₁ + λ(1−ρ)/2 ‖β‖²`` on the training Gram matrix ``ZᵀZ = CᵀC`` and ``Zᵀy_c = Cᵀc_y``,
  both from the summary block ``[C, c_y]`` (no rows needed), by an exact active-set method along the
  strength path with warm starts and strong-rule screening (``enet_gram``). Every fit carries its KKT
  violation; ``watch_convergence`` collects those above ``KKT_TOL`` so the version can name them.
"""

from __future__ import annotations

from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass

import numpy as np

from .summaries import Summary

KKT_TOL = 1e-6  # a sparse fit whose KKT violation / strength exceeds this is reported as not converged
_UNCONVERGED: ContextVar[dict | None] = ContextVar("tikhon_unconverged", default=None)


@contextmanager
def watch_convergence():
    """Collect, while active, every sparse fit that ended above ``KKT_TOL``:
    ``{(strength, l1_ratio): largest KKT violation / strength}``."""
    seen: dict[tuple[float, float], float] = {}
    token = _UNCONVERGED.set(seen)
    try:
        yield seen
    finally:
        _UNCONVERGED.reset(token)


def report_convergence(seen: dict[tuple[float, float], float]) -> None:
    """Add fits collected by a ``watch_convergence`` of another thread (whose context does not reach the
    caller's) to the caller's active one, if any; the largest violation per key is kept, so the order of
    the reports does not matter."""
    into = _UNCONVERGED.get()
    if into is not None:
        for key, v in seen.items():
            into[key] = max(into.get(key, 0.0), v)


def convergence_warnings(seen: dict[tuple[float, float], float]) -> list[str]:
    """One warning naming the strengths (per l1 ratio) whose sparse fits did not converge."""
    if not seen:
        return []
    by_ratio: dict[float, list[float]] = {}
    for (lam, ratio), _ in sorted(seen.items()):
        by_ratio.setdefault(ratio, []).append(lam)
    parts = [f"l1_ratio {r:g}: strengths {', '.join(f'{v:.4g}' for v in lams)}" for r, lams in by_ratio.items()]
    return [f"the sparse solver stopped short of the optimum (largest KKT violation {max(seen.values()):.2g} × "
            f"strength, above {KKT_TOL:g}) at {'; '.join(parts)}; their CV figures may be slightly off"]


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
    kkt: np.ndarray | None = None  # (L,) largest KKT violation / strength (L1 / elastic net only)

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


def l2_df(summary: Summary, strengths: np.ndarray) -> np.ndarray:
    """(L,) ``fit_l2(summary, strengths).df()`` from the singular values alone (no singular vectors: about
    a third of the SVD's cost), with the same cutoff for dropped singular values."""
    Z = centred_scaled(summary)[0]
    s = np.linalg.svd(Z, compute_uv=False)
    cutoff = np.finfo(float).eps * max(summary.n, Z.shape[1]) * (s[0] if s.size else 0.0)
    s = s[s > cutoff]
    return Fit(np.asarray(strengths, dtype=float), np.zeros((0, 0)), np.zeros(0), np.zeros(0), np.zeros(0), 0.0,
               summary.n, s).effective_df()


def fit_enet(summary: Summary, strengths: np.ndarray, l1_ratio: float) -> Fit:
    """Elastic net (lasso at ``l1_ratio`` 1) for every strength, on the training Gram matrix.

    Minimizes scikit-learn's ``ElasticNet`` objective ``1/(2n)‖y_c − Zβ‖² + αρ‖β‖₁ + α(1−ρ)/2‖β‖²``; times
    n and up to a constant that is ``½βᵀHβ − cᵀβ + γ‖β‖₁`` with ``G = ZᵀZ`` and ``c = Zᵀy_c`` from the summary
    block, ``H = G + nα(1−ρ)I`` and ``γ = nαρ``. See ``enet_gram``."""
    Z, cy, mean, scale, y_mean = centred_scaled(summary)
    G = Z.T @ Z
    c = Z.T @ cy
    lam = np.asarray(strengths, dtype=float)
    beta, kkt = enet_gram(G, c, summary.n, lam, l1_ratio)
    seen = _UNCONVERGED.get()
    if seen is not None:
        for v, k in zip(lam, kkt):
            if not k <= KKT_TOL:
                key = (float(v), float(l1_ratio))
                seen[key] = max(seen.get(key, 0.0), float(k))
    intercept = y_mean - (beta / scale) @ mean
    return Fit(lam, beta, intercept, mean, scale, y_mean, summary.n, kkt=kkt)


def enet_gram(G: np.ndarray, c: np.ndarray, n: int, strengths: np.ndarray, l1_ratio: float
              ) -> tuple[np.ndarray, np.ndarray]:
    """(β (L, p), relative KKT violation (L,)) of the elastic net for every strength, from the Gram matrix.

    An active-set method with exact steps (the feature-sign search of Lee, Battle, Raina & Ng, "Efficient
    sparse coding algorithms", NIPS 2006, with the ridge part of the penalty added to the quadratic):
    on the current active set A with signs θ the objective is the quadratic ``½βᵀHβ − (c − γθ)ᵀβ``, whose
    minimizer is one linear solve; a discrete line search towards it (the true objective at the
    minimizer and at every point where a coefficient changes sign) keeps the objective strictly
    decreasing, so the method ends, at the exact minimizer, after finitely many steps. The path runs
    from the largest strength down, warm-started, and each strength starts from the sequential strong
    rule's candidates (Tibshirani, Bien, Friedman, Hastie, Simon, Taylor & Tibshirani, "Strong rules for
    discarding predictors in lasso-type problems", JRSS B 74(2), 2012); the KKT conditions are then
    checked on every coefficient, and violators outside the candidates are added until none is left.

    The KKT violation reported is ``max_j |∂_j| / (n α)`` where ∂ is the subgradient residual (for a
    nonzero β_j: ``(Hβ − c)_j + γ sign β_j``; for a zero one: ``max(0, |(Hβ − c)_j| − γ)``), i.e. the
    violation of scikit-learn's objective relative to the strength.
    """
    p = G.shape[0]
    L = strengths.size
    betas = np.zeros((L, p))
    kkts = np.zeros(L)
    rho = float(l1_ratio)
    beta = np.zeros(p)
    gamma_prev = float(np.max(np.abs(c))) if p else 0.0
    diag = np.arange(p)
    for l in np.argsort(-strengths):
        alpha = float(strengths[l])
        gamma = n * alpha * rho
        nu = n * alpha * (1.0 - rho)
        H = G.copy()
        H[diag, diag] += nu
        g = H @ beta - c
        strong = (beta != 0) | (np.abs(g) >= 2.0 * gamma - gamma_prev)
        beta = _enet_active_set(H, c, gamma, beta, strong)
        g = H @ beta - c
        viol = np.where(beta != 0, np.abs(g + gamma * np.sign(beta)), np.maximum(np.abs(g) - gamma, 0.0))
        betas[l] = beta
        kkts[l] = float(viol.max()) / (n * alpha) if p else 0.0
        gamma_prev = gamma
    return betas, kkts


def _enet_active_set(H: np.ndarray, c: np.ndarray, gamma: float, beta: np.ndarray, candidates: np.ndarray
                     ) -> np.ndarray:
    """Minimize ``½βᵀHβ − cᵀβ + γ‖β‖₁`` from ``beta`` (see ``enet_gram``)."""
    p = H.shape[0]
    beta = beta.copy()
    candidates = candidates.copy()
    scale = float(np.max(np.abs(c))) if p else 0.0
    hmax = float(np.max(np.abs(np.diag(H)))) if p else 0.0
    single = False  # after a step that did not descend, add one violator at a time (Lee et al.'s rule)
    for _ in range(10 * p + 100):  # a cap; a fit stopped by it shows in its KKT figure and warning
        g = H @ beta - c
        active = beta != 0
        noise = 64 * np.finfo(float).eps * (scale + hmax * float(np.abs(beta).sum()))
        tol = max(1e-12 * gamma, noise)
        theta = np.sign(beta)
        A = np.flatnonzero(active)
        added = 0
        if not (A.size and np.max(np.abs(g[A] + gamma * theta[A])) > tol):
            over = (~active) & (np.abs(g) > gamma + tol)
            if not (over & candidates).any():
                if not over.any():
                    return beta  # KKT conditions hold everywhere
                candidates |= over  # a violator the strong rule had discarded
            add = np.flatnonzero(over & candidates)
            if single:
                add = add[[int(np.argmax(np.abs(g[add])))]]
            theta[add] = -np.sign(g[add])
            added = add.size
            A = np.union1d(A, add)
        if not _feature_sign_step(H, c, gamma, beta, theta, A, g):
            if single or added <= 1:
                return beta  # no descent left at this precision
            single = True
        else:
            single = False
    return beta


def _feature_sign_step(H, c, gamma, beta, theta, A, g) -> bool:
    """One step on the active set A with signs θ (in place); False when it could not lower the objective."""
    HA = H[np.ix_(A, A)]
    bA = beta[A]
    target, null_dir = _restricted_minimizer(HA, c[A] - gamma * theta[A])
    fresh = bA == 0
    if target is not None and fresh.sum() > 1:
        wrong = fresh & (np.sign(target) != theta[A])
        if wrong.any() and not wrong[fresh].all():
            # newly added coefficients whose restricted optimum has the other sign would leave their
            # orthant at once: leave them out of this step (they are checked again after it)
            keep = ~wrong
            A, HA, bA = A[keep], HA[np.ix_(keep, keep)], bA[keep]
            target, null_dir = _restricted_minimizer(HA, c[A] - gamma * theta[A])
    if null_dir is not None:
        # the restricted quadratic is unbounded below along a null direction (collinear active columns,
        # lasso): move along it until the first coefficient reaches zero
        hits = np.flatnonzero(bA * null_dir < 0)
        if hits.size == 0:
            return False
        ratios = -bA[hits] / null_dir[hits]
        new = bA + ratios.min() * null_dir
        new[hits[np.argmin(ratios)]] = 0.0
        beta[A] = new
        return True
    d = target - bA
    # the true objective along bA + t d, up to a constant: t (gᵀd) + t² (dᵀHd) / 2 + γ Σ|bA + t d|
    a = float(g[A] @ d)
    b = float(d @ HA @ d)
    cross = np.flatnonzero((bA != 0) & (np.sign(target) != np.sign(bA)))
    t_cross = bA[cross] / (bA[cross] - target[cross])
    ts = np.concatenate([[1.0], t_cross[(t_cross > 0) & (t_cross < 1.0)]])
    pts = bA[None, :] + ts[:, None] * d[None, :]
    vals = ts * a + 0.5 * ts ** 2 * b + gamma * np.abs(pts).sum(axis=1)
    k = int(np.argmin(vals))
    v0 = gamma * float(np.abs(bA).sum())
    slack = 1e-13 * (abs(v0) + abs(a) + abs(b))
    if not (vals[k] < v0 or (k > 0 and vals[k] <= v0 + slack)):
        return False  # at the restricted optimum to rounding (a step to a sign change always counts:
        # a coefficient a rounding error away from zero is then dropped)
    new = pts[k]
    if k > 0:
        new[cross[t_cross == ts[k]]] = 0.0
    beta[A] = new
    return True


def _restricted_minimizer(HA: np.ndarray, rhs: np.ndarray) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(minimizer of ½xᵀHx − rhsᵀx, None), or (None, a descent direction in H's null space) when the
    quadratic is unbounded below. Cholesky when H is positive definite, else an eigendecomposition
    (minimum-norm minimizer when rhs lies in H's range)."""
    try:
        Lc = np.linalg.cholesky(HA)
        if np.min(np.diag(Lc)) ** 2 > 1e-12 * float(np.max(np.diag(HA))):
            return np.linalg.solve(HA, rhs), None
    except np.linalg.LinAlgError:
        pass
    w, V = np.linalg.eigh(HA)
    cut = 1e-12 * max(float(w[-1]), 0.0)
    pos = w > cut
    coef = V.T @ rhs
    null = V[:, ~pos] @ coef[~pos]
    if np.linalg.norm(null) > 1e-10 * max(np.linalg.norm(rhs), 1e-300):
        return None, null
    return V[:, pos] @ (coef[pos] / w[pos]), None


def fit(summary: Summary, kind: str, strengths: np.ndarray, l1_ratio: float | None) -> Fit:
    if kind == "l2":
        return fit_l2(summary, strengths)
    return fit_enet(summary, strengths, 1.0 if l1_ratio is None else l1_ratio)


def leverage_factor(Z: np.ndarray, strength: float, kind: str, l1_ratio: float | None, n: int,
                    beta: np.ndarray, svd: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """Matrix F with ``h(x) = 1/n + ‖F z‖²`` for a scaled, centred basis row z.

    L2: ``(ZᵀZ + λI)⁻¹ = V diag(1/(s²+λ)) Vᵀ`` (pseudo-inverse where s = 0 and λ = 0). L1 / elastic
    net: the same on the active columns with the ridge part of the penalty, ``n λ (1 − ρ)``, which is
    the leverage of the final fit viewed as a ridge fit on its active set (common practice).

    ``svd``: for L2, the singular values and right singular vectors that ``fit_l2`` kept for this same Z
    (``Fit.singular``, ``Fit.right``), so Z is not decomposed a second time; the dropped ones give the
    zero rows they give here.
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
    if kind == "l2" and svd is not None:
        s, Vt = svd
        denom = s ** 2 + lam
        out = np.zeros((min(Z.shape), p))
        out[:s.size] = np.where(denom > 0, 1.0 / np.sqrt(np.where(denom > 0, denom, 1.0)), 0.0)[:, None] * Vt
        return out
    _, s, Vt = np.linalg.svd(Z[:, cols], full_matrices=False)
    cutoff = np.finfo(float).eps * max(n, p) * (s[0] if s.size else 0.0)
    denom = s ** 2 + lam
    inv = np.where((s > cutoff) & (denom > 0), 1.0 / np.sqrt(np.where(denom > 0, denom, 1.0)), 0.0)
    Fa = inv[:, None] * Vt  # (r, |cols|)
    out = np.zeros((Fa.shape[0], p))
    out[:, cols] = Fa
    return out


def leverage_triangle(F: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """Upper-triangular T (p × p) with ``‖F z‖ = ‖T (x − mean)‖`` for ``z = (x − mean) / scale``: the R
    factor of F (``FᵀF = TᵀT``) with the column scaling folded in, so the leverages of many rows cost one
    triangular product (half the flops of ``F z``, at matrix-product speed) and no scaled copy of them."""
    from .summaries import householder_r

    p = scale.size
    if F.shape[0] == 0:
        return np.zeros((p, p))
    return householder_r(np.asarray(F, dtype=np.float64)) / scale[None, :]


def row_leverages(D: np.ndarray, mean: np.ndarray, T: np.ndarray, n: float) -> np.ndarray:
    """``1/n + ‖T (xᵢ − mean)‖²`` for every row xᵢ of the design D (n_rows × p), T from
    ``leverage_triangle``. D is overwritten (centred, then multiplied by Tᵀ in place when column-major)."""
    from .blas3 import trmm_right_upper_t

    D -= mean
    if D.flags.f_contiguous and D.shape[0]:
        FZ = trmm_right_upper_t(np.asfortranarray(T), D)  # in place, without holding the GIL
    else:
        FZ = D @ T.T
    FZ *= FZ
    return 1.0 / n + FZ.sum(axis=1)
