"""What both front ends share after the rows are read: scoring, selection, warnings and checks.

The in-memory search (``tune``) and the out-of-core one (``streaming``) each reduce the rows to the same
intermediate, per basis setting: a metric value per (l1 ratio, strength, split), and a training
summary of every row for the complexity (``df``) of each candidate. From there, this module alone
builds the CV table, applies the selection rule and the edge-of-grid warnings. It also holds the one
metric function (every RMSE / MAE / R² in the service is computed by ``metric_value``) and the checks
on column magnitudes that both front ends apply while reading.
"""

from __future__ import annotations

import math
import platform
import re
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from service.errors import InvalidData

from . import drift
from .basis import BasisSetting, Categories, InputScaler
from .model import FittedModel
from .parallel import ordered_map
from .solvers import Fit, centred_scaled, fit, l2_df, leverage_factor, report_convergence, watch_convergence
from .spec import TuneSpec
from .summaries import Summary

METRICS = ("rmse", "mae", "r2")
PLOT_SAMPLE = 5_000


# ---- the one metric function ------------------------------------------------------------------------
def metric_value(metric: str, n: Any, sse: Any = None, sae: Any = None, sst: Any = None) -> np.ndarray:
    """RMSE, MAE or R² from the sums they are made of (arrays broadcast):

    - rmse = √(sse / n), mae = sae / n, r2 = 1 − sse / sst (NaN where sst = 0),

    where ``sse`` is the sum of squared errors over ``n`` rows, ``sae`` the sum of absolute errors and
    ``sst`` the sum of squares of y about its own mean over the same rows (the definitions of
    ``sklearn.metrics.root_mean_squared_error``, ``mean_absolute_error`` and ``r2_score``).
    An unknown metric name raises ``ValueError``: there is no fallback.
    """
    n = np.asarray(n, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        if metric == "rmse":
            return np.sqrt(np.asarray(sse, dtype=float) / n)
        if metric == "mae":
            return np.asarray(sae, dtype=float) / n
        if metric == "r2":
            sst = np.asarray(sst, dtype=float)
            return np.where(sst > 0, 1.0 - np.asarray(sse, dtype=float) / np.where(sst > 0, sst, 1.0), np.nan)
    raise ValueError(f"unknown metric {metric!r}; use one of {METRICS}")


def metric_of_rows(metric: str, y: np.ndarray, pred: np.ndarray) -> float:
    """The metric of predictions ``pred`` for observed ``y`` (1-D arrays of equal length)."""
    y = np.asarray(y, dtype=float)
    e = y - np.asarray(pred, dtype=float)
    return float(metric_value(metric, y.size, sse=float(e @ e), sae=float(np.abs(e).sum()),
                              sst=float(np.sum((y - y.mean()) ** 2)) if y.size else 0.0))


def lower_is_better(metric: str) -> bool:
    if metric not in METRICS:
        raise ValueError(f"unknown metric {metric!r}; use one of {METRICS}")
    return metric != "r2"


# ---- the one rule for column types ---------------------------------------------------------------------
def column_kind(values_or_dtype: Any) -> str:
    """"number" (integers and floats), "boolean" or "text" (anything else) for a column or its numpy dtype.

    The rule for every front end: numbers are features and targets; text is read only as categorical
    levels (or group / order / key columns); booleans are neither numbers nor default features: a
    boolean column must be encoded as 0/1 numbers or listed under ``categorical`` (levels "true" and
    "false", the JSON and CSV spelling), the same answer on every path."""
    kind = np.dtype(getattr(values_or_dtype, "dtype", values_or_dtype)).kind
    if kind in "iuf":
        return "number"
    if kind == "b":
        return "boolean"
    return "text"


# A text column that no role of the spec claims is left out of the default features. When its cells are
# mostly numbers that is a silent loss of a feature (one "1,234" made a CSV column text), so such a column
# is refused, naming its first cell that is not a plain number: the same rule on every path (JSON rows and
# Parquet here; a CSV's columns are typed by the same test in ``service.sources.csv_types``).
TEXT_SAMPLE = 16_384  # the first cells of a column the rule looks at (bounded, and the same in memory and streamed)
_NUMBER_LIKE = re.compile(r"\s*[+-]?(?:(?=\d)[\d,_' ]*(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?\s*|\s*[+-]?0[xX][0-9a-fA-F]+\s*")
_PLAIN_NUMBER = re.compile(r"\s*[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?\s*")
MOSTLY = 0.5


def check_numeric_text(name: str, values: Any, where: str = "the data", offset: int = 0) -> None:
    """Refuse a text column (of no role) whose first ``TEXT_SAMPLE`` non-empty cells are more than half
    number-like (``1.5``, ``1,234``, ``0x1A``), naming the first cell that is not a plain number (or the
    first cell, when all are numbers stored as text)."""
    cells = [(i, v) for i, v in enumerate(list(values)[:TEXT_SAMPLE]) if isinstance(v, str) and v.strip()]
    if not cells:
        return
    like = sum(1 for _, v in cells if _NUMBER_LIKE.fullmatch(v))
    if like <= MOSTLY * len(cells):
        return
    bad = next(((i, v) for i, v in cells if not _PLAIN_NUMBER.fullmatch(v)), None)
    fix = ("write plain numbers (digits and one '.' as decimal point: 1234.5, not '1,234.5' nor hex such as '0x1A') "
           "as numbers, not text; or list the column under 'categorical' if it holds labels, or name the features "
           "in the spec to leave it out")
    if bad is None:
        i, v = cells[0]
        msg = (f"{where} column {name!r} holds numbers stored as text (row {i + offset}: {v!r:.40}), so it would be "
               f"left out of the default features; {fix}")
    else:
        i, v = bad
        msg = (f"{where} column {name!r} holds {v!r:.40} at row {i + offset}, which is not a number, while most of its "
               f"cells are numbers; {fix}")
    raise InvalidData(msg, errors=[{"field": name, "row": (bad or cells[0])[0] + offset, "value": (bad or cells[0])[1],
                                    "message": "not a number"}])


def unclaimed_text(spec: TuneSpec, schema: dict[str, str]) -> list[str]:
    """Text columns that ``check_numeric_text`` looks at: no role in the spec, and the features not listed."""
    if spec.features is not None:
        return []
    roles = {spec.target, *spec.categorical, spec.cv.group_by, spec.cv.order_by, spec.cv.row_key}
    return [c for c, kind in schema.items() if kind == "text" and c not in roles]


# ---- column checks shared by both front ends ---------------------------------------------------------
def check_spread(name: str, role: str, lo: float, hi: float, n: int) -> None:
    """Refuse a column whose sums of squares would overflow float64 (n · (max − min)² > 1.8e308): the CV
    errors, variances and R factors of such a column are infinite or NaN, and nothing downstream could
    say why. The fix is to rescale the column (larger units)."""
    with np.errstate(over="ignore", invalid="ignore"):
        bound = np.float64(n) * (np.float64(hi) - np.float64(lo)) ** 2
    if not np.isfinite(bound):
        big = max(abs(float(lo)), abs(float(hi)))
        raise InvalidData(
            f"{role} column {name!r} reaches {big:.3g}: over {n:,} rows its sum of squares overflows float64 "
            f"(largest value 1.8e308); rescale the column (e.g. divide it by 1e100, or use larger units) before training",
            errors=[{"field": name, "value": big, "message": "sum of squares overflows float64"}])


# ---- scoring from fold summaries ---------------------------------------------------------------------
def setting_df(full: Summary, spec: TuneSpec, strengths: np.ndarray, ratios: list[float | None]) -> np.ndarray:
    """(n_ratios, L) complexity of every candidate of one basis setting, fit on all rows (``Fit.df``)."""
    if spec.penalty.kind == "l2":  # the effective degrees of freedom need the singular values only
        return np.array([l2_df(full, strengths) for _ in ratios])
    return np.array([fit(full, spec.penalty.kind, strengths, r).df() for r in ratios])


def score_splits(atoms: list[Summary], splits: list[tuple[list[int], list[int]]], spec: TuneSpec,
                 strengths: np.ndarray, ratios: list[float | None], mae_rows=None, tick=None, combined=None,
                 threads: int = 1) -> tuple[np.ndarray, list[list[Fit]]]:
    """Metric per (l1 ratio, strength, split) from atom summaries, and the fits of every split.

    RMSE and R² come from the validation atoms' summaries alone; MAE needs the rows, through
    ``mae_rows(test_ids, fit) -> (L,)`` (or NaN placeholders, filled later by a streaming pass).
    ``tick(fraction)``, when given, is called after each split. ``combined(atom_ids)``, when given,
    returns the summary of those atoms together (nested settings take it as a leading block of the
    widest setting's, merged once: ``NestedSplits``); by default the atoms are merged here. ``threads`` > 1
    scores that many splits at once (each split's arithmetic is its own, so the result is the same; BLAS
    should then be on one thread, ``parallel.single_blas``)."""
    metric = spec.selection.metric
    values = np.empty((len(ratios), strengths.size, len(splits)))
    all_fits = []
    if combined is None:
        def combined(ids: list[int]) -> Summary:
            return Summary.combine([atoms[i] for i in ids])

    def one(split: tuple[list[int], list[int]]) -> tuple[list[Fit], list[np.ndarray], dict]:
        train_ids, test_ids = split
        train = combined(train_ids)
        with watch_convergence() as seen:  # this thread's own (a pool thread does not see the caller's)
            fits = [fit(train, spec.penalty.kind, strengths, r) for r in ratios]
        test = combined(test_ids)
        out = []
        for f in fits:
            if metric == "mae":
                out.append(mae_rows(test_ids, f) if mae_rows else np.full(strengths.size, np.nan))
            else:
                out.append(metric_value(metric, test.n, sse=test.sse(f.residual_operator()), sst=test.total_ss()))
        return fits, out, seen

    for j, (fits, out, seen) in enumerate(ordered_map(one, splits, max(1, min(threads, len(splits))))):
        report_convergence(seen)
        all_fits.append(fits)
        for r_i, v in enumerate(out):
            values[r_i, :, j] = v
        if tick is not None:  # a long job's progress inside one basis setting: the share of splits done
            tick((j + 1) / len(splits))
    return values, all_fits


class NestedSplits:
    """Merged summaries of atom sets of the widest nested setting, each merged once: every lower degree
    (and the linear basis) takes its leading block (``Summary.leading``, exact), so a grid of nested
    settings merges each split's atoms once instead of once per setting."""

    def __init__(self, atoms: list[Summary]):
        self.atoms = atoms
        self._merged: dict[tuple[int, ...], Summary] = {}

    def of(self, ids: list[int], k: int) -> Summary:
        """Summary of the atoms ``ids`` together, over the leading k columns of the widest design."""
        key = tuple(ids)
        if key not in self._merged:
            self._merged[key] = Summary.combine([self.atoms[i] for i in ids])
        return self._merged[key].leading(k)


# ---- the CV table ------------------------------------------------------------------------------------
def table_rows(s_idx: int, setting: BasisSetting, strengths: np.ndarray, ratios: list[float | None],
               values: np.ndarray, df: np.ndarray, extra: dict[str, np.ndarray] | None = None
               ) -> list[dict[str, Any]]:
    """One CV-table row per (l1 ratio, strength) of one basis setting.

    ``values`` (n_ratios, L, n_splits) holds the metric per split; ``df`` (n_ratios, L) the complexity of
    each candidate fit on all rows. A row has ``mean``; ``std``, the population standard deviation over
    splits (as ``GridSearchCV``'s ``std_test_score``); ``se``, the standard error of the mean used by the
    one-standard-error rule, ``sd(ddof=1) / √splits`` (Hastie, Tibshirani & Friedman, ESL 2nd ed.,
    §7.10); ``df``; and ``split_values``, the metric per split. ``extra`` may carry per-candidate columns
    (``gcv``) and, for the loo scheme, its own ``_std`` and ``_se`` (then ``split_values`` is None).
    """
    extra = extra or {}
    n_splits = values.shape[2]
    # per-candidate figures as whole arrays (the same reductions over each candidate's contiguous splits)
    values = np.ascontiguousarray(values, dtype=float)
    mean = np.mean(values, axis=2).tolist()
    std = np.std(values, axis=2).tolist()
    se = (np.std(values, axis=2, ddof=1) / math.sqrt(n_splits)).tolist() if n_splits > 1 else None
    split_values = values.tolist()
    dfs = np.asarray(df, dtype=float).tolist()
    public = {key: np.asarray(arr, dtype=float).tolist() for key, arr in extra.items() if not key.startswith("_")}
    loo = ({"std": np.asarray(extra["_std"], dtype=float).tolist(), "se": np.asarray(extra["_se"], dtype=float).tolist()}
           if "_std" in extra else None)
    basis = setting.describe()
    rows = []
    for r_i, ratio in enumerate(ratios):
        for l_i, lam in enumerate(strengths.tolist()):
            row = {"basis": dict(basis), "strength": lam, "l1_ratio": ratio,
                   "mean": mean[r_i][l_i], "std": std[r_i][l_i], "se": se[r_i][l_i] if se is not None else math.nan,
                   "df": dfs[r_i][l_i], "split_values": split_values[r_i][l_i]}
            if loo is not None:
                row["std"] = loo["std"][r_i][l_i]
                row["se"] = loo["se"][r_i][l_i]
                row["split_values"] = None
            for key, arr in public.items():
                row[key] = arr[r_i][l_i]
            row["_setting"] = s_idx
            rows.append(row)
    return rows


def finite_table(rows: list[dict[str, Any]]) -> tuple[list[dict[str, Any]], list[str]]:
    """The public CV table (no private keys) with every non-finite figure replaced by None, and a
    warning naming the candidates that had one (a stored version never holds NaN or infinity)."""
    out, bad = [], []
    for r in rows:
        clean = {}
        for k, v in r.items():
            if k.startswith("_"):
                continue
            if isinstance(v, float) and not math.isfinite(v):
                if k == "mean":
                    bad.append(f"{_label(r)} at strength {r['strength']:.4g}")
                v = None
            elif k == "split_values" and v is not None:
                v = [x if math.isfinite(x) else None for x in v]
            clean[k] = v
        out.append(clean)
    warnings = []
    if bad:
        shown = "; ".join(bad[:5]) + (f" and {len(bad) - 5} more" if len(bad) > 5 else "")
        warnings.append(f"{len(bad)} candidate(s) have no finite CV error and were not eligible: {shown}")
    return out, warnings


def _label(row: dict[str, Any]) -> str:
    b = row["basis"]
    s = {"linear": "linear", "polynomial": f"polynomial degree {b.get('degree')}",
         "rbf": f"rbf width {b.get('width')}"}.get(b.get("kind"), str(b))
    return s + (f" l1_ratio {row['l1_ratio']:g}" if row.get("l1_ratio") not in (None, 1.0) else "")


# ---- selection ---------------------------------------------------------------------------------------
def select(rows: list[dict[str, Any]], settings: list[BasisSetting], metric: str, rule: str
           ) -> tuple[int, int, int]:
    """(chosen, best mean, one-standard-error) indices into ``rows``.

    One-standard-error rule (Hastie, Tibshirani & Friedman, *The Elements of Statistical Learning*,
    2nd ed., §7.10): the standard error of the best candidate's mean CV error is the sample standard
    deviation (ddof = 1) of its split errors over √(number of splits); among the candidates whose mean
    is within one such standard error of the best, take the most parsimonious, measured by ``df``
    (effective degrees of freedom, comparable across bases); ties go to the larger strength, then the
    simpler basis (linear, lower polynomial degree, wider RBF), then the larger l1 ratio.
    """
    sign = 1.0 if lower_is_better(metric) else -1.0
    score = np.array([sign * r["mean"] for r in rows], dtype=float)
    if not np.isfinite(score).any():
        raise InvalidData("no candidate has a finite CV error: every fit produced NaN or infinity; check the "
                          "target and features for extreme values, and that every fold has several rows")
    score = np.where(np.isfinite(score), score, np.inf)
    best = int(np.argmin(score))
    se = rows[best]["se"]
    se = se if se is not None and math.isfinite(se) else 0.0
    within = [i for i in range(len(rows)) if score[i] <= score[best] + se]

    def key(i: int):
        r = rows[i]
        df = r["df"] if r.get("df") is not None and math.isfinite(r["df"]) else math.inf
        return (df, -r["strength"], settings[r["_setting"]].complexity(), -(r["l1_ratio"] or 0.0))

    onese = min(within, key=key)
    chosen = onese if rule == "one_standard_error" else best
    return chosen, best, onese


def edge_warnings(settings: list[BasisSetting], chosen: dict[str, Any], strengths: np.ndarray) -> list[str]:
    out = []
    lam = chosen["strength"]
    if strengths.size > 1 and lam == strengths[-1]:
        out.append(f"the chosen strength {lam:.4g} is the largest in the grid; widen the grid upwards")
    if strengths.size > 1 and lam == strengths[0] and lam > 0:
        out.append(f"the chosen strength {lam:.4g} is the smallest in the grid; widen the grid downwards")
    s = settings[chosen["_setting"]]
    if s.kind == "polynomial":
        degrees = sorted({x.degree for x in settings if x.kind == "polynomial"})
        if len(degrees) > 1 and s.degree == degrees[-1]:
            out.append(f"the chosen degree {s.degree} is the highest in the grid; widen the grid (try higher degrees)")
    if s.kind == "rbf":
        widths = sorted({x.width for x in settings if x.kind == "rbf"})
        if len(widths) > 1 and s.width in (widths[0], widths[-1]):
            side = "narrowest" if s.width == widths[0] else "widest"
            out.append(f"the chosen RBF width {s.width:g} is the {side} in the grid; widen the grid")
    return out


# ---- the one data fingerprint -------------------------------------------------------------------------
FINGERPRINT_METHOD = ("per column: 4 lanes of Σ splitmix64(value ⊕ splitmix64(4·row + lane)) mod 2⁶⁴ over the rows "
                      "(value: float64 bits of a number, BLAKE2b-64 of a text's UTF-8); sha256 over the sorted "
                      "column names with their lanes and the row count")


def lane_keys(offset: int, rows: int) -> np.ndarray:
    """(4, rows) ``splitmix64(4·row + lane)`` of the rows at positions ``offset`` … ``offset + rows − 1``: what
    every column's lanes mix their values with (``column_lanes``), computed once for all columns."""
    from .folds import splitmix64

    pos = np.arange(offset, offset + rows, dtype=np.uint64) * np.uint64(4)
    with np.errstate(over="ignore"):
        return np.stack([splitmix64(pos + np.uint64(k)) for k in range(4)])


def column_lanes(values: np.ndarray, offset: int, keys: np.ndarray | None = None) -> np.ndarray:
    """(4,) uint64 lanes of one column's rows, the first at position ``offset`` in the whole source. Lanes
    of consecutive row blocks add (mod 2⁶⁴), so the fingerprint does not depend on how the rows were cut
    into partitions or batches, while moving a value to another row changes it. ``keys``: ``lane_keys`` of
    these rows, when already made for another column."""
    from .folds import key_hash, splitmix64

    values = np.asarray(values)
    if values.dtype.kind in "biuf":
        u = (values.astype(np.float64) + 0.0).view(np.uint64)  # + 0.0 folds -0.0 into 0.0
    else:
        u = key_hash(np.asarray([str(v) for v in values.tolist()], dtype=object), 0)
    keys = lane_keys(offset, u.size) if keys is None else keys
    out = np.zeros(4, dtype=np.uint64)
    with np.errstate(over="ignore"):
        for k in range(4):
            out[k] = np.sum(splitmix64(u ^ keys[k]), dtype=np.uint64)
    return out


def add_lanes(a: dict[str, np.ndarray], b: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    out = dict(a)
    with np.errstate(over="ignore"):
        for name, lanes in b.items():
            out[name] = out[name] + lanes if name in out else lanes
    return out


def fingerprint_of(lanes: dict[str, np.ndarray], rows: int) -> dict[str, Any]:
    """The data fingerprint of a version: the same rows in the same order give the same value in memory
    and streamed, however they are partitioned or batched."""
    import hashlib

    h = hashlib.sha256()
    h.update(f"rows={int(rows)};".encode())
    for name in sorted(lanes):
        h.update(name.encode("utf-8") + b"\x00" + np.asarray(lanes[name], dtype="<u8").tobytes())
    return {"sha256": h.hexdigest(), "rows": int(rows), "columns": len(lanes), "method": FINGERPRINT_METHOD}


def fingerprint_columns(cols: dict[str, np.ndarray], names: list[str], offset: int = 0,
                        labels: Any = ()) -> dict[str, np.ndarray]:
    """Lanes of the columns ``names``; a column in ``labels`` (categorical, cv.group_by) by its level texts
    (``table.categorical_column``), so a label column gives one fingerprint whether it was stored as
    numbers (JSON ``7``) or as text (a CSV cell ``7``, read as text because the column is categorical)."""
    from .table import categorical_column

    keys = lane_keys(offset, len(cols[names[0]])) if names else None  # the same for every column
    return {name: column_lanes(categorical_column(cols, name, offset) if name in labels else cols[name], offset,
                               keys)
            for name in names}


def label_columns(spec: TuneSpec) -> set[str]:
    """The columns a spec reads as labels: categorical inputs and the cv.group_by column."""
    return {c for c in (*spec.categorical, spec.cv.group_by) if c}


# ---- the refit and the result ------------------------------------------------------------------------
def refit_all_rows(full_summary: Summary, spec: TuneSpec, strengths: np.ndarray, strength: float,
                   ratio: float | None) -> tuple[Fit, int, np.ndarray]:
    """(fit on all rows over the strength grid, index of the chosen strength, leverage factor F with
    ``h(z) = 1/n + ‖F z‖²``) from the summary of every row."""
    full = fit(full_summary, spec.penalty.kind, strengths, ratio)
    l_idx = int(np.flatnonzero(strengths == strength)[0])
    svd = (full.singular, full.right) if full.singular is not None else None  # L2: the fit's own SVD of Z
    F = leverage_factor(centred_scaled(full_summary)[0], strength, spec.penalty.kind, ratio, full.n, full.beta[l_idx],
                        svd)
    return full, l_idx, F


def build_model(spec: TuneSpec, features: list[str], scaler: InputScaler, setting: BasisSetting,
                categories: Categories, full: Fit, l_idx: int, ratio: float | None, F: np.ndarray,
                ranges: dict[str, list[float]],
                max_leverage: float, residuals: tuple[np.ndarray, np.ndarray, float],
                fold_fits: list[Fit] | None) -> FittedModel:
    """The fitted model at index ``l_idx`` of the all-rows fit. ``residuals`` is ``thin_residuals``'
    (sorted absolute out-of-fold residuals, their fold, weight); without ``fold_fits`` the intervals are
    split-conformal (fold -1)."""
    res, res_fold, g = residuals
    fw = fi = None
    if fold_fits is not None:
        fw = np.vstack([f.weights[0] for f in fold_fits])
        fi = np.array([f.intercept[0] for f in fold_fits])
    else:
        res_fold = np.full(res.size, -1, dtype=np.int64)
    strength = float(full.strengths[l_idx])
    return FittedModel(
        target=spec.target, features=list(features), scaler=scaler, basis=setting, categories=categories,
        column_mean=full.mean, column_scale=full.scale, beta=full.beta[l_idx], intercept=float(full.intercept[l_idx]),
        penalty={"kind": spec.penalty.kind, "strength": strength, "l1_ratio": ratio},
        n_train=full.n, ranges=ranges, leverage_factor=F, max_leverage=float(max_leverage),
        fold_weights=fw, fold_intercepts=fi, residuals=res, residual_fold=res_fold, residual_weight=g,
        term_names=setting.term_names(features) + categories.term_names(),
    )


def path_of(full: Fit, strength: float, names: list[str]) -> dict[str, Any]:
    """The regularization path of the chosen setting refit on all rows (``TuneResult.path``)."""
    return {"strengths": full.strengths.tolist(), "coefficients": full.beta.tolist(), "terms": names,
            "chosen_strength": float(strength), "df": full.effective_df().tolist() if full.singular is not None else None}


def finish(spec: TuneSpec, settings: list[BasisSetting], rows: list[dict[str, Any]], picks: tuple[int, int, int],
           model: FittedModel, full: Fit, *, n_rows: int, n_splits: int, fold_of_row: np.ndarray,
           oof_predictions: np.ndarray, oof_observed: np.ndarray, fingerprint: dict[str, Any],
           warnings: list[str] = (), summary_extra: dict[str, Any] | None = None,
           drift_inputs: tuple[np.ndarray, list[np.ndarray]] | None = None) -> TuneResult:
    """The ``TuneResult`` of either front end, from the CV rows, the selection ``picks`` (chosen, best
    mean, one-standard-error) and the refit model. ``drift_inputs``: the numeric training inputs (n, d)
    (or a uniform sample of them) and each categorical column's level counts, for the drift reference."""
    chosen_idx, best_idx, onese_idx = picks
    chosen = rows[chosen_idx]
    metric, rule = spec.selection.metric, spec.selection.rule
    strengths = full.strengths
    table, table_warnings = finite_table(rows)

    def public(i: int) -> dict[str, Any]:
        r = rows[i]
        return {"basis": r["basis"], "penalty": {"kind": spec.penalty.kind, "strength": r["strength"],
                "l1_ratio": r["l1_ratio"]}, "metric": metric, "mean": r["mean"], "std": r["std"],
                "se": r["se"] if r["se"] is not None and math.isfinite(r["se"]) else None, "df": r["df"], "index": i}

    summary = {"metric": metric, "rule": rule, "scheme": spec.cv.scheme, "splits": n_splits,
               "mean": chosen["mean"], "std": chosen["std"], "rows": int(n_rows), "basis_settings": len(settings),
               "strengths": int(strengths.size), "l1_ratios": len(spec.penalty.ratio_grid()),
               "candidates": len(rows), "python": platform.python_version(), **(summary_extra or {})}
    model.cv = {"metric": metric, "mean": chosen["mean"], "std": chosen["std"], "splits": n_splits,
                "scheme": spec.cv.scheme, "rule": rule}
    return TuneResult(
        spec=spec, chosen=public(chosen_idx) | {"rule": rule}, one_standard_error=public(onese_idx),
        best_mean=public(best_idx), cv_table=table, model=model, fold_of_row=fold_of_row,
        path=path_of(full, chosen["strength"], model.term_names),
        warnings=edge_warnings(settings, chosen, strengths) + table_warnings + list(warnings),
        oof_predictions=oof_predictions, oof_observed=oof_observed, oof_residuals=oof_observed - oof_predictions,
        fingerprint=fingerprint, summary=summary,
        drift=None if drift_inputs is None else drift.reference(
            model.features, drift_inputs[0], model.categories.names, model.categories.levels, drift_inputs[1],
            oof_predictions[np.isfinite(oof_predictions)]))


@dataclass
class TuneResult:
    """The outcome of a tuning run, from ``tune`` or ``tune_partitions`` (built here, in ``finish``).

    Attributes (n = training rows, L = strengths, p = basis terms of the chosen setting):
        spec: the validated ``TuneSpec``.
        chosen: the chosen candidate: ``{basis, penalty: {kind, strength, l1_ratio}, metric, mean, std,
            se, df, index, rule}`` (``index`` into ``cv_table``).
        one_standard_error: the candidate the one-standard-error rule picks (same keys, no ``rule``).
        best_mean: the candidate with the best mean CV metric (same keys).
        cv_table: one dict per candidate (basis setting × l1 ratio × strength): ``basis``, ``strength``,
            ``l1_ratio``, ``mean``, ``std`` (population, over splits), ``se`` (ddof = 1, over √splits),
            ``df`` (effective degrees of freedom, intercept excluded), ``split_values`` (the metric per split, or
            None for loo, which adds ``gcv``). Non-finite figures are None.
        model: the ``FittedModel`` refit on all rows at the chosen candidate.
        fold_of_row: (n,) int validation split of each row (kfold, grouped, time_ordered: -1 for rows never
            validated), (repeats, n) for repeated_kfold, or (0,) when streamed.
        path: ``{strengths (L,), coefficients (L, p), terms (p,), chosen_strength, df (L,) or None}``
            of the chosen setting refit on all rows.
        warnings: human-readable warnings (edge of grid, leverage one, solver convergence, ...).
        oof_predictions, oof_observed, oof_residuals: (m,) out-of-fold predictions, observed values and
            their differences; m = n in memory (NaN for rows never validated), a seeded sample streamed.
        fingerprint: ``{sha256, rows, columns, method}`` of the training columns (``fingerprint_of``).
        summary: counts and settings of the run (metric, rule, scheme, splits, rows, candidates, ...).
        drift: the training distribution in bins (``drift.reference``), or None.
        continuation: (meta, arrays) of the per-fold summaries a later continued training merges into
            (``continued.state_of``; ``to_artifact`` writes them as ``body["continuation"]`` and
            ``continuation_*`` arrays), or None when the version cannot be continued.
        lineage: for a continued version (``continued.continue_tune``): old_weight, new_rows, rows,
            new_data_fingerprint (the worker adds parent_version); None otherwise.
    """
    spec: TuneSpec
    chosen: dict[str, Any]
    one_standard_error: dict[str, Any]
    best_mean: dict[str, Any]
    cv_table: list[dict[str, Any]]
    model: FittedModel
    fold_of_row: np.ndarray
    path: dict[str, Any]
    warnings: list[str]
    oof_predictions: np.ndarray
    oof_observed: np.ndarray
    oof_residuals: np.ndarray
    fingerprint: dict[str, Any]
    summary: dict[str, Any] = field(default_factory=dict)
    drift: dict[str, Any] | None = None  # training distribution in bins (``drift.reference``)
    # (meta, arrays) of the per-fold summaries a later continuation merges into (``continued.state_of``), or None
    continuation: tuple[dict[str, Any], dict[str, np.ndarray]] | None = None
    lineage: dict[str, Any] | None = None  # a continued version: old_weight, new rows, new data's fingerprint

    def to_artifact(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """(JSON-serializable manifest body, plain numeric arrays): all a stored version needs."""
        meta, arrays = self.model.to_parts()
        finite = np.isfinite(self.oof_predictions)
        idx = np.flatnonzero(finite)
        if idx.size > PLOT_SAMPLE:
            idx = np.sort(np.random.default_rng(0).choice(idx, PLOT_SAMPLE, replace=False))
        arrays = dict(arrays)
        arrays["path_strengths"] = np.asarray(self.path["strengths"], dtype=float)
        arrays["path_coefficients"] = np.asarray(self.path["coefficients"], dtype=float)
        if self.path.get("df") is not None:
            arrays["path_df"] = np.asarray(self.path["df"], dtype=float)
        arrays["oof_predicted"] = self.oof_predictions[idx]
        arrays["oof_observed"] = self.oof_observed[idx]
        res = self.oof_residuals[finite]
        qs = np.linspace(0, 1, 101)
        body = {
            "spec": self.spec.model_dump(mode="json"),
            "model": meta,
            "chosen": self.chosen,
            "best_mean": self.best_mean,
            "one_standard_error": self.one_standard_error,
            "cv_table": self.cv_table,
            "cv_summary": self.summary,
            "path": {"strengths": "arrays:path_strengths", "coefficients": "arrays:path_coefficients",
                     "terms": self.path["terms"], "chosen_strength": self.path["chosen_strength"],
                     "df": "arrays:path_df" if self.path.get("df") is not None else None},
            "residual_quantiles": {"levels": qs.tolist(),
                                   "abs_residual": np.quantile(np.abs(res), qs).tolist() if res.size else []},
            "warnings": list(self.warnings),
            "data_fingerprint": self.fingerprint,
            "feature_schema": self.model.feature_schema(),
        }
        if self.drift is not None:
            body["drift_reference"] = self.drift
        if self.continuation is not None:
            body["continuation"] = self.continuation[0]
            arrays.update(self.continuation[1])
        if self.lineage is not None:
            body["lineage"] = dict(self.lineage)
        return body, arrays


