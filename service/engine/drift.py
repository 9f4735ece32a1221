"""Input drift: a version's training distribution in bins, counting new inputs into them, and the
population stability index between the two.

A version keeps, per numeric input, ``QUANTILE_BINS`` bins between training quantiles plus two open bins
for values below the training minimum and above the maximum; per categorical input, its levels plus one
bin for levels never seen; and the same quantile bins for the predicted values (the out-of-fold
predictions of training). Shapes: a numeric input has edges (B + 1,) = [min, q₁, …, q_{B−1}, max] and
B + 2 shares; a categorical input with L levels has L + 1 shares.

The population stability index of recent shares r against training shares t over the bins is
``PSI = Σ (rᵢ − tᵢ) · ln(rᵢ / tᵢ)``, with every share floored at ``PSI_FLOOR`` so empty bins stay finite
(common practice). Rules of thumb (common practice, not a test): below ``PSI_WATCH`` = 0.1 little
change; 0.1 to ``PSI_ACT`` = 0.25 watch; above 0.25 act (retrain or investigate).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .parallel import ordered_map, usable_cores

QUANTILE_BINS = 10
PSI_FLOOR = 1e-4
PSI_WATCH = 0.1
PSI_ACT = 0.25
REFERENCE_VERSION = 1
THREADS_FROM_ROWS = 50_000  # training rows from which ``reference`` bins its columns on threads


def numeric_reference(values: np.ndarray) -> dict[str, Any]:
    """Edges and training shares of one numeric column (finite values, at least one)."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"edges": [], "training": [1.0]}
    edges = np.quantile(v, np.linspace(0.0, 1.0, QUANTILE_BINS + 1))
    edges = np.unique(edges)  # tied quantiles (few distinct values) merge their bins
    if edges.size == 1:
        edges = np.array([edges[0], edges[0]])  # a constant column: one inner bin
    counts = numeric_counts(edges, v)
    return {"edges": edges.tolist(), "training": (counts / counts.sum()).tolist()}


def numeric_counts(edges: np.ndarray | list[float], values: np.ndarray) -> np.ndarray:
    """Counts per bin (len(edges) + 1 bins): below the first edge, the B = len(edges) − 1 closed-left
    bins between edges (the last one closed on both sides), above the last edge. Non-finite values count
    in neither (they are refused before a prediction)."""
    e = np.asarray(edges, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    if e.size == 0:
        return np.array([float(v.size)])
    if e.size == 1:  # a constant training column: one inner bin holding exactly that value
        e = np.array([e[0], e[0]])
    idx = np.searchsorted(e, v, side="right")  # 0: below min; i: [e[i-1], e[i]); len(e): ≥ max
    idx[v == e[-1]] = e.size - 1  # the maximum itself belongs to the last inner bin
    return np.bincount(idx, minlength=e.size + 1).astype(np.float64)


def categorical_reference(levels: list[str], counts: np.ndarray) -> dict[str, Any]:
    """Training shares of each level, and a last bin (share 0) for levels never seen."""
    c = np.asarray(counts, dtype=np.float64)
    total = c.sum()
    shares = (c / total if total > 0 else np.zeros_like(c)).tolist() + [0.0]
    return {"levels": list(levels), "training": shares}


def categorical_counts(levels: list[str], values: np.ndarray, positions: dict[str, int] | None = None) -> np.ndarray:
    """Counts per level of ``values`` (level texts), with unseen levels in the last bin."""
    pos = positions if positions is not None else {lv: i for i, lv in enumerate(levels)}
    idx = np.fromiter((pos.get(v, len(levels)) for v in values), dtype=np.int64, count=len(values))
    return np.bincount(idx, minlength=len(levels) + 1).astype(np.float64)


def reference(features: list[str], X: np.ndarray, categories: list[str], levels: list[list[str]],
              level_counts: list[np.ndarray], predictions: np.ndarray) -> dict[str, Any]:
    """The drift reference of a version: X (n, d) training inputs (or a uniform sample of them), the
    training count of every level, and the (out-of-fold) predictions (m,). The columns are binned on every
    usable core (each column on its own: the same result on any number of threads; numpy's partition and
    search run without the GIL)."""
    columns = [X[:, j] for j in range(len(features))] + [predictions]
    refs = list(ordered_map(numeric_reference, columns, usable_cores() if X.shape[0] >= THREADS_FROM_ROWS else 1))
    return {
        "format_version": REFERENCE_VERSION,
        "numeric": [{"name": f, **r} for f, r in zip(features, refs)],
        "categorical": [{"name": c, **categorical_reference(lv, cnt)}
                        for c, lv, cnt in zip(categories, levels, level_counts)],
        "prediction": refs[-1],
    }


def psi(training: np.ndarray | list[float], recent_counts: np.ndarray | list[float]) -> float | None:
    """Population stability index of recent counts against training shares (None without recent rows)."""
    t = np.maximum(np.asarray(training, dtype=np.float64), PSI_FLOOR)
    c = np.asarray(recent_counts, dtype=np.float64)
    total = c.sum()
    if total <= 0:
        return None
    r = np.maximum(c / total, PSI_FLOOR)
    return float(np.sum((r - t) * np.log(r / t)))


def flag(value: float | None) -> str | None:
    """``"act"``, ``"watch"`` or None for a PSI value (rules of thumb above)."""
    if value is None:
        return None
    if value >= PSI_ACT:
        return "act"
    if value >= PSI_WATCH:
        return "watch"
    return None


def count_inputs(model: Any, ref: dict[str, Any], cols: dict[str, np.ndarray], value: np.ndarray,
                 leverage: np.ndarray) -> dict[str, Any]:
    """Counts of one batch of served rows (already validated by the prediction): per numeric input its bin
    counts, per categorical input its level counts (unseen last), the predicted values' bin counts, and
    the rows with any input outside the training range, with an unseen level, or with a leverage above
    the largest training leverage (the prediction's own warning rules, ``FittedModel._warnings``)."""
    from .table import categorical_column, numeric_column

    m = int(np.asarray(value).shape[0])
    outside = np.zeros(m, dtype=bool)
    numeric: dict[str, list[float]] = {}
    per_feature: dict[str, int] = {}
    for entry in ref.get("numeric", []):
        name = entry["name"]
        x = numeric_column(cols, name, "input")
        numeric[name] = numeric_counts(entry["edges"], x).tolist()
        lo, hi = model.ranges[name]
        off = (x < lo) | (x > hi)
        per_feature[name] = int(off.sum())
        outside |= off
    categorical: dict[str, list[float]] = {}
    unseen = np.zeros(m, dtype=bool)
    for entry in ref.get("categorical", []):
        name = entry["name"]
        levels = entry["levels"]
        values = categorical_column(cols, name)
        pos = {lv: i for i, lv in enumerate(levels)}
        idx = np.fromiter((pos.get(v, len(levels)) for v in values), dtype=np.int64, count=len(values))
        categorical[name] = np.bincount(idx, minlength=len(levels) + 1).astype(np.float64).tolist()
        unseen |= idx == len(levels)
    lev = np.asarray(leverage, dtype=np.float64)
    high = lev > float(model.max_leverage) * (1 + 1e-9)
    pred = ref.get("prediction") or {"edges": []}
    return {
        "rows": m,
        "numeric": numeric,
        "categorical": categorical,
        "prediction": numeric_counts(pred["edges"], np.asarray(value, dtype=np.float64)).tolist(),
        "outside_range_rows": int(outside.sum()),
        "outside_range_by_feature": per_feature,
        "unseen_level_rows": int(unseen.sum()),
        "high_leverage_rows": int(high.sum()),
    }


def count_outcomes(observed: np.ndarray, value: np.ndarray, lower: np.ndarray | None, upper: np.ndarray | None
                   ) -> dict[str, Any]:
    """Error sums of scored outcomes: rows, Σ e², Σ |e|, Σ y, Σ y², and rows inside the interval."""
    y = np.asarray(observed, dtype=np.float64)
    v = np.asarray(value, dtype=np.float64)
    ok = np.isfinite(v)
    e = y[ok] - v[ok]
    inside = 0
    if lower is not None and upper is not None:
        inside = int(((y >= lower) & (y <= upper) & ok).sum())
    return {"rows": int(ok.sum()), "sse": float(np.dot(e, e)), "sae": float(np.abs(e).sum()),
            "sum_y": float(y[ok].sum()), "sum_y2": float(np.dot(y[ok], y[ok])), "inside": inside,
            "interval_rows": int(ok.sum()) if lower is not None else 0}
