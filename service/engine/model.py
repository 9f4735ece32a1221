"""A fitted model: everything needed to predict, explain and bound a prediction, as plain arrays.

``FittedModel`` holds no estimator object. ``to_parts()`` returns a JSON-serializable description
and a dict of numeric arrays; ``from_parts()`` rebuilds the model from them without executing any
stored code, which is what lets the store keep models without pickle.

Prediction intervals are CV+ (Barber, Candès, Ramdas & Tibshirani, "Predictive inference with the
jackknife+", Annals of Statistics 49(1), 2021, section 3.2): for a new x, with fold models μ₋ₖ and
out-of-fold absolute residuals Rᵢ, the interval at level 1 − α is
``[q⁻_α{μ₋ₖ₍ᵢ₎(x) − Rᵢ}, q⁺_α{μ₋ₖ₍ᵢ₎(x) + Rᵢ}]``, where q⁻ is the ⌊α(n+1)⌋-th smallest value and q⁺ the
⌈(1−α)(n+1)⌉-th smallest. The guarantee is coverage ≥ 1 − 2α − √(2/n) in the worst case (their
Theorem 4), and about 1 − α in practice. Where the fold models cannot be kept (``basis_fit:
per_fold``, the ``loo`` scheme) the interval is the full model's prediction ± the ⌈(1−α)(n+1)⌉-th
smallest out-of-fold absolute residual (split-conformal form).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property, lru_cache
from typing import Any, Callable

import numpy as np

from service.errors import InvalidData

from .basis import BasisSetting, Categories, InputScaler
from .parallel import ordered_map, usable_cores
from .table import as_columns, categorical_column, numeric_column

MAX_INTERVAL_RESIDUALS = 20_000  # residuals kept per model; more are thinned to evenly spaced order statistics
THIN_THREADS_FROM = 100_000  # residuals from which ``thin_residuals`` sorts its folds on threads
PREDICT_MEMORY_BYTES = 256 * 2**20  # default working memory of one predict call (the setting predict_memory_bytes)
_WINDOW = 64  # CV+ bounds: bisect until a row's bracket holds at most this many residuals, then sort those
_SNAP_VALUES = 2**18  # CV+ bounds: candidate values sorted at once (rows × window widths)
SMALL_ROWS = 16  # at most this many rows (polynomial or linear basis) take the few-rows path (``_detail_small``)
_DIRECT_VALUES = 1 << 15  # CV+ bounds: rows × residuals up to this are ranked directly (one partition per row)
_NARROW = 160  # p × (r + 1) up to this: leverages are summed in tree order, and a few rows stay on Python floats
_NARROW_BLOCK = 1 << 15  # products held at once by a narrow model's leverages (256 KiB)


@dataclass
class FittedModel:
    """A model refit on all training rows: predicts, explains and bounds a prediction with plain arrays.

    Shapes: d numeric features, p = basis terms + one-hot columns, n training rows, K fold models,
    R kept out-of-fold residuals, r ≤ p rows of the leverage factor.

    Attributes:
        target: name of the target column.
        features: the d numeric feature names, in input order.
        scaler: ``InputScaler`` (mean (d,), scale (d,)) standardizing the inputs before the basis.
        basis: the chosen ``BasisSetting`` (kind; polynomial powers (p_basis, d) or RBF centres (m, d)).
        categories: ``Categories`` (column names and their training levels) for the one-hot block.
        column_mean, column_scale: (p,) centring and scaling of the design columns on all rows.
        beta: (p,) coefficients of the scaled columns; ``weights`` (p,) = beta / column_scale on raw ones.
        intercept: the unpenalized intercept.
        penalty: ``{"kind", "strength", "l1_ratio"}`` of the chosen candidate.
        n_train: n.
        ranges: numeric feature → [min, max] over the training rows (extrapolation warnings).
        leverage_factor: (r, p) F with leverage ``h(z) = 1/n + ‖F z‖²`` for a scaled, centred design row z.
        max_leverage: the largest training leverage (hidden-extrapolation warning above it).
        fold_weights, fold_intercepts: (K, p) and (K,) raw-column fold models for CV+ intervals, or None
            (split-conformal intervals: ``basis_fit: per_fold`` and ``loo``).
        residuals: (R,) sorted absolute out-of-fold residuals, concatenated by fold; residual_fold: (R,)
            their fold (-1 when split-conformal); residual_weight: how many residuals each kept one stands for.
        cv: ``{"metric", "mean", "std", "splits", "scheme", "rule"}`` of the chosen candidate.
        term_names: (p,) names of the design columns.
    """

    target: str
    features: list[str]
    scaler: InputScaler
    basis: BasisSetting
    categories: Categories
    column_mean: np.ndarray
    column_scale: np.ndarray
    beta: np.ndarray  # coefficients of the scaled columns
    intercept: float
    penalty: dict[str, Any]  # {"kind", "strength", "l1_ratio"}
    n_train: int
    ranges: dict[str, list[float]]  # numeric feature → [min, max] over training rows
    leverage_factor: np.ndarray  # F with h = 1/n + ‖F z‖²
    max_leverage: float
    fold_weights: np.ndarray | None  # (K, p) raw-column weights of the fold models (CV+), or None
    fold_intercepts: np.ndarray | None  # (K,)
    residuals: np.ndarray  # sorted out-of-fold absolute residuals (possibly thinned), concatenated by fold
    residual_fold: np.ndarray  # fold id of each residual (-1 when intervals are split-conformal)
    residual_weight: float = 1.0  # how many residuals each kept one stands for
    cv: dict[str, Any] = field(default_factory=dict)  # {"metric", "mean", "std", "splits", "scheme", "rule"}
    term_names: list[str] = field(default_factory=list)

    # ---- prediction -------------------------------------------------------------------------------
    @cached_property
    def weights(self) -> np.ndarray:
        """Coefficients of the raw basis columns (computed once: a model is never changed in place)."""
        return self.beta / self.column_scale

    def design(self, cols: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
        """(Φ raw design (m, p), numeric inputs X (m, d), unseen-level masks per categorical column)."""
        X = np.column_stack([numeric_column(cols, f, "input") for f in self.features]) if self.features else \
            np.zeros((_nrows(cols), 0))
        Xs = self.scaler.transform(X)
        Phi = self.basis.expand(Xs)
        unseen: list[np.ndarray] = []
        if self.categories.names:
            cats = [categorical_column(cols, c) for c in self.categories.names]
            block, unseen = self.categories.encode(cats)
            Phi = np.hstack([Phi, block])
        return Phi, X, unseen

    @cached_property
    def _inputs(self) -> frozenset[str]:
        return frozenset([*self.features, *self.categories.names])

    def check_columns(self, cols: dict[str, np.ndarray]) -> None:
        if cols.keys() == self._inputs:  # exactly the inputs (the usual request)
            return
        needed = list(self.features) + list(self.categories.names)
        missing = [c for c in needed if c not in cols]
        if missing:
            raise InvalidData(f"columns {missing} are missing; this model needs {needed}",
                              errors=[{"field": c, "message": "missing column"} for c in missing])
        extra = [c for c in cols if c not in needed and c != self.target]
        if extra:
            raise InvalidData(f"columns {extra} are not inputs of this model; remove them (inputs: {needed})",
                              errors=[{"field": c, "message": "unknown column"} for c in extra])

    def chunk_rows(self, memory_bytes: int = PREDICT_MEMORY_BYTES, with_interval: bool = True) -> int:
        """Rows predicted at once so that one chunk's arrays stay within ``memory_bytes``: per row, the
        basis design and its temporaries (about 5 × the width p), the leverage product (rank of the
        leverage factor), the fold predictions (2 × K folds), the inputs, and for CV+ intervals the
        row × residual blocks of the interval (2 × the residuals kept)."""
        key = (memory_bytes, with_interval)
        hit = self._chunk_sizes.get(key)
        if hit is None:
            hit = self._chunk_sizes[key] = self._chunk_rows(memory_bytes, with_interval)
        return hit

    @cached_property
    def _chunk_sizes(self) -> dict[tuple[int, bool], int]:
        return {}

    def _chunk_rows(self, memory_bytes: int, with_interval: bool) -> int:
        p = int(self.beta.size)
        r = int(self.leverage_factor.shape[0]) if self.leverage_factor.ndim == 2 else 0
        k = int(self.fold_weights.shape[0]) if self.fold_weights is not None else 0
        d = len(self.features)
        per_row = 8 * (5 * p + r + 2 * k + 4 * d + 16 + (2 * int(self.residuals.size) if with_interval and k else 0))
        return max(1, memory_bytes // per_row)

    def predict(self, data: Any, memory_bytes: int = PREDICT_MEMORY_BYTES) -> np.ndarray:
        cols = as_columns(data)
        m = _nrows(cols)
        step = self.chunk_rows(memory_bytes, with_interval=False)
        out = np.empty(m)
        for a in range(0, m, step):
            Phi, _, _ = self.design(_rows(cols, a, a + step) if m > step else cols)
            out[a:a + step] = self._values(Phi)
        return out

    def predict_detail(self, data: Any, interval_level: float | None = None, strict: bool = True,
                       memory_bytes: int = PREDICT_MEMORY_BYTES) -> dict[str, Any]:
        """Predictions with CV+ intervals, leverage and extrapolation warnings per row.

        Rows are computed in chunks of ``chunk_rows(memory_bytes)``, so the working memory of one call
        is bounded whatever the row count (the answer itself is a few numbers per row)."""
        cols = as_columns(data)
        if strict:
            self.check_columns(cols)
        if interval_level is not None and not (0 < interval_level < 1):
            raise InvalidData(f"interval_level must lie strictly between 0 and 1, got {interval_level}; e.g. 0.9 for 90%")
        m = _nrows(cols)
        step = self.chunk_rows(memory_bytes, interval_level is not None)
        if m <= step:
            if m <= SMALL_ROWS and self.basis.kind != "rbf":  # what _detail would call
                return self._detail_small(cols, interval_level)
            return self._detail(cols, interval_level)
        parts = [self._detail(_rows(cols, a, a + step), interval_level) for a in range(0, m, step)]
        out: dict[str, Any] = {}
        for key in ("value", "lower", "upper", "leverage"):
            out[key] = None if parts[0][key] is None else np.concatenate([q[key] for q in parts])
        out["warnings"] = [w for q in parts for w in q["warnings"]]
        return out

    def _detail(self, cols: dict[str, np.ndarray], interval_level: float | None) -> dict[str, Any]:
        if _nrows(cols) <= SMALL_ROWS and self.basis.kind != "rbf":
            return self._detail_small(cols, interval_level)
        Phi, X, unseen = self.design(cols)
        value, lev, lower, upper = self._numbers(Phi, interval_level)
        warnings = self._warnings(X, unseen, lev, cols)
        for i in np.flatnonzero(~np.isfinite(value)):  # overflow: say so rather than answer a bare null
            warnings[i].append(
                f"the prediction is not a finite number ({float(value[i])!r} overflowed): the inputs of this row lie so far "
                "outside the training data that the basis overflowed; no value is given")
        return {"value": value, "lower": lower, "upper": upper, "leverage": lev, "warnings": warnings}

    # ---- a few rows --------------------------------------------------------------------------------
    # For a handful of rows, numpy's fixed cost per call (about a microsecond, some thirty calls per request)
    # outweighs the arithmetic. The element-wise steps (standardizing, the monomials, the one-hot block, the
    # range and leverage checks) are then done on Python floats: IEEE 754 rounds each subtraction, division and
    # product exactly as numpy does element-wise, so the design matrix is the same bit for bit. The reductions
    # (the coefficient products, the leverage sum) still go through the same numpy calls as above, so values,
    # leverages, intervals and warnings are exactly those of the vectorized path (tests/engine/test_small_rows.py).

    @cached_property
    def _small_plan(self) -> tuple:
        """Everything the few-rows path needs as Python values, computed once per loaded model."""
        mean, scale = self.scaler.mean.tolist(), self.scaler.scale.tolist()
        steps: list[tuple[list[int], list[int], list[int]]] = []
        first: list[tuple[int, int]] = []
        if self.basis.kind == "polynomial":
            cols1, inputs = self.basis._degree_one
            first = list(zip(cols1.tolist(), inputs.tolist()))
            steps = [(c.tolist(), par.tolist(), var.tolist()) for c, par, var in self.basis.plan]
            width = int(self.basis.powers.shape[0])
        else:
            width = len(self.features)
        positions = [{lv: i for i, lv in enumerate(lvs)} for lvs in self.categories.levels]
        offsets, off = [], width
        for lvs in self.categories.levels:
            offsets.append(off)
            off += len(lvs)
        return mean, scale, first, steps, width, positions, offsets, off, self._lo.tolist(), self._hi.tolist()

    def _design_rows(self, cols: dict[str, np.ndarray]) -> tuple[list[list[float]], list[list[float]], list[list[bool]]]:
        """``design`` for a few rows (polynomial or linear basis) on Python floats: (the design rows (m lists of
        p), the numeric inputs per row, the unseen-level flags per categorical column and row)."""
        mean, scale, first, steps, width, positions, offsets, total, _, _ = self._small_plan
        inputs = [_finite_floats(cols.get(f)) or numeric_column(cols, f, "input").tolist() for f in self.features]
        m = _nrows(cols)
        rows = [[c[i] for c in inputs] for i in range(m)]
        unseen: list[list[bool]] = []
        cats = [categorical_column(cols, c).tolist() for c in self.categories.names]
        out = []
        for i, x in enumerate(rows):
            xs = [(v - mu) / sd for v, mu, sd in zip(x, mean, scale)]
            if steps or first:
                phi = [0.0] * total
                for col, j in first:
                    phi[col] = xs[j]
                for cs, parents, var in steps:
                    for col, parent, j in zip(cs, parents, var):
                        phi[col] = phi[parent] * xs[j]
            else:
                phi = xs + [0.0] * (total - width)
            out.append(phi)
        for pos, off, c in zip(positions, offsets, cats):
            flags = []
            for i, v in enumerate(c):
                k = pos.get(v, -1)
                if k >= 0:
                    out[i][off + k] = 1.0
                flags.append(k < 0)
            unseen.append(flags)
        return out, rows, unseen

    def _design_small(self, cols: dict[str, np.ndarray]) -> tuple[np.ndarray, list[list[float]], list[list[bool]]]:
        """``design`` for a few rows (polynomial or linear basis): (Φ (m, p), the numeric inputs per row, the
        unseen-level flags per categorical column and row)."""
        out, rows, unseen = self._design_rows(cols)
        return np.array(out, dtype=np.float64).reshape(len(rows), self._small_plan[7]), rows, unseen

    def _values(self, Phi: np.ndarray) -> np.ndarray:
        """Predictions of the raw design rows ``Phi`` (m, p): the intercept plus the products Φᵢⱼ·wⱼ summed in
        ``_tree_sums``' fixed order, so a row's value is the same bits alone or in any batch, on any CPU."""
        return self.intercept + _tree_sums(np.multiply(Phi.T, self.weights[:, None], order="C"))

    @cached_property
    def _narrow(self) -> bool:
        """Whether leverages are summed in ``_tree_sums``' order from the factor's products (a small factor: p × (r + 1)
        ≤ ``_NARROW``) rather than by a matrix product; then a few rows are computed on Python floats end to end."""
        F = self.leverage_factor
        p = int(self.column_mean.size)
        return (F.ndim == 2 and F.shape[1] == p and p * (F.shape[0] + 1) <= _NARROW
                and bool(np.all(np.isfinite(self.column_scale)) and np.all(self.column_scale != 0)))

    def _leverages(self, Phi: np.ndarray) -> np.ndarray:
        """Leverage 1/n + ‖F zᵢ‖² of each raw design row (zᵢ: the row centred and scaled)."""
        F = self.leverage_factor
        if not F.size:
            return np.full(Phi.shape[0], 1.0 / self.n_train)
        if self._narrow:  # the (p, r, rows) products zₗ·Fⱼₗ summed over l in tree order, then the squares over j
            m = Phi.shape[0]
            out = np.empty(m)
            step = max(1, _NARROW_BLOCK // F.size)  # rows at a time: the temporaries stay in cache, off the page allocator
            for a in range(0, m, step):
                Zt = np.subtract(Phi[a:a + step].T, self.column_mean[:, None], order="C")
                Zt /= self.column_scale[:, None]
                FZ = _tree_sums(Zt[:, None, :] * F.T[:, :, None])
                np.add(1.0 / self.n_train, _tree_sums(FZ * FZ), out=out[a:a + step])
            return out
        Zs = (Phi - self.column_mean) / self.column_scale
        FZ = Zs @ F.T
        return 1.0 / self.n_train + _row_dots(FZ, FZ)

    @cached_property
    def _row_numbers(self) -> Callable[[list[float]], tuple[float, float]]:
        """A narrow model's (value, leverage) of one design row on Python floats (``_row_program``)."""
        F = self.leverage_factor
        return _row_program(int(self.column_mean.size), int(F.shape[0]) if F.size else 0)(
            self.weights.tolist(), float(self.intercept), self.column_mean.tolist(), self.column_scale.tolist(),
            F.tolist() if F.size else [], 1.0 / self.n_train)

    def _numbers(self, Phi: np.ndarray, interval_level: float | None):
        """(values, leverages, lower, upper bounds or None) of the raw design rows ``Phi`` (m, p)."""
        value = self._values(Phi)
        lev = self._leverages(Phi)
        lower = upper = None
        if interval_level is not None:
            lower, upper = self._interval(Phi, value, 1.0 - interval_level)
        return value, lev, lower, upper

    def _detail_small(self, cols: dict[str, np.ndarray], interval_level: float | None) -> dict[str, Any]:
        design_rows, rows, unseen = self._design_rows(cols)
        if self._narrow:
            numbers = self._row_numbers
            values, levs = [], []
            for phi in design_rows:
                v, h = numbers(phi)
                values.append(v)
                levs.append(h)
            value, lev = np.array(values, dtype=np.float64), np.array(levs, dtype=np.float64)
            lower = upper = None
            if interval_level is not None:
                Phi = np.array(design_rows, dtype=np.float64).reshape(len(rows), self._small_plan[7])
                lower, upper = self._interval(Phi, value, 1.0 - interval_level)
        else:
            Phi = np.array(design_rows, dtype=np.float64).reshape(len(rows), self._small_plan[7])
            value, lev, lower, upper = self._numbers(Phi, interval_level)
            values, levs = value.tolist(), lev.tolist()
        _, _, _, _, _, _, _, _, lo, hi = self._small_plan
        limit = self.max_leverage * (1 + 1e-9)
        warnings: list[list[str]] = []
        for i, x in enumerate(rows):
            w: list[str] = []
            for j, v in enumerate(x):
                if v > hi[j] or v < lo[j]:
                    f = self.features[j]
                    r_lo, r_hi = self.ranges[f]
                    w.append(f"{f}={_fmt(v)} is {'above' if v > hi[j] else 'below'} the training range "
                             f"[{_fmt(r_lo)}, {_fmt(r_hi)}]")
            for name, levels, flags in zip(self.categories.names, self.categories.levels, unseen):
                if flags[i]:
                    w.append(f"{name}={level_as_sent(cols[name][i])} was not seen in training; its effect is taken "
                             f"as zero (known levels: {known_levels(levels)})")
            if levs[i] > limit:
                w.append(f"leverage {levs[i]:.3g} exceeds the largest training leverage {self.max_leverage:.3g}: "
                         "the input combination lies outside the data the model has seen")
            if not math.isfinite(values[i]):
                w.append(
                    f"the prediction is not a finite number ({values[i]!r} overflowed): the inputs of this row lie so "
                    "far outside the training data that the basis overflowed; no value is given")
            warnings.append(w)
        return {"value": value, "lower": lower, "upper": upper, "leverage": lev, "warnings": warnings}

    def _interval(self, Phi: np.ndarray, value: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
        R = self.residuals
        n_eff = R.size
        k_lo = math.floor(alpha * (n_eff + 1))
        k_hi = math.ceil((1 - alpha) * (n_eff + 1))
        m = Phi.shape[0]
        lo = np.full(m, -np.inf)
        hi = np.full(m, np.inf)
        if self.fold_weights is None:
            if k_hi <= n_eff:
                q = self._pooled_residuals[k_hi - 1]
                hi = value + q
                lo = value - q if k_lo >= 1 else lo
            return lo, hi
        mu = self.fold_intercepts[None, :] + Phi @ self.fold_weights.T  # (m, K)
        # The lower bound is the k_lo-th smallest of {μ₋ₖ₍ᵢ₎ − Rᵢ} = −(the (n−k_lo+1)-th smallest of
        # {−μ₋ₖ₍ᵢ₎ + Rᵢ}); IEEE rounding is symmetric, so fl(μ − R) = −fl(−μ + R) bit for bit.
        if k_lo >= 1:
            lo = -self._shifted_order_statistic(-mu, n_eff - k_lo + 1)
        if k_hi <= n_eff:
            hi = self._shifted_order_statistic(mu, k_hi)
        return lo, hi

    def _tail_candidates(self, k: int) -> tuple[np.ndarray, np.ndarray, int]:
        """The residuals among which the k-th smallest of {μ_f(i) + Rᵢ} lies, for any shifts μ, and its rank
        among them: (fold of each, residual, rank). Within a fold the values rise with the residual (rounding
        is monotone), so the k smallest of the union come from each fold's k smallest residuals, and the
        k-th smallest is the (n − k + 1)-th largest, found among each fold's n − k + 1 largest. The values
        ranked are the direct form's own, so the answer is the same; for the bounds of an interval (the tails)
        there are fewer of them: 1,000 of 2,000 residuals for a 0.9 interval over 5 folds."""
        hit = self._tails.get(k)
        if hit is not None:
            return hit
        n = int(self.residuals.size)
        take = min(k, n - k + 1)
        parts = [(f, r[:take] if take == k else r[max(r.size - take, 0):]) for f, r in enumerate(self._fold_residuals)]
        folds = np.concatenate([np.full(r.size, f, dtype=np.int64) for f, r in parts])
        residuals = np.concatenate([r for _, r in parts])
        rank = k if take == k else residuals.size - take + 1
        if len(self._tails) < 64:  # a few interval levels are asked for; keep them
            self._tails[k] = (folds, residuals, rank)
        return folds, residuals, rank

    @cached_property
    def _tails(self) -> dict[int, tuple[np.ndarray, np.ndarray, int]]:
        return {}

    @cached_property
    def _pooled_residuals(self) -> np.ndarray:
        return np.sort(self.residuals)

    @cached_property
    def _fold_residuals(self) -> list[np.ndarray]:
        """Sorted residuals of each fold model's held-out rows, indexed like the rows of ``fold_weights``."""
        return [np.sort(self.residuals[self.residual_fold == k]) for k in range(self.fold_weights.shape[0])]

    @cached_property
    def _fold_levels(self) -> list[tuple[np.ndarray, np.ndarray]]:
        """Per fold: its distinct residuals (sorted) and cumulative counts (``cum[j]`` residuals lie below the
        j-th distinct value), so tied residuals cost one window slot, not one each."""
        out = []
        for Rf in self._fold_residuals:
            u, c = np.unique(Rf, return_counts=True)
            out.append((u, np.concatenate([[0], np.cumsum(c)])))
        return out

    @cached_property
    def _fold_levels_padded(self) -> tuple[list[np.ndarray], list[np.ndarray], bool]:
        """Distinct values padded with +inf and their counts padded with 0 (for gathering past a fold's end),
        and whether any residual is tied within its fold."""
        values, counts, ties = [], [], False
        for u, cum in self._fold_levels:
            values.append(np.concatenate([u, np.full(u.size + 1, np.inf)]))
            c = np.diff(cum)
            ties = ties or bool((c > 1).any())
            counts.append(np.concatenate([c, np.zeros(u.size + 1, dtype=c.dtype)]))
        return values, counts, ties

    def _shifted_order_statistic(self, mu: np.ndarray, k: int) -> np.ndarray:
        """Per row r, the k-th smallest (1-based) of the multiset {fl(mu[r, f(i)] + Rᵢ)}: the union of K sorted
        residual sets, each shifted by its fold model's prediction. Exact (the same floating-point values the
        direct form ranks) in O(K log n) per row for finite ``mu``, vectorized over rows:

        1. Bracket. With every shift replaced by the row's smallest (largest) one, the k-th smallest is
           fl(shift + R₍ₖ₎) of the pooled sorted residuals, and rounding is monotone, so
           t* ∈ [fl(min μ + R₍ₖ₎), fl(max μ + R₍ₖ₎)]: as wide as the fold models disagree.
        2. Bisection on the value while a row's bracket still holds more than ``_WINDOW`` residuals: a count
           ``Σₖ searchsorted(Rₖ, t − μₖ)`` per step. Counts made through ``t − μₖ`` can misplace only values
           within a few ulps of ``t``, so each step moves the bracket end by a margin that covers that.
        3. Snap. In fold k the residuals outside [lo − margin − μₖ, hi + margin − μₖ] give values surely below
           (L of them) or above the bracket; t* is the (k − L)-th smallest of the values computed for the
           residuals inside (a few per fold), sorted exactly.
        Windows count distinct residuals (tied ones carry their multiplicity), so a model whose residuals are
        mostly equal (an exact fit) stays as cheap. Rows with a non-finite shift take the direct form."""
        m, K = mu.shape
        if m * self.residuals.size <= _DIRECT_VALUES:  # a few rows: rank the values themselves (the direct form)
            folds, residuals, rank = self._tail_candidates(k)
            values = mu[:, folds] + residuals
            return np.partition(values, rank - 1, axis=1)[:, rank - 1]
        levels = self._fold_levels
        pooled = self._pooled_residuals
        out = np.empty(m)
        finite = np.isfinite(mu).all(axis=1)
        bad = np.flatnonzero(~finite)
        if bad.size:
            for r in bad:  # the direct form, one row at a time (overflowing basis values only)
                out[r] = np.sort(mu[r, self.residual_fold] + self.residuals)[k - 1]
            rows = np.flatnonzero(finite)
            if rows.size:
                out[rows] = self._shifted_order_statistic(mu[rows], k)
            return out
        if m == 0:
            return out
        rk = pooled[k - 1]
        lo = mu.min(axis=1) + rk
        hi = mu.max(axis=1) + rk
        eps = np.finfo(np.float64).eps
        margin = 16 * eps * (np.abs(mu).max(axis=1) + np.maximum(np.abs(lo), np.abs(hi))
                             + max(abs(pooled[0]), abs(pooled[-1])))

        def window(rows: np.ndarray | slice, count: int) -> tuple[np.ndarray, np.ndarray]:
            a = np.empty((count, K), dtype=np.int64)
            b = np.empty((count, K), dtype=np.int64)
            below, above = lo[rows] - margin[rows], hi[rows] + margin[rows]
            for f, (u, _) in enumerate(levels):
                a[:, f] = np.searchsorted(u, below - mu[rows, f], side="left")
                b[:, f] = np.searchsorted(u, above - mu[rows, f], side="right")
            return a, b

        a, b = window(slice(None), m)
        active = np.flatnonzero((b - a).sum(axis=1) > _WINDOW)
        for _ in range(200):
            active = active[hi[active] - lo[active] > 6 * margin[active]]
            if not active.size:
                break
            mid = lo[active] + 0.5 * (hi[active] - lo[active])
            count = np.zeros(active.size, dtype=np.int64)
            for f, (u, cum) in enumerate(levels):
                count += cum[np.searchsorted(u, mid - mu[active, f], side="right")]
            up = count >= k  # t* ≤ mid + margin; else t* > mid − margin
            hi[active[up]] = np.minimum(hi[active[up]], mid[up] + margin[active[up]])
            lo[active[~up]] = np.maximum(lo[active[~up]], mid[~up] - margin[active[~up]])
            a_act, b_act = window(active, active.size)
            a[active], b[active] = a_act, b_act
            active = active[(b_act - a_act).sum(axis=1) > _WINDOW]
        width = b - a
        below_count = np.zeros(m, dtype=np.int64)
        for f, (_, cum) in enumerate(levels):
            below_count += cum[a[:, f]]
        need = k - below_count  # 1-based rank of t* among the values inside the windows
        total = width.sum(axis=1)
        # Rows in chunks of at most _SNAP_VALUES candidate values; when some windows stayed wide (many tied
        # residuals), rows are taken in order of width so a wide row does not widen every row's matrix.
        if int(total.max()) <= K * _WINDOW:
            step = max(1, _SNAP_VALUES // max(1, K * _WINDOW))
            for start in range(0, m, step):
                self._snap(slice(start, start + step), mu, a, width, need, out)
            return out
        order = np.argsort(total, kind="stable")
        start = 0
        while start < m:
            stop = min(m, start + max(1, _SNAP_VALUES // max(1, K * _WINDOW)))
            while stop - start > 1 and int(total[order[stop - 1]]) * (stop - start) > _SNAP_VALUES:
                stop = start + (stop - start) // 2
            self._snap(order[start:stop], mu, a, width, need, out)
            start = stop
        return out

    def _snap(self, rows: np.ndarray | slice, mu: np.ndarray, a: np.ndarray, width: np.ndarray, need: np.ndarray,
              out: np.ndarray) -> None:
        """out[rows] = the need-th smallest of the values fl(mu[r, f] + u_f[a[r, f] + j]), j < width[r, f], each
        counted as often as its residual occurs in fold f.

        Each fold contributes the same number of values to every row (its widest window); the values past a
        row's own window all lie above its bracket, so they rank after the order statistic and do not move it
        (past the end of a fold, +inf pads with count 0)."""
        values, counts, ties = self._fold_levels_padded
        wmax = width[rows].max(axis=0)
        mu_r, a_r = mu[rows], a[rows]
        n_rows = mu_r.shape[0]
        cand = np.empty((n_rows, int(wmax.sum())))
        weight = np.empty(cand.shape, dtype=np.int64) if ties else None
        col = 0
        for f, u in enumerate(values):
            wf = int(wmax[f])
            if wf == 0:
                continue
            idx = a_r[:, f, None] + np.arange(wf)
            np.add(mu_r[:, f, None], u[idx], out=cand[:, col:col + wf])
            if ties:
                weight[:, col:col + wf] = counts[f][idx]
            col += wf
        r = np.arange(n_rows)
        if not ties:
            cand.sort(axis=1)
            out[rows] = cand[r, need[rows] - 1]
            return
        order = np.argsort(cand, axis=1, kind="stable")
        cum = np.take_along_axis(weight, order, axis=1).cumsum(axis=1)
        first = (cum < need[rows][:, None]).sum(axis=1)  # the first sorted value with `need` values up to it
        out[rows] = cand[r[:, None], order][r, first]

    def _warnings(self, X: np.ndarray, unseen: list[np.ndarray], lev: np.ndarray,
                  cols: dict[str, np.ndarray]) -> list[list[str]]:
        """Per row: inputs outside the training range (in feature order), unseen category levels, then a
        leverage above the largest training leverage. The checks are made on whole columns; only the rows
        that have a warning are visited one by one."""
        m = X.shape[0]
        above = X > self._hi if X.size else np.zeros(X.shape, bool)
        below = X < self._lo if X.size else np.zeros(X.shape, bool)
        # Hidden extrapolation: leverage above the largest leverage of any training row
        # (Montgomery, Peck & Vining, Introduction to Linear Regression Analysis, section 3.8).
        high_lev = lev > self.max_leverage * (1 + 1e-9)
        flagged = high_lev | above.any(axis=1) | below.any(axis=1)
        for mask in unseen:
            flagged |= mask
        out: list[list[str]] = [[] for _ in range(m)]
        for i in np.flatnonzero(flagged).tolist():
            w = out[i]
            for j in np.flatnonzero(above[i] | below[i]).tolist():
                f = self.features[j]
                lo, hi = self.ranges[f]
                side = "above" if above[i, j] else "below"
                w.append(f"{f}={_fmt(X[i, j])} is {side} the training range [{_fmt(lo)}, {_fmt(hi)}]")
            for name, levels, mask in zip(self.categories.names, self.categories.levels, unseen):
                if mask[i]:
                    w.append(f"{name}={level_as_sent(cols[name][i])} was not seen in training; its effect is taken "
                             f"as zero (known levels: {known_levels(levels)})")
            if high_lev[i]:
                w.append(f"leverage {lev[i]:.3g} exceeds the largest training leverage {self.max_leverage:.3g}: "
                         "the input combination lies outside the data the model has seen")
        return out

    @cached_property
    def _lo(self) -> np.ndarray:
        return np.array([self.ranges[f][0] for f in self.features])

    @cached_property
    def _hi(self) -> np.ndarray:
        return np.array([self.ranges[f][1] for f in self.features])

    # ---- description ------------------------------------------------------------------------------
    def describe(self) -> dict[str, Any]:
        return {"target": self.target, "basis": self.basis.describe(), "penalty": dict(self.penalty), "cv": dict(self.cv)}

    def feature_schema(self) -> list[dict[str, Any]]:
        out = [{"name": f, "type": "number", "range": list(self.ranges[f])} for f in self.features]
        out += [{"name": c, "type": "category", "levels": list(lv)}
                for c, lv in zip(self.categories.names, self.categories.levels)]
        return out

    # ---- plain parts ------------------------------------------------------------------------------
    def to_parts(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        meta = {
            "target": self.target,
            "features": list(self.features),
            "basis": self.basis.describe(),
            "categorical": {"names": list(self.categories.names), "levels": [list(l) for l in self.categories.levels]},
            "intercept": float(self.intercept),
            "penalty": dict(self.penalty),
            "n_train": int(self.n_train),
            "ranges": {k: [float(a), float(b)] for k, (a, b) in self.ranges.items()},
            "max_leverage": float(self.max_leverage),
            "residual_weight": float(self.residual_weight),
            "interval_method": "cv_plus" if self.fold_weights is not None else "split_conformal",
            "cv": dict(self.cv),
            "term_names": list(self.term_names),
        }
        arrays = {
            "input_mean": self.scaler.mean,
            "input_scale": self.scaler.scale,
            "column_mean": self.column_mean,
            "column_scale": self.column_scale,
            "beta": self.beta,
            "leverage_factor": self.leverage_factor,
            "residuals": self.residuals,
            "residual_fold": self.residual_fold,
        }
        if self.basis.powers is not None:
            arrays["powers"] = self.basis.powers
        if self.basis.centers is not None:
            arrays["centers"] = self.basis.centers
        if self.fold_weights is not None:
            arrays["fold_weights"] = self.fold_weights
            arrays["fold_intercepts"] = self.fold_intercepts
        return meta, arrays

    @classmethod
    def from_parts(cls, meta: dict[str, Any], arrays: dict[str, np.ndarray]) -> "FittedModel":
        b = meta["basis"]
        basis = BasisSetting(
            kind=b["kind"], degree=b.get("degree"), width=b.get("width"),
            powers=arrays.get("powers"), centers=arrays.get("centers"),
        )
        cats = Categories(list(meta["categorical"]["names"]), [list(l) for l in meta["categorical"]["levels"]])
        return cls(
            target=meta["target"],
            features=list(meta["features"]),
            scaler=InputScaler(list(meta["features"]), arrays["input_mean"], arrays["input_scale"]),
            basis=basis,
            categories=cats,
            column_mean=arrays["column_mean"],
            column_scale=arrays["column_scale"],
            beta=arrays["beta"],
            intercept=float(meta["intercept"]),
            penalty=dict(meta["penalty"]),
            n_train=int(meta["n_train"]),
            ranges={k: [float(a), float(c)] for k, (a, c) in meta["ranges"].items()},
            leverage_factor=arrays["leverage_factor"],
            max_leverage=float(meta["max_leverage"]),
            fold_weights=arrays.get("fold_weights"),
            fold_intercepts=arrays.get("fold_intercepts"),
            residuals=arrays["residuals"],
            residual_fold=arrays["residual_fold"],
            residual_weight=float(meta.get("residual_weight", 1.0)),
            cv=dict(meta.get("cv", {})),
            term_names=list(meta.get("term_names", [])),
        )


def thin_residuals(abs_res: np.ndarray, fold: np.ndarray, limit: int = MAX_INTERVAL_RESIDUALS
                   ) -> tuple[np.ndarray, np.ndarray, float]:
    """Sorted residuals by fold; above ``limit`` keep every g-th order statistic of each fold (the same
    stride g for all folds, so each kept value stands for g residuals). The folds are sorted on every usable
    core past ``THIN_THREADS_FROM`` residuals (numpy's sort runs without the GIL; each fold's result is its own)."""
    n = abs_res.size
    g = max(1, math.ceil(n / limit))
    folds = np.unique(fold)

    def sorted_fold(k) -> np.ndarray:
        r = np.sort(abs_res[fold == k])
        return r[g // 2::g] if g > 1 else r

    out_r = list(ordered_map(sorted_fold, folds, usable_cores() if n >= THIN_THREADS_FROM else 1))
    out_f = [np.full(r.size, k, dtype=np.int64) for k, r in zip(folds, out_r)]
    return np.concatenate(out_r), np.concatenate(out_f), float(g)


try:  # np.einsum without its Python wrapper: what np.einsum itself calls when optimize is off (the default)
    from numpy._core.multiarray import c_einsum as _c_einsum
except ImportError:  # numpy < 2
    _c_einsum = np.einsum


def _row_dots(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Σⱼ Aᵢⱼ Bᵢⱼ per row, exactly ``np.einsum("ij,ij->i", A, B)``."""
    return _c_einsum("ij,ij->i", A, B)


def _tree_sums(S: np.ndarray) -> np.ndarray:
    """Σⱼ Sⱼ… over the first axis (S: (p, …) → (…)) in one fixed order: adjacent terms summed in pairs, level by
    level, an odd last term carried up unchanged (a balanced pairwise tree; error at most ⌈log₂ p⌉·ε·Σⱼ|Sⱼ|).
    Each step is one IEEE 754 addition per element, so ``_row_program``'s arithmetic on a row's Python floats
    gives the same bits, and a row's sum depends on nothing else: not the other rows of the batch, the BLAS
    library or the CPU's vector width. The summed axis comes first so that each step adds long contiguous runs."""
    p = S.shape[0]
    if p == 0:
        return np.zeros(S.shape[1:])
    while p > 1:
        h, odd = p // 2, p % 2
        T = np.empty((h + odd, *S.shape[1:]))
        np.add(S[0:2 * h:2], S[1:2 * h:2], out=T[:h])
        if odd:
            T[h] = S[p - 1]
        S, p = T, h + odd
    return S[0]


def _tree_text(terms: list[str]) -> str:
    """``_tree_sums``' order written out: the sum of ``terms`` (Python expressions) as a parenthesized tree."""
    if not terms:
        return "0.0"
    while len(terms) > 1:
        pairs = [f"({a} + {b})" for a, b in zip(terms[0::2], terms[1::2])]
        if len(terms) % 2:
            pairs.append(terms[-1])
        terms = pairs
    return terms[0]


@lru_cache(maxsize=64)
def _row_program(p: int, r: int) -> Callable[..., Callable[[list[float]], tuple[float, float]]]:
    """For a design of p columns and a leverage factor of r rows: a function of the model's numbers (weights,
    intercept, column mean and scale, factor rows, 1/n) returning ``row(phi) -> (value, leverage)`` for one
    design row of Python floats, written as straight-line arithmetic: every product, quotient and sum of
    ``_values`` and ``_leverages`` in the same order, so the same bits (IEEE 754 rounds each operation alike in
    CPython and in numpy's element-wise loops; CPython neither reorders nor fuses them).

    The text compiled here is made only of generated names (``x3``, ``f2_3``) and operators, from the two
    integers; the model's numbers are passed in as values and never written into it."""
    xs = [f"x{j}" for j in range(p)]
    lines = ["def bind(w, intercept, mean, scale, F, inv_n):"]
    if p:
        lines += [f"    {', '.join(f'w{j}' for j in range(p))}, = w",
                  f"    {', '.join(f'm{j}' for j in range(p))}, = mean",
                  f"    {', '.join(f's{j}' for j in range(p))}, = scale"]
    for k in range(r):
        lines.append(f"    {', '.join(f'f{k}_{j}' for j in range(p))}, = F[{k}]")
    lines.append("    def row(phi):")
    if p:
        lines.append(f"        {', '.join(xs)}, = phi")
    lines.append(f"        value = intercept + {_tree_text([f'x{j} * w{j}' for j in range(p)])}")
    if r:
        lines += [f"        z{j} = (x{j} - m{j}) / s{j}" for j in range(p)]
        lines += [f"        t{k} = {_tree_text([f'z{j} * f{k}_{j}' for j in range(p)])}" for k in range(r)]
        lines.append(f"        return value, inv_n + {_tree_text([f't{k} * t{k}' for k in range(r)])}")
    else:
        lines.append("        return value, inv_n")
    lines.append("    return row")
    namespace: dict[str, Any] = {}
    exec(compile("\n".join(lines), f"<row program p={p} r={r}>", "exec"), namespace)  # noqa: S102 (generated, see above)
    return namespace["bind"]


def _finite_floats(raw: np.ndarray | None) -> list[float] | None:
    """A float column's values as Python floats when all are finite (None otherwise: the caller then reads the
    column through ``numeric_column``, which says what is wrong with it)."""
    if raw is None or raw.dtype.kind != "f" or raw.ndim != 1:
        return None
    values = raw.tolist()
    return values if all(map(math.isfinite, values)) and values else None


def _nrows(cols: dict[str, np.ndarray]) -> int:
    return len(next(iter(cols.values()))) if cols else 0


def _rows(cols: dict[str, np.ndarray], a: int, b: int) -> dict[str, np.ndarray]:
    return {k: v[a:b] for k, v in cols.items()}


def _fmt(v: float) -> str:
    return f"{v:.6g}"


def known_levels(levels: list[str], limit: int = 20) -> str:
    """The levels a categorical column was trained with, quoted, for messages (the first ``limit``)."""
    shown = ", ".join(repr(str(v)) for v in levels[:limit])
    return shown + (f" and {len(levels) - limit} more" if len(levels) > limit else "")


def level_as_sent(v: Any) -> str:
    """A categorical value as the caller wrote it: text quoted, a number bare and marked as a number."""
    if isinstance(v, (str, np.str_)):
        return repr(str(v))
    if isinstance(v, (float, np.floating)) and float(v).is_integer():
        return f"{int(v)} (a number)"
    return f"{v!s} (a number)" if isinstance(v, (int, float, np.number)) else repr(str(v))
