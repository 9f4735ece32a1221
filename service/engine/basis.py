"""Basis expansions of standardized inputs.

Definitions (the tests compare them with scikit-learn, so they are exact):

- Inputs are standardized with the mean and population standard deviation of all training rows
  (a constant input keeps scale 1). The basis is fixed from the features only, never the target.
- ``linear``: the standardized inputs themselves.
- ``polynomial`` of degree d: every monomial of the standardized inputs up to degree d, with
  interactions, in the column order of ``sklearn.preprocessing.PolynomialFeatures(d, include_bias=False)``.
- ``rbf`` of width w: ``exp(-||x - c||^2 / (2 w^2))`` for centres c chosen by k-means (seeded, on the
  standardized inputs; when there are more than 50,000 rows, on the 50,000 whose seeded key hashes are
  smallest, so a streamed read picks the same sample) or every row when ``centers >= n``. Widths are therefore in units of standardized inputs.
- Categorical columns are one-hot encoded (one column per level seen in training, levels sorted) and
  appended after the basis expansion. A level unseen in training encodes as all zeros.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

KMEANS_SAMPLE = 50_000


@dataclass(frozen=True)
class InputScaler:
    names: list[str]
    mean: np.ndarray
    scale: np.ndarray

    @classmethod
    def fit(cls, names: list[str], X: np.ndarray, weights: np.ndarray | None = None) -> "InputScaler":
        """Mean and population standard deviation of each column (weighted by ``weights`` when given,
        as ``StandardScaler.fit(X, sample_weight=w)`` computes them); a constant column keeps scale 1."""
        if weights is not None and X.shape[0]:
            w = np.asarray(weights, dtype=np.float64)
            mean = (w @ X) / w.sum()
            std = np.sqrt((w @ (X - mean) ** 2) / w.sum())
            scale = np.where(std > 0, std, 1.0)
            return cls(list(names), mean, scale)
        mean = X.mean(axis=0) if X.shape[0] else np.zeros(X.shape[1])
        std = X.std(axis=0) if X.shape[0] else np.ones(X.shape[1])
        scale = np.where(std > 0, std, 1.0)
        return cls(list(names), mean, scale)

    def transform(self, X: np.ndarray) -> np.ndarray:
        return (X - self.mean) / self.scale


@dataclass(frozen=True)
class BasisSetting:
    """One point of the basis grid: a kind and its setting, with what it needs to expand rows."""

    kind: str  # "linear" | "polynomial" | "rbf"
    degree: int | None = None
    width: float | None = None
    powers: np.ndarray | None = None  # (p, d) int exponents, polynomial
    centers: np.ndarray | None = None  # (m, d) rbf centres, standardized units

    def describe(self) -> dict[str, Any]:
        if self.kind == "polynomial":
            return {"kind": "polynomial", "degree": int(self.degree)}
        if self.kind == "rbf":
            return {"kind": "rbf", "width": float(self.width), "centers": int(self.centers.shape[0])}
        return {"kind": "linear"}

    def label(self) -> str:
        if self.kind == "polynomial":
            return f"polynomial degree {self.degree}"
        if self.kind == "rbf":
            return f"rbf width {self.width:g}"
        return "linear"

    def complexity(self) -> tuple[int, float]:
        """Order used by the one-standard-error rule: simpler first. linear = polynomial degree 1 <
        higher degrees < any RBF; among RBFs, wider is simpler."""
        if self.kind == "linear":
            return (0, 1.0)
        if self.kind == "polynomial":
            return (0, float(self.degree))
        return (1, -float(self.width))

    def n_terms(self, d: int) -> int:
        if self.kind == "linear":
            return d
        if self.kind == "polynomial":
            return int(self.powers.shape[0])
        return int(self.centers.shape[0])

    def term_names(self, names: list[str]) -> list[str]:
        if self.kind == "linear":
            return list(names)
        if self.kind == "polynomial":
            out = []
            for row in self.powers:
                parts = [n if e == 1 else f"{n}^{e}" for n, e in zip(names, row) if e]
                out.append(" ".join(parts))
            return out
        return [f"rbf[{i}]" for i in range(self.centers.shape[0])]

    def expand(self, Xs: np.ndarray) -> np.ndarray:
        """Basis columns of standardized inputs ``Xs`` (n, d) → (n, p), float64, C-contiguous."""
        n, d = Xs.shape
        if self.kind == "linear":
            return np.ascontiguousarray(Xs, dtype=np.float64)
        if self.kind == "polynomial":
            return _monomials(Xs, self.powers, self.plan, self._degree_one)
        return _rbf(Xs, self.centers, self.width)

    def expand_into(self, Xs: np.ndarray, out: np.ndarray) -> np.ndarray:
        """The same columns as ``expand``, written into ``out`` (n, p), best a column-major (Fortran-order)
        view: a pass over many rows builds its design in place this way, column by column (for a
        polynomial, each column is its parent column times one input: one multiply per term per row, on
        contiguous memory), with the same products as ``expand``, so the same values."""
        if self.kind == "polynomial":
            _monomials_into(Xs, self.powers, self.plan, self._degree_one, out)
        else:
            out[...] = self.expand(Xs)
        return out

    @cached_property
    def plan(self):
        return monomial_plan(self.powers) if self.powers is not None else None

    @cached_property
    def _degree_one(self) -> tuple[np.ndarray, np.ndarray]:
        return _degree_one(self.powers)


def polynomial_powers(d: int, degree: int) -> np.ndarray:
    """Exponents in PolynomialFeatures(degree, include_bias=False) order: by total degree, then
    combinations with replacement of the input indices in lexicographic order."""
    from itertools import combinations_with_replacement

    rows = []
    for deg in range(1, degree + 1):
        for combo in combinations_with_replacement(range(d), deg):
            e = np.zeros(d, dtype=np.int64)
            for j in combo:
                e[j] += 1
            rows.append(e)
    return np.array(rows, dtype=np.int64).reshape(-1, d)


def n_polynomial_terms(d: int, degree: int) -> int:
    from math import comb

    return comb(d + degree, degree) - 1


def monomial_plan(powers: np.ndarray) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Per total degree k ≥ 2: (columns of degree k, their parent columns, the input that multiplies the
    parent). A monomial's parent removes one unit of its last input with a nonzero exponent."""
    index = {tuple(r): i for i, r in enumerate(powers)}
    levels: dict[int, list[tuple[int, int, int]]] = {}
    for i, r in enumerate(powers):
        total = int(r.sum())
        if total < 2:
            continue
        j = int(np.flatnonzero(r)[-1])
        parent = r.copy()
        parent[j] -= 1
        levels.setdefault(total, []).append((i, index[tuple(parent)], j))
    return [tuple(np.array(col) for col in zip(*levels[k])) for k in sorted(levels)]


def _degree_one(powers: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(columns of total degree 1, the input each one is)."""
    first = np.flatnonzero(powers.sum(axis=1) == 1)
    return first, np.argmax(powers[first], axis=1)


def _monomials(Xs: np.ndarray, powers: np.ndarray, plan=None, degree_one=None) -> np.ndarray:
    """Columns of degree 1 are the inputs; each higher column is its parent times one input, filled one
    degree level at a time (the same products, in the same order, for one row or a million)."""
    n, d = Xs.shape
    out = np.empty((n, powers.shape[0]), dtype=np.float64)
    first, inputs = degree_one if degree_one is not None else _degree_one(powers)
    out[:, first] = Xs[:, inputs]
    for cols, parents, var in (plan if plan is not None else monomial_plan(powers)):
        out[:, cols] = out[:, parents] * Xs[:, var]
    return out


def _monomials_into(Xs: np.ndarray, powers: np.ndarray, plan, degree_one, out: np.ndarray) -> None:
    """``_monomials`` column by column into ``out`` (fast when ``out``'s columns are contiguous)."""
    X = np.asfortranarray(Xs, dtype=np.float64)
    first, inputs = degree_one
    for c, j in zip(first.tolist(), inputs.tolist()):
        out[:, c] = X[:, j]
    for cols, parents, var in plan:
        for c, p, j in zip(cols.tolist(), parents.tolist(), var.tolist()):
            np.multiply(out[:, p], X[:, j], out=out[:, c])


ROW_CHUNK_CELLS = 1 << 22  # rows × centres per chunk: bounds the temporaries of sq_distances


def _rbf(Xs: np.ndarray, centers: np.ndarray, width: float) -> np.ndarray:
    n, m = Xs.shape[0], centers.shape[0]
    out = np.empty((n, m), dtype=np.float64)
    step = max(1, ROW_CHUNK_CELLS // max(1, m))
    for a in range(0, n, step):
        sq = sq_distances(Xs[a:a + step], centers, width)
        sq *= -1.0 / (2.0 * width * width)
        np.exp(sq, out=out[a:a + step])
    return out


EXPONENT_TOL = 1e-11  # largest rounding error allowed in an RBF exponent ‖x − c‖² / (2w²)
UNDERFLOW = 800.0  # exp(−800) is 0 in float64: pairs this far apart need no accuracy
PAIR_CHUNK = 1 << 20


def sq_distances(Xs: np.ndarray, centers: np.ndarray, width: float | None = None) -> np.ndarray:
    """(n, m) squared distances ‖x − c‖², accurate enough for ``exp(−‖x − c‖² / (2 w²))``.

    The fast form ‖x‖² + ‖c‖² − 2 x·c (one matrix product) carries a rounding error of about
    (d + 4) · eps · (‖x‖² + ‖c‖²), which the exponent multiplies by 1/(2w²): at width 1e-8 a row's distance
    to itself comes out near 1e-15 instead of 0 and its basis value near 1e-31 instead of 1. Every pair
    where that error could exceed ``EXPONENT_TOL`` in the exponent, and whose basis value is not 0 anyway,
    is recomputed in difference form Σ (xₖ − cₖ)², which is exact for coincident points. Without a width,
    every pair whose error exceeds 1e-11 relative is recomputed.
    """
    Xs = np.asarray(Xs, dtype=np.float64)
    centers = np.asarray(centers, dtype=np.float64)
    d = Xs.shape[1]
    xx = np.einsum("ij,ij->i", Xs, Xs)
    cc = np.einsum("ij,ij->i", centers, centers)
    sq = xx[:, None] + cc[None, :] - 2.0 * (Xs @ centers.T)
    np.maximum(sq, 0.0, out=sq)
    err = (xx[:, None] + cc[None, :]) * ((d + 4) * np.finfo(float).eps)
    if width is None:
        redo = err > 1e-11 * sq
    else:
        two_w2 = 2.0 * width * width
        redo = (err > EXPONENT_TOL * two_w2) & (sq < UNDERFLOW * two_w2 + err)
    del err
    ii, jj = np.nonzero(redo)
    for a in range(0, ii.size, PAIR_CHUNK):
        i, j = ii[a:a + PAIR_CHUNK], jj[a:a + PAIR_CHUNK]
        diff = Xs[i] - centers[j]
        sq[i, j] = np.einsum("ij,ij->i", diff, diff)
    return sq


IDENTITY_EXPONENT = 27.7  # exp(−27.7) < 1e-12


def check_rbf_width(sample: np.ndarray, centers: np.ndarray, width: float, field: str) -> None:
    """Refuse a width at which the RBF basis is numerically the identity: even the closest pair of a
    (sampled) row and a centre that do not coincide has exp(−d²/(2w²)) below 1e-12, so each basis column
    is 1 on rows equal to its centre and 0 elsewhere, and the model can only memorize training rows."""
    from service.errors import InvalidSpec

    if sample.shape[0] == 0 or centers.shape[0] == 0:
        return
    nearest = math.inf
    step = max(1, ROW_CHUNK_CELLS // centers.shape[0])
    for a in range(0, sample.shape[0], step):
        sq = sq_distances(sample[a:a + step], centers, width)
        pos = sq[sq > 0]
        if pos.size:
            nearest = min(nearest, float(pos.min()))
    if not math.isfinite(nearest):
        return
    if nearest / (2.0 * width * width) > IDENTITY_EXPONENT:
        dist = math.sqrt(nearest)
        smallest = dist / math.sqrt(2.0 * IDENTITY_EXPONENT)
        raise InvalidSpec(
            f"rbf width {width:g} is too narrow: the closest row and centre that do not coincide are "
            f"{dist:.3g} apart (standardized units), so every basis value is below 1e-12 except at a row equal "
            f"to its centre, and the basis can only memorize the training rows; use widths of at least "
            f"{smallest:.3g}, typically 0.1 to 10",
            errors=[{"field": field, "value": width, "message": f"width below {smallest:.3g}"}])


def sample_rows(n: int, seed: int, keys: np.ndarray | None = None, size: int = KMEANS_SAMPLE) -> np.ndarray:
    """Indices of the ``size`` rows with the smallest seeded key hashes, in row order: a sample that a
    streamed or partitioned read of the same rows reproduces exactly (bottom-k sampling)."""
    if n <= size:
        return np.arange(n)
    from .folds import key_hash

    h = key_hash(np.arange(n) if keys is None else keys, seed ^ 0x5A17)
    return np.sort(np.argpartition(h, size - 1)[:size])


def rbf_centers(Xs: np.ndarray, count: int, seed: int, keys: np.ndarray | None = None) -> np.ndarray:
    n = Xs.shape[0]
    if count >= n:
        return np.array(Xs, dtype=np.float64, copy=True)
    sample = Xs[sample_rows(n, seed, keys)] if n > KMEANS_SAMPLE else Xs
    return kmeans_centers(sample, count, seed)


def kmeans_centers(sample: np.ndarray, count: int, seed: int) -> np.ndarray:
    from sklearn.cluster import KMeans

    km = KMeans(n_clusters=count, n_init=3, random_state=seed).fit(sample)
    return np.ascontiguousarray(km.cluster_centers_, dtype=np.float64)


@dataclass(frozen=True)
class Categories:
    names: list[str]
    levels: list[list[str]] = field(default_factory=list)

    @classmethod
    def fit(cls, names: list[str], cols: list[np.ndarray]) -> "Categories":
        return cls(list(names), [sorted(set(c.tolist())) for c in cols])

    @property
    def width(self) -> int:
        return sum(len(lv) for lv in self.levels)

    def term_names(self) -> list[str]:
        return [f"{n}={lv}" for n, lvs in zip(self.names, self.levels) for lv in lvs]

    @cached_property
    def _positions(self) -> list[dict[str, int]]:
        return [{lv: i for i, lv in enumerate(lvs)} for lvs in self.levels]

    def encode(self, cols: list[np.ndarray]) -> tuple[np.ndarray, list[np.ndarray]]:
        """One-hot block (n, width) and, per column, a boolean mask of rows with an unseen level."""
        n = len(cols[0]) if cols else 0
        out = np.zeros((n, self.width), dtype=np.float64)
        unseen = []
        off = 0
        for lvs, pos, c in zip(self.levels, self._positions, cols):
            idx = np.array([pos.get(v, -1) for v in c], dtype=np.int64)
            ok = idx >= 0
            out[np.flatnonzero(ok), off + idx[ok]] = 1.0
            unseen.append(~ok)
            off += len(lvs)
        return out, unseen
