"""Joint cross-validated search over basis setting × penalty strength (× l1 ratio).

One pass over the rows per basis setting: the basis columns are expanded once, each fold's rows are
reduced to an R-factor summary (see ``summaries``), and everything else — every strength, every fold,
the refit and the regularization path — is small algebra on those summaries. A second look at the
rows of the chosen setting only gives out-of-fold residuals (for intervals), training leverages and,
when the metric is MAE, the per-row errors that a sum of squares cannot give.
"""

from __future__ import annotations

import math
import platform
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from service.errors import BudgetExceeded, Cancelled, InvalidData, InvalidSpec

from .basis import BasisSetting, Categories, InputScaler, n_polynomial_terms, polynomial_powers, rbf_centers
from .folds import Plan, make_plan
from .model import FittedModel, thin_residuals
from .solvers import Fit, centred_scaled, fit, leverage_factor
from .spec import TuneSpec, parse_spec
from .summaries import Summary
from .advice import data_warnings
from .table import as_columns, categorical_column, fingerprint, numeric_column, numeric_names

PLOT_SAMPLE = 5_000


@dataclass(frozen=True)
class Budget:
    """Limits checked before any work starts.

    ``max_grid_fits`` counts what a from-scratch grid search would fit: basis settings × strengths ×
    l1 ratios × splits. ``max_basis_terms`` bounds the width of one basis setting, and
    ``max_design_cells`` bounds rows × basis terms (the memory of one expanded design, 8 bytes a cell).
    """

    max_grid_fits: int = 2_000_000
    max_basis_terms: int = 4_000
    max_design_cells: int = 400_000_000


@dataclass
class Prepared:
    cols: dict[str, np.ndarray]
    features: list[str]
    X: np.ndarray
    y: np.ndarray
    categories: Categories
    cat_block: np.ndarray
    groups: np.ndarray | None
    order: np.ndarray | None
    used: list[str]
    keys: np.ndarray | None = None


@dataclass
class TuneResult:
    spec: TuneSpec
    best: dict[str, Any]
    one_standard_error: dict[str, Any]
    best_mean: dict[str, Any]
    cv_table: list[dict[str, Any]]
    model: FittedModel
    folds: np.ndarray
    path: dict[str, Any]
    warnings: list[str]
    oof_predictions: np.ndarray
    oof_observed: np.ndarray
    oof_residuals: np.ndarray
    fingerprint: dict[str, Any]
    summary: dict[str, Any] = field(default_factory=dict)

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
            "chosen": self.best,
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
        return body, arrays


def load_model(manifest_body: dict[str, Any], arrays: dict[str, np.ndarray]) -> FittedModel:
    """Rebuild the fitted model of a stored version (no stored code is executed)."""
    return FittedModel.from_parts(manifest_body["model"], arrays)


# ---------------------------------------------------------------------------------------------------
def prepare(data: Any, spec: TuneSpec) -> Prepared:
    cols = as_columns(data)
    n = len(next(iter(cols.values()))) if cols else 0
    if n == 0:
        raise InvalidData("the data has no rows; send at least a few rows per fold")
    schema = {c: "number" if v.dtype.kind in "biuf" else "text" for c, v in cols.items()}
    features, used = resolve_columns(spec, schema)
    y = numeric_column(cols, spec.target, "target")
    if np.ptp(y) == 0:
        raise InvalidData(f"target column {spec.target!r} is constant ({y[0]:g}); there is nothing to learn — "
                          "check that the right column is named as target")
    X = np.column_stack([numeric_column(cols, f, "feature") for f in features]) if features else np.zeros((n, 0))
    cat_cols = [categorical_column(cols, c) for c in spec.categorical]
    categories = Categories.fit(spec.categorical, cat_cols)
    cat_block, _ = categories.encode(cat_cols) if cat_cols else (np.zeros((n, 0)), [])
    groups = order = None
    if spec.cv.scheme == "grouped":
        groups = categorical_column(cols, spec.cv.group_by)
    if spec.cv.scheme == "time_ordered":
        raw = cols[spec.cv.order_by]
        order = raw if raw.dtype.kind in "biufM" else np.asarray(raw).astype(str)
    keys = cols[spec.cv.row_key] if spec.cv.row_key else None
    return Prepared(cols, features, X, y, categories, cat_block, groups, order, used, keys)


def resolve_columns(spec: TuneSpec, schema: dict[str, str]) -> tuple[list[str], list[str]]:
    """(features, every column used) for a table whose columns are ``schema`` (name → "number" or
    "text"). The default features are all numeric columns that have no other role."""
    def unknown(field_name: str, value: Any, what: str) -> InvalidSpec:
        return InvalidSpec(f"{what} {value!r} {'are' if isinstance(value, list) else 'is'} not in the data; "
                           f"columns present: {sorted(schema)[:20]}",
                           errors=[{"field": field_name, "value": value, "message": "unknown column"}])

    if spec.target not in schema:
        raise unknown("target", spec.target, "target column")
    special = {spec.target, *spec.categorical, spec.cv.group_by, spec.cv.order_by, spec.cv.row_key}
    if spec.features is None:
        features = [c for c, kind in schema.items() if kind == "number" and c not in special]
    else:
        missing = [f for f in spec.features if f not in schema]
        if missing:
            raise unknown("features", missing, "features")
        features = list(spec.features)
    missing = [c for c in spec.categorical if c not in schema]
    if missing:
        raise unknown("categorical", missing, "categorical columns")
    for field_name in ("group_by", "order_by", "row_key"):
        col = getattr(spec.cv, field_name)
        if col and col not in schema:
            raise unknown(f"cv.{field_name}", col, f"cv.{field_name} column")
    if not features and not spec.categorical:
        raise InvalidSpec("no feature columns: the data has no numeric column besides the target; "
                          "name features or categorical columns")
    if not features and any(b.kind != "linear" for b in spec.bases):
        raise InvalidSpec("polynomial and rbf bases need at least one numeric feature")
    columns = [spec.target, *features, *spec.categorical]
    for extra in (spec.cv.group_by, spec.cv.order_by, spec.cv.row_key):
        if extra and extra not in columns:
            columns.append(extra)
    return features, columns


def basis_settings(spec: TuneSpec, Xs: np.ndarray, keys: np.ndarray | None = None,
                   centers_from=None) -> list[BasisSetting]:
    """The grid of basis settings. ``centers_from(count)`` may supply RBF centres (streaming)."""
    d = Xs.shape[1]
    out: list[BasisSetting] = []
    for b in spec.bases:
        if b.kind == "linear":
            out.append(BasisSetting("linear"))
        elif b.kind == "polynomial":
            for deg in b.degrees:
                out.append(BasisSetting("polynomial", degree=deg, powers=polynomial_powers(d, deg)))
        else:
            centers = centers_from(b.centers) if centers_from else rbf_centers(Xs, b.centers, spec.cv.seed, keys)
            for w in b.widths:
                out.append(BasisSetting("rbf", width=float(w), centers=centers))
    return out


def basis_width(spec: TuneSpec, d: int, n: int) -> list[tuple[str, int]]:
    out = []
    for b in spec.bases:
        if b.kind == "linear":
            out.append(("linear", d))
        elif b.kind == "polynomial":
            out += [(f"polynomial degree {deg}", n_polynomial_terms(d, deg)) for deg in b.degrees]
        else:
            out += [(f"rbf width {w:g}", min(b.centers, n)) for w in b.widths]
    return out


def check_budget(spec: Any, n_rows: int, n_features: int, budget: Budget | None = None,
                 n_category_columns: int = 0, rows_in_memory: int | None = None) -> dict[str, int]:
    """Refuse, before any work, a grid or a basis that exceeds the budget. Returns the counts.
    ``rows_in_memory`` is how many rows are expanded at once (all of them, or one batch when streaming)."""
    spec = parse_spec(spec)
    budget = budget or Budget()
    widths = basis_width(spec, n_features, n_rows)
    n_strengths = len(spec.penalty.strength_grid())
    n_ratios = len(spec.penalty.ratio_grid())
    if spec.cv.scheme == "loo":
        n_splits = n_rows
    elif spec.cv.scheme == "repeated_kfold":
        n_splits = spec.cv.folds * spec.cv.repeats
    else:
        n_splits = spec.cv.folds
    fits = len(widths) * n_strengths * n_ratios * n_splits
    if fits > budget.max_grid_fits:
        raise BudgetExceeded(
            f"the grid asks for {fits:,} fits ({len(widths)} basis settings × {n_strengths} strengths × "
            f"{n_ratios} l1 ratios × {n_splits} splits), above the limit of {budget.max_grid_fits:,}; "
            "use fewer strengths, degrees, widths or folds",
            errors=[{"field": "penalty.strengths", "value": n_strengths, "message": "grid too large"}],
            limit="max_grid_fits")
    label, widest = max(widths, key=lambda t: t[1])
    widest += n_category_columns
    if widest > budget.max_basis_terms:
        raise BudgetExceeded(
            f"{label} has {widest:,} basis terms for {n_features} features, above the limit of "
            f"{budget.max_basis_terms:,}; use a lower degree, fewer features or fewer RBF centres",
            errors=[{"field": "bases", "value": label, "message": "basis too wide"}], limit="max_basis_terms")
    held = n_rows if rows_in_memory is None else min(n_rows, rows_in_memory)
    if widest * held > budget.max_design_cells:
        fix = ("use smaller execution.batch_rows or a narrower basis" if rows_in_memory is not None else
               "train on fewer rows (or out of core: execution.mode streaming) or a narrower basis")
        raise BudgetExceeded(
            f"{label} on {held:,} rows makes a {held:,} × {widest:,} design, above the limit of "
            f"{budget.max_design_cells:,} cells; {fix}",
            errors=[{"field": "bases", "value": label, "message": "design too large"}], limit="max_design_cells")
    return {"fits": fits, "basis_settings": len(widths), "splits": n_splits, "widest_basis": widest}


# ---------------------------------------------------------------------------------------------------
def tune(data: Any, spec: Any, *, progress: Callable[[int, int], None] | None = None,
         should_stop: Callable[[], bool] | None = None, budget: Budget | None = None) -> TuneResult:
    """Choose basis setting and penalty strength jointly by cross-validation, then refit on all rows."""
    spec = parse_spec(spec)
    prep = prepare(data, spec)
    n, d = prep.X.shape
    check_budget(spec, n, d, budget, prep.categories.width)
    scaler = InputScaler.fit(prep.features, prep.X)
    Xs = scaler.transform(prep.X)
    settings = basis_settings(spec, Xs, prep.keys)
    strengths = spec.penalty.strength_grid()
    ratios = spec.penalty.ratio_grid()
    metric = spec.selection.metric

    if spec.cv.scheme == "loo":
        search = _LooSearch(spec, prep, Xs, settings, strengths)
    elif spec.basis_fit == "per_fold":
        plan = make_plan(spec.cv, n, prep.groups, prep.order, prep.keys)
        search = _PerFoldSearch(spec, prep, settings, strengths, ratios, plan)
    else:
        plan = make_plan(spec.cv, n, prep.groups, prep.order, prep.keys)
        search = _SharedSearch(spec, prep, Xs, settings, strengths, ratios, plan)

    total = len(settings) * search.units_per_setting
    done = 0
    rows: list[dict[str, Any]] = []
    for s_idx, setting in enumerate(settings):
        for values, extra in search.evaluate(s_idx, setting):
            # values: (n_ratios, L, n_splits) metric per split
            rows.extend(_table_rows(s_idx, setting, strengths, ratios, values, extra))
        done += search.units_per_setting
        if progress:
            progress(done, total)
        if should_stop and should_stop():
            raise Cancelled("the training job was cancelled")

    if not rows:
        raise InvalidSpec("the grid is empty")
    chosen_idx, best_idx, onese_idx = _select(rows, settings, spec, search.n_splits)
    chosen = rows[chosen_idx]
    s_idx = chosen["_setting"]
    setting = settings[s_idx]
    ratio = chosen["l1_ratio"]
    model, path, oof_pred, oof_res = search.refit(s_idx, setting, chosen["strength"], ratio, strengths, scaler, chosen)
    warnings = _edge_warnings(spec, settings, rows, chosen, strengths) + data_warnings(
        spec, {c: "number" if v.dtype.kind in "biuf" else "text" for c, v in prep.cols.items()}, prep.used, int(n),
        search.n_splits, len(model.term_names))
    table = [{k: v for k, v in r.items() if not k.startswith("_")} for r in rows]
    public = lambda r: {"basis": r["basis"], "penalty": {"kind": spec.penalty.kind, "strength": r["strength"],
                        "l1_ratio": r["l1_ratio"]}, "metric": metric, "mean": r["mean"], "std": r["std"],
                        "index": rows.index(r)}
    best = public(chosen) | {"rule": spec.selection.rule}
    summary = {"metric": metric, "rule": spec.selection.rule, "scheme": spec.cv.scheme, "splits": search.n_splits,
               "mean": chosen["mean"], "std": chosen["std"], "rows": int(n),
               "basis_settings": len(settings), "strengths": int(strengths.size), "l1_ratios": len(ratios),
               "candidates": len(rows),
               "python": platform.python_version()}
    model.cv = {"metric": metric, "mean": chosen["mean"], "std": chosen["std"], "folds": search.n_splits,
                "scheme": spec.cv.scheme, "rule": spec.selection.rule}
    fp = fingerprint(prep.cols, prep.used)
    return TuneResult(spec=spec, best=best, one_standard_error=public(rows[onese_idx]),
                      best_mean=public(rows[best_idx]), cv_table=table, model=model,
                      folds=search.assignment, path=path, warnings=warnings, oof_predictions=oof_pred,
                      oof_observed=prep.y, oof_residuals=oof_res, fingerprint=fp, summary=summary)


# ---------------------------------------------------------------------------------------------------
def _table_rows(s_idx: int, setting: BasisSetting, strengths: np.ndarray, ratios: list[float | None],
                values: np.ndarray, extra: dict[str, np.ndarray] | None) -> list[dict[str, Any]]:
    """One row per (l1 ratio, strength). ``std`` is the population std over splits, as GridSearchCV's
    ``std_test_score``; the loo scheme supplies its own (``_std``) and no per-split list."""
    rows = []
    extra = extra or {}
    for r_i, ratio in enumerate(ratios):
        for l_i, lam in enumerate(strengths):
            v = values[r_i, l_i]
            row = {"basis": setting.describe(), "strength": float(lam), "l1_ratio": ratio,
                   "mean": float(np.mean(v)), "std": float(np.std(v)), "folds": [float(x) for x in v]}
            if "_std" in extra:
                row["std"] = float(extra["_std"][r_i, l_i])
                row["folds"] = None
            for key, arr in extra.items():
                if not key.startswith("_"):
                    row[key] = float(arr[r_i, l_i])
            row["_setting"] = s_idx
            rows.append(row)
    return rows


def _select(rows: list[dict[str, Any]], settings: list[BasisSetting], spec: TuneSpec, n_splits: int
            ) -> tuple[int, int, int]:
    """(chosen, best mean, one-standard-error) indices into rows.

    One-standard-error rule (Hastie, Tibshirani & Friedman, ESL section 7.10): among candidates whose
    mean CV error is within one standard error (std over splits / √splits) of the best, take the
    simplest: the largest strength, then the simplest basis (linear, then lower polynomial degree,
    then the widest RBF), then the largest l1 ratio.
    """
    sign = -1.0 if spec.selection.metric == "r2" else 1.0
    score = np.array([sign * r["mean"] for r in rows])
    if not np.isfinite(score).any():
        raise InvalidData("every candidate's CV score is undefined (NaN); the folds may be too small")
    score = np.where(np.isfinite(score), score, np.inf)
    best = int(np.argmin(score))
    se = rows[best]["std"] / math.sqrt(max(1, n_splits))
    within = [i for i in range(len(rows)) if score[i] <= score[best] + se]
    key = lambda i: (-rows[i]["strength"], settings[rows[i]["_setting"]].complexity(), -(rows[i]["l1_ratio"] or 0.0))
    onese = min(within, key=key)
    chosen = onese if spec.selection.rule == "one_standard_error" else best
    return chosen, best, onese


def _edge_warnings(spec: TuneSpec, settings: list[BasisSetting], rows: list[dict[str, Any]], chosen: dict[str, Any],
                   strengths: np.ndarray) -> list[str]:
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


def _design(setting: BasisSetting, Xs: np.ndarray, cat_block: np.ndarray) -> np.ndarray:
    Phi = setting.expand(Xs)
    if cat_block.shape[1]:
        Phi = np.hstack([Phi, cat_block])
    return Phi


def _metric_from_sse(metric: str, sse: np.ndarray, n_rows: int, sst: float) -> np.ndarray:
    if metric == "rmse":
        return np.sqrt(sse / n_rows)
    if metric == "r2":
        with np.errstate(divide="ignore", invalid="ignore"):
            return 1.0 - sse / sst if sst > 0 else np.full_like(sse, np.nan)
    raise ValueError(metric)


def _ranges(prep: Prepared) -> dict[str, list[float]]:
    return {f: [float(prep.X[:, j].min()), float(prep.X[:, j].max())] for j, f in enumerate(prep.features)}


def _model(prep: Prepared, spec: TuneSpec, scaler: InputScaler, setting: BasisSetting, full_summary: Summary,
           full: Fit, l_idx: int,
           strength: float, ratio: float | None, Phi: np.ndarray, fold_fits: list[Fit] | None,
           oof_abs: np.ndarray, oof_fold: np.ndarray) -> FittedModel:
    """Assemble the fitted model from the refit (at index l_idx of its strength grid)."""
    beta = full.beta[l_idx]
    Z = (Phi - full.mean) / full.scale
    Zblock = centred_scaled(full_summary)[0]
    F = leverage_factor(Zblock, strength, spec.penalty.kind, ratio, full.n, beta)
    FZ = Z @ F.T
    lev = 1.0 / full.n + np.einsum("ij,ij->i", FZ, FZ)
    finite = np.isfinite(oof_abs)
    res, res_fold, g = thin_residuals(oof_abs[finite], oof_fold[finite])
    fw = fi = None
    if fold_fits is not None:
        fw = np.vstack([f.weights[0] for f in fold_fits])
        fi = np.array([f.intercept[0] for f in fold_fits])
    else:
        res_fold = np.full(res.size, -1, dtype=np.int64)
    names = setting.term_names(prep.features) + prep.categories.term_names()
    return FittedModel(
        target=spec.target, features=list(prep.features), scaler=scaler, basis=setting, categories=prep.categories,
        column_mean=full.mean, column_scale=full.scale, beta=beta, intercept=float(full.intercept[l_idx]),
        penalty={"kind": spec.penalty.kind, "strength": float(strength), "l1_ratio": ratio},
        n_train=full.n, ranges=_ranges(prep), leverage_factor=F, max_leverage=float(lev.max()),
        fold_weights=fw, fold_intercepts=fi, residuals=res, residual_fold=res_fold, residual_weight=g,
        term_names=names,
    )


def _path(full: Fit, strengths: np.ndarray, strength: float, names: list[str], kind: str) -> dict[str, Any]:
    return {"strengths": strengths.tolist(), "coefficients": full.beta.tolist(), "terms": names,
            "chosen_strength": float(strength), "df": full.effective_df().tolist() if kind == "l2" else None}


def score_splits(atoms: list[Summary], splits: list[tuple[list[int], list[int]]], spec: TuneSpec,
                 strengths: np.ndarray, ratios: list[float | None], mae_rows=None
                 ) -> tuple[np.ndarray, list[list[Fit]]]:
    """Metric per (l1 ratio, strength, split) from atom summaries, and the fits of every split.

    RMSE and R² come from the validation atoms' summaries alone; MAE needs the rows, through
    ``mae_rows(test_ids, fit) -> (L,)`` (or NaN placeholders, filled later by a streaming pass)."""
    metric = spec.selection.metric
    values = np.empty((len(ratios), strengths.size, len(splits)))
    all_fits = []
    for j, (train_ids, test_ids) in enumerate(splits):
        train = Summary.combine([atoms[i] for i in train_ids])
        fits = [fit(train, spec.penalty.kind, strengths, r) for r in ratios]
        all_fits.append(fits)
        test = Summary.combine([atoms[i] for i in test_ids])
        for r_i, f in enumerate(fits):
            if metric == "mae":
                values[r_i, :, j] = mae_rows(test_ids, f) if mae_rows else np.nan
            else:
                sse = test.sse(f.residual_operator())
                values[r_i, :, j] = _metric_from_sse(metric, sse, test.n, test.total_ss())
    return values, all_fits


class _SharedSearch:
    """Basis fixed from all rows; one summary per atom per basis setting.

    Linear and polynomial settings are nested (PolynomialFeatures orders monomials by degree, and
    the linear basis is its first block), so they share one pass: the atoms of the highest degree are
    summarized once, with the one-hot columns placed first, and every lower degree's summaries are
    leading blocks of those (``Summary.leading``). The refit reorders the chosen setting's summaries
    into the model's own column order (``Summary.permuted``) without reading the rows again.
    """

    def __init__(self, spec, prep, Xs, settings, strengths, ratios, plan: Plan):
        self.spec, self.prep, self.Xs, self.settings = spec, prep, Xs, settings
        self.strengths, self.ratios, self.plan = strengths, ratios, plan
        self.units_per_setting = plan.n_splits
        self.n_splits = plan.n_splits
        self.assignment = plan.assignment
        nested = [s for s in settings if s.kind in ("linear", "polynomial")]
        d = prep.X.shape[1]
        self._nested_top = max(nested, key=lambda s: s.n_terms(d)) if nested else None
        self._nested: tuple[np.ndarray, list[Summary]] | None = None

    def _atoms(self, setting: BasisSetting) -> tuple[np.ndarray, list[Summary]]:
        """(design in the summaries' column order, summaries of each atom) for one setting."""
        y = self.prep.y
        if setting.kind in ("linear", "polynomial"):
            if self._nested is None:
                top = self._nested_top
                D = np.hstack([self.prep.cat_block, top.expand(self.Xs)])
                self._nested = (D, [Summary.of(D[idx], y[idx]) for idx in self.plan.atoms])
            D, atoms = self._nested
            if D is None:  # asked again after the design was freed (the refit): summaries only
                D = np.hstack([self.prep.cat_block, self._nested_top.expand(self.Xs)])
            k = 1 + self.prep.categories.width + setting.n_terms(self.prep.X.shape[1])
            return D[:, :k - 1], [a.leading(k) for a in atoms]
        D = _design(setting, self.Xs, self.prep.cat_block)
        return D, [Summary.of(D[idx], y[idx]) for idx in self.plan.atoms]

    def evaluate(self, s_idx: int, setting: BasisSetting):
        D, atoms = self._atoms(setting)
        y = self.prep.y
        mae_rows = None
        if self.spec.selection.metric == "mae":
            def mae_rows(test_ids: list[int], f: Fit) -> np.ndarray:
                rows = np.concatenate([self.plan.atoms[i] for i in test_ids])
                return np.abs(y[rows, None] - f.intercept[None, :] - D[rows] @ f.weights.T).mean(axis=0)
        values, _ = score_splits(atoms, self.plan.splits, self.spec, self.strengths, self.ratios, mae_rows)
        if self._nested is not None and all(s.kind == "rbf" for s in self.settings[s_idx + 1:]):
            self._nested = (None, self._nested[1])  # free the largest design once no nested setting is left
        yield values, None

    def refit(self, s_idx, setting, strength, ratio, strengths, scaler, chosen):
        plan = self.plan
        y = self.prep.y
        Phi = _design(setting, self.Xs, self.prep.cat_block)
        if setting.kind in ("linear", "polynomial"):
            # the nested summaries already hold this setting: reorder [1, one-hot, Φ, y] → [1, Φ, one-hot, y]
            _, atoms = self._nested
            q, p = self.prep.categories.width, setting.n_terms(self.prep.X.shape[1])
            order = [0, *range(1 + q, 1 + q + p), *range(1, 1 + q), 1 + q + p]
            atoms = [a.leading(1 + q + p) for a in atoms]
            if q:
                atoms = [a.permuted(order) for a in atoms]
        else:
            atoms = [Summary.of(Phi[idx], y[idx]) for idx in plan.atoms]
        full_summary = Summary.combine([atoms[i] for i in plan.refit_atoms])
        full = fit(full_summary, self.spec.penalty.kind, strengths, ratio)
        l_idx = int(np.flatnonzero(strengths == strength)[0])
        n = y.size
        oof_pred = np.full(n, np.nan)
        oof_fold = np.full(n, -1, dtype=np.int64)
        fold_fits = []
        for j in plan.interval_splits:
            train_ids, test_ids = plan.splits[j]
            f = fit(Summary.combine([atoms[i] for i in train_ids]), self.spec.penalty.kind,
                    np.array([strength]), ratio)
            fold_fits.append(f)
            rows = np.concatenate([plan.atoms[i] for i in test_ids])
            oof_pred[rows] = f.intercept[0] + Phi[rows] @ f.weights[0]
            oof_fold[rows] = len(fold_fits) - 1
        oof_abs = np.abs(y - oof_pred)
        model = _model(self.prep, self.spec, scaler, setting, full_summary, full, l_idx, strength, ratio, Phi, fold_fits,
                       oof_abs, oof_fold)
        path = _path(full, strengths, strength, model.term_names, self.spec.penalty.kind)
        return model, path, oof_pred, y - oof_pred


class _PerFoldSearch(_SharedSearch):
    """``basis_fit: per_fold``: the input scaling and RBF centres are refit inside every split."""

    def __init__(self, spec, prep, settings, strengths, ratios, plan):
        super().__init__(spec, prep, None, settings, strengths, ratios, plan)
        self.oof: dict[int, np.ndarray] = {}

    def _split_design(self, setting: BasisSetting, train_rows: np.ndarray):
        sc = InputScaler.fit(self.prep.features, self.prep.X[train_rows])
        Xs = sc.transform(self.prep.X)
        if setting.kind == "rbf":
            keys = None if self.prep.keys is None else self.prep.keys[train_rows]
            centers = rbf_centers(Xs[train_rows], setting.centers.shape[0], self.spec.cv.seed, keys)
            setting = BasisSetting("rbf", width=setting.width, centers=centers)
        elif setting.kind == "polynomial":
            setting = BasisSetting("polynomial", degree=setting.degree, powers=setting.powers)
        return _design(setting, Xs, self.prep.cat_block)

    def evaluate(self, s_idx, setting):
        y = self.prep.y
        metric = self.spec.selection.metric
        values = np.empty((len(self.ratios), self.strengths.size, self.plan.n_splits))
        for j, (train_ids, test_ids) in enumerate(self.plan.splits):
            tr = np.concatenate([self.plan.atoms[i] for i in train_ids])
            te = np.concatenate([self.plan.atoms[i] for i in test_ids])
            Phi = self._split_design(setting, tr)
            train = Summary.of(Phi[tr], y[tr])
            test = Summary.of(Phi[te], y[te])
            for r_i, ratio in enumerate(self.ratios):
                f = fit(train, self.spec.penalty.kind, self.strengths, ratio)
                if metric == "mae":
                    resid = y[te, None] - f.intercept[None, :] - Phi[te] @ f.weights.T
                    values[r_i, :, j] = np.abs(resid).mean(axis=0)
                else:
                    values[r_i, :, j] = _metric_from_sse(metric, test.sse(f.residual_operator()), test.n,
                                                         test.total_ss())
        yield values, None

    def refit(self, s_idx, setting, strength, ratio, strengths, scaler, chosen):
        y = self.prep.y
        n = y.size
        oof_pred = np.full(n, np.nan)
        for j in self.plan.interval_splits:
            train_ids, test_ids = self.plan.splits[j]
            tr = np.concatenate([self.plan.atoms[i] for i in train_ids])
            te = np.concatenate([self.plan.atoms[i] for i in test_ids])
            Phi = self._split_design(setting, tr)
            f = fit(Summary.of(Phi[tr], y[tr]), self.spec.penalty.kind, np.array([strength]), ratio)
            oof_pred[te] = f.intercept[0] + Phi[te] @ f.weights[0]
        Xs = scaler.transform(self.prep.X)
        Phi = _design(setting, Xs, self.prep.cat_block)
        full_summary = Summary.of(Phi, y)
        full = fit(full_summary, self.spec.penalty.kind, strengths, ratio)
        l_idx = int(np.flatnonzero(strengths == strength)[0])
        oof_abs = np.abs(y - oof_pred)
        model = _model(self.prep, self.spec, scaler, setting, full_summary, full, l_idx, strength, ratio, Phi, None,
                       oof_abs, np.zeros(n, dtype=np.int64))
        path = _path(full, strengths, strength, model.term_names, self.spec.penalty.kind)
        return model, path, oof_pred, y - oof_pred


class _LooSearch:
    """Exact leave-one-out for L2 by the hat-matrix closed form, with GCV alongside.

    The design's column scaling is fixed from all rows (the closed form needs a fixed design); the
    intercept is refit, unpenalized, in every leave-one-out fit. With ``H = 11ᵀ/n + Z(ZᵀZ + λI)⁻¹Zᵀ``
    the leave-one-out residual is ``eᵢ / (1 − hᵢᵢ)`` (Hastie, Tibshirani & Friedman, ESL eq. 7.64;
    exact for any linear smoother of this penalized form). GCV replaces hᵢᵢ by tr(H)/n (ESL eq. 7.52).
    """

    units_per_setting = 1

    def __init__(self, spec, prep, Xs, settings, strengths):
        self.spec, self.prep, self.Xs, self.settings, self.strengths = spec, prep, Xs, settings, strengths
        n = prep.y.size
        self.n_splits = n
        self.assignment = np.arange(n)
        self.loo: dict[int, np.ndarray] = {}

    def evaluate(self, s_idx, setting):
        y = self.prep.y
        n = y.size
        Phi = _design(setting, self.Xs, self.prep.cat_block)
        full = fit(Summary.of(Phi, y), "l2", self.strengths, None)
        Z = (Phi - full.mean) / full.scale
        s, Vt = full.singular, full.right
        Urows = (Z @ Vt.T) / s[None, :]  # rows of the left singular vectors of Z
        s2 = s ** 2
        shrink = s2[None, :] / (s2[None, :] + self.strengths[:, None])  # (L, r)
        H = 1.0 / n + (Urows ** 2) @ shrink.T  # (n, L)
        fitted = full.intercept[None, :] + Phi @ full.weights.T  # (n, L)
        e = y[:, None] - fitted
        loo = e / (1.0 - H)
        self.loo[s_idx] = loo
        metric = self.spec.selection.metric
        sst = float(np.sum((y - y.mean()) ** 2))
        if metric == "rmse":
            mean = np.sqrt(np.mean(loo ** 2, axis=0))
            # delta method: se(RMSE) ≈ sd(e²) / (2 RMSE √n); reported as std = se · √n
            std = np.std(loo ** 2, axis=0) / (2 * np.maximum(mean, 1e-300))
        elif metric == "mae":
            mean = np.mean(np.abs(loo), axis=0)
            std = np.std(np.abs(loo), axis=0)
        else:
            mean = 1.0 - np.sum(loo ** 2, axis=0) / sst
            std = np.std(loo ** 2, axis=0) * n / sst
        df = full.effective_df() + 1.0
        rss = np.sum(e ** 2, axis=0)
        gcv = (rss / n) / (1.0 - df / n) ** 2
        L = self.strengths.size
        values = np.empty((1, L, 1))
        values[0, :, 0] = mean
        yield values, {"gcv": gcv[None, :], "df": df[None, :], "_std": std[None, :]}

    def refit(self, s_idx, setting, strength, ratio, strengths, scaler, chosen):
        y = self.prep.y
        Phi = _design(setting, self.Xs, self.prep.cat_block)
        full_summary = Summary.of(Phi, y)
        full = fit(full_summary, "l2", strengths, None)
        l_idx = int(np.flatnonzero(strengths == strength)[0])
        loo = self.loo[s_idx][:, l_idx]
        oof_pred = y - loo
        model = _model(self.prep, self.spec, scaler, setting, full_summary, full, l_idx, strength, None, Phi, None,
                       np.abs(loo), np.zeros(y.size, dtype=np.int64))
        path = _path(full, strengths, strength, model.term_names, "l2")
        return model, path, oof_pred, loo
