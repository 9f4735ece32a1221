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
from functools import cached_property
from typing import Any

import numpy as np

from service.errors import InvalidData

from .basis import BasisSetting, Categories, InputScaler
from .table import as_columns, categorical_column, numeric_column

MAX_INTERVAL_RESIDUALS = 20_000  # residuals kept per model; more are thinned to evenly spaced order statistics


@dataclass
class FittedModel:
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
    cv: dict[str, Any] = field(default_factory=dict)  # {"metric", "mean", "std", "folds", "scheme", "rule"}
    term_names: list[str] = field(default_factory=list)

    # ---- prediction -------------------------------------------------------------------------------
    @property
    def weights(self) -> np.ndarray:
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

    def check_columns(self, cols: dict[str, np.ndarray]) -> None:
        needed = list(self.features) + list(self.categories.names)
        missing = [c for c in needed if c not in cols]
        if missing:
            raise InvalidData(f"columns {missing} are missing; this model needs {needed}",
                              errors=[{"field": c, "message": "missing column"} for c in missing])
        extra = [c for c in cols if c not in needed and c != self.target]
        if extra:
            raise InvalidData(f"columns {extra} are not inputs of this model; remove them (inputs: {needed})",
                              errors=[{"field": c, "message": "unknown column"} for c in extra])

    def predict(self, data: Any) -> np.ndarray:
        cols = as_columns(data)
        Phi, _, _ = self.design(cols)
        return self.intercept + Phi @ self.weights

    def predict_detail(self, data: Any, interval: float | None = None, strict: bool = True) -> dict[str, Any]:
        """Predictions with CV+ intervals, leverage and extrapolation warnings per row."""
        cols = as_columns(data)
        if strict:
            self.check_columns(cols)
        if interval is not None and not (0 < interval < 1):
            raise InvalidData(f"interval must lie strictly between 0 and 1, got {interval}; e.g. 0.9 for 90%")
        Phi, X, unseen = self.design(cols)
        value = self.intercept + Phi @ self.weights
        Zs = (Phi - self.column_mean) / self.column_scale
        FZ = Zs @ self.leverage_factor.T if self.leverage_factor.size else np.zeros((Phi.shape[0], 0))
        lev = 1.0 / self.n_train + np.einsum("ij,ij->i", FZ, FZ)
        lower = upper = None
        if interval is not None:
            lower, upper = self._interval(Phi, value, 1.0 - interval)
        warnings = self._warnings(X, unseen, lev, cols)
        for i in np.flatnonzero(~np.isfinite(value)):  # overflow: say so rather than answer a bare null
            warnings[i].append(
                f"the prediction is not a finite number ({float(value[i])!r} overflowed): the inputs of this row lie so far "
                "outside the training data that the basis overflowed; no value is given")
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
                q = np.sort(R)[k_hi - 1]
                hi = value + q
                lo = value - q if k_lo >= 1 else lo
            return lo, hi
        mu = self.fold_intercepts[None, :] + Phi @ self.fold_weights.T  # (m, K)
        mu_rows_per_res = self.residual_fold
        chunk = max(1, 4_000_000 // max(1, n_eff))
        for a in range(0, m, chunk):
            b = min(m, a + chunk)
            centres = mu[a:b][:, mu_rows_per_res]  # (c, n_eff)
            if k_lo >= 1:
                low_vals = centres - R[None, :]
                lo[a:b] = np.partition(low_vals, k_lo - 1, axis=1)[:, k_lo - 1]
            if k_hi <= n_eff:
                high_vals = centres + R[None, :]
                hi[a:b] = np.partition(high_vals, k_hi - 1, axis=1)[:, k_hi - 1]
        return lo, hi

    def _warnings(self, X: np.ndarray, unseen: list[np.ndarray], lev: np.ndarray,
                  cols: dict[str, np.ndarray]) -> list[list[str]]:
        m = X.shape[0]
        out: list[list[str]] = [[] for _ in range(m)]
        outside = (X > self._hi) | (X < self._lo) if X.size else np.zeros(X.shape, bool)
        for j in (np.flatnonzero(outside.any(axis=0)) if outside.size else []):
            f = self.features[j]
            lo, hi = self.ranges[f]
            col = X[:, j]
            for i in np.flatnonzero(col > hi):
                out[i].append(f"{f}={_fmt(col[i])} is above the training range [{_fmt(lo)}, {_fmt(hi)}]")
            for i in np.flatnonzero(col < lo):
                out[i].append(f"{f}={_fmt(col[i])} is below the training range [{_fmt(lo)}, {_fmt(hi)}]")
        for name, levels, mask in zip(self.categories.names, self.categories.levels, unseen):
            if not mask.any():
                continue
            raw = cols[name]
            known = known_levels(levels)
            for i in np.flatnonzero(mask):
                out[i].append(f"{name}={level_as_sent(raw[i])} was not seen in training; its effect is taken as zero "
                              f"(known levels: {known})")
        # Hidden extrapolation: leverage above the largest leverage of any training row
        # (Montgomery, Peck & Vining, Introduction to Linear Regression Analysis, section 3.8).
        for i in np.flatnonzero(lev > self.max_leverage * (1 + 1e-9)):
            out[i].append(f"leverage {lev[i]:.3g} exceeds the largest training leverage {self.max_leverage:.3g}: "
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
    stride g for all folds, so each kept value stands for g residuals)."""
    n = abs_res.size
    g = max(1, math.ceil(n / limit))
    out_r, out_f = [], []
    for k in np.unique(fold):
        r = np.sort(abs_res[fold == k])
        if g > 1:
            r = r[g // 2::g]
        out_r.append(r)
        out_f.append(np.full(r.size, k, dtype=np.int64))
    return np.concatenate(out_r), np.concatenate(out_f), float(g)


def _nrows(cols: dict[str, np.ndarray]) -> int:
    return len(next(iter(cols.values()))) if cols else 0


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
