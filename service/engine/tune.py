"""Joint cross-validated search over basis setting × penalty strength (× l1 ratio).

One pass over the rows per basis setting: the basis columns are expanded once, each fold's rows are
reduced to an R-factor summary (see ``summaries``), and everything else — every strength, every fold,
the refit and the regularization path — is small algebra on those summaries. A second look at the
rows of the chosen setting only gives out-of-fold residuals (for intervals), training leverages and,
when the metric is MAE, the per-row errors that a sum of squares cannot give.
"""

from __future__ import annotations

import math
import threading
from contextlib import nullcontext
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from service.errors import BudgetExceeded, Cancelled, InvalidData, InvalidSpec

from .basis import (BasisSetting, Categories, InputScaler, check_rbf_width, n_polynomial_terms, polynomial_powers,
                    rbf_centers, sample_rows)
from .folds import Plan, make_plan, order_key
from .parallel import ordered_map, single_blas, usable_cores
from .model import FittedModel, thin_residuals
from .result import (TuneResult, build_model, check_numeric_text, check_spread, column_kind, fingerprint_columns,
                     fingerprint_of, label_columns, unclaimed_text, finish, metric_value, refit_all_rows, score_splits, select, setting_df, table_rows,
                     NestedSplits)
from .solvers import Fit, convergence_warnings, fit, leverage_triangle, row_leverages, watch_convergence
from .spec import TuneSpec, parse_spec
from .summaries import CHUNK_ROWS, Summary
from .advice import data_warnings
from . import blas3, continued, orthobasis
from .table import as_columns, categorical_column, key_column, numeric_column

ONE_HOT_AS_LEVEL_SUMS = True  # the first categorical column enters the summaries as level sums (``Summary.of_grouped``)
LEVERAGE_ONE = 1e-10  # a row with hᵢᵢ ≥ 1 − this has leverage 1: its leave-one-out error needs a refit
MAX_LOO_REFIT_FLOPS = 2e10
BATCH_SCORING_FLOPS = 3e9  # a nested group's small algebra up to which it is scored all at once (``_score_nested``)
FOLD_PATHS_KEEP_BYTES = 64 << 20  # the scoring's L2 fold fits kept for the refit, over every setting
GRAM_MIN_ROWS = 10_000  # rows from which a nested polynomial group's atoms are summarized by Gram matrices
GRAM_SAMPLE_ROWS = 50_000  # rows (evenly spaced) its well-conditioned basis is made from (``orthobasis.build``)
GRAM_THREADS_EXPAND_FROM = 200_000  # rows from which each thread expands its own chunks too (``_gram_summaries``)
SCREEN_MIN_ROWS = 100_000  # rows from which the refit screens rows for the largest leverage (``_leverage_screen``)
SCREEN_SAMPLE_ROWS = 16_384  # evenly spaced training rows whose exact leverages are the screen's floor


@dataclass(frozen=True)
class Budget:
    """Limits checked before any work starts.

    ``max_grid_fits`` counts what a from-scratch grid search would fit: basis settings × strengths ×
    l1 ratios × splits. ``max_basis_terms`` bounds the width of one basis setting, and
    ``max_design_cells`` bounds rows × basis terms (the memory of one expanded design, 8 bytes a cell).
    ``max_levels`` bounds the levels of each categorical column; it is checked in ``prepare`` before
    the one-hot block (rows × levels) is built. ``max_job_cost`` bounds ``estimate_cost``: the grid count
    alone says nothing of what one fit costs (two fits of a 4,000-centre RBF basis on 20,000 rows are
    hours of a small host's time).
    """

    max_grid_fits: int = 2_000_000
    max_basis_terms: int = 4_000
    max_design_cells: int = 400_000_000
    max_levels: int = 1_000  # distinct levels of one categorical column, counted before one-hot expansion
    max_job_cost: float = 2e11  # estimated floating-point operations of the whole job (``estimate_cost``)
    max_summary_bytes: int = 64 * 2**20  # per-fold summaries a version keeps for continued training (``continued``)


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
    w: np.ndarray | None = None  # (n,) row weights, or None (every row weighs 1)

    def rows_w(self, idx: np.ndarray) -> np.ndarray | None:
        return None if self.w is None else self.w[idx]


def load_model(manifest_body: dict[str, Any], arrays: dict[str, np.ndarray]) -> FittedModel:
    """Rebuild the fitted model of a stored version (no stored code is executed)."""
    return FittedModel.from_parts(manifest_body["model"], arrays)


# ---------------------------------------------------------------------------------------------------
def check_levels(name: str, levels: int, budget: Budget, *, rows_read: int | None = None) -> None:
    """Refuse a categorical column with more than ``budget.max_levels`` levels, before any one-hot block
    exists. ``rows_read``: the count is of the first rows read so far (a streamed scan stops there)."""
    if levels > budget.max_levels:
        seen = "" if rows_read is None else f" (counted in the first {rows_read:,} rows read; there may be more)"
        raise BudgetExceeded(
            f"categorical column {name!r} has {'at least ' if seen else ''}{levels:,} distinct levels{seen}, above "
            "the limit max_levels="
            f"{budget.max_levels:,} (each level becomes a column of the design); group rare levels into one "
            "(e.g. 'other'), use an identifier column as cv.group_by or cv.row_key instead of as an input, or raise "
            "TIKHON_MAX_LEVELS on the server",
            errors=[{"field": "categorical", "value": name, "message": f"{levels} levels"}],
            limit="max_levels", allowed=budget.max_levels, received=levels)


def prepare(data: Any, spec: TuneSpec, budget: Budget | None = None) -> Prepared:
    budget = budget or Budget()
    cols = as_columns(data)
    n = len(next(iter(cols.values()))) if cols else 0
    if n == 0:
        raise InvalidData("the data has no rows; send at least a few rows per fold")
    schema = {c: column_kind(v) for c, v in cols.items()}
    features, used = resolve_columns(spec, schema)
    for c in unclaimed_text(spec, schema):
        check_numeric_text(c, cols[c])
    y = numeric_column(cols, spec.target, "target")
    if np.ptp(y) == 0:
        raise InvalidData(f"target column {spec.target!r} is constant ({y[0]:g}); there is nothing to learn — "
                          "check that the right column is named as target")
    X = np.column_stack([numeric_column(cols, f, "feature") for f in features]) if features else np.zeros((n, 0))
    check_spread(spec.target, "target", y.min(), y.max(), n)
    for j, f in enumerate(features):
        check_spread(f, "feature", X[:, j].min(), X[:, j].max(), n)
    cat_cols = [categorical_column(cols, c) for c in spec.categorical]
    for c, values in zip(spec.categorical, cat_cols):  # before any one-hot expansion
        check_levels(c, len(set(values.tolist())), budget)
    categories = Categories.fit(spec.categorical, cat_cols)
    cat_block, _ = categories.encode(cat_cols) if cat_cols else (np.zeros((n, 0)), [])
    groups = order = None
    if spec.cv.scheme == "grouped":
        groups = categorical_column(cols, spec.cv.group_by)
    if spec.cv.scheme == "time_ordered":
        order = order_key(cols[spec.cv.order_by], spec.cv.order_by)
    keys = key_column(cols, spec.cv.row_key) if spec.cv.row_key else None
    w = row_weights(cols, spec.weight) if spec.weight else None
    return Prepared(cols, features, X, y, categories, cat_block, groups, order, used, keys, w)


def row_weights(cols: dict[str, np.ndarray], name: str) -> np.ndarray:
    """The weight column as float64, refused naming the column and rows when a weight is negative, missing
    or infinite, or when every weight is zero."""
    w = numeric_column(cols, name, "weight")
    bad = np.flatnonzero(~np.isfinite(w) | (w < 0))
    if bad.size:
        rows = bad[:5].tolist()
        raise InvalidData(f"weight column {name!r} has negative, missing or infinite weights at rows {rows} "
                          f"(e.g. {w[bad[0]]!r}); weights must be finite and at least 0",
                          errors=[{"field": name, "rows": rows, "message": "weights must be finite and >= 0"}])
    positive = int(np.count_nonzero(w > 0))
    if not positive:
        raise InvalidData(f"weight column {name!r} is zero on every row; at least one row must weigh more than 0",
                          errors=[{"field": name, "message": "all weights are zero"}])
    # Weights are relative: rescaled to average 1 over the rows that weigh something, so multiplying every
    # weight by a constant changes nothing and a penalty strength means what it means without weights.
    return w * (positive / float(w.sum()))


def resolve_columns(spec: TuneSpec, schema: dict[str, str]) -> tuple[list[str], list[str]]:
    """(features, every column used) for a table whose columns are ``schema`` (name → "number", "boolean"
    or "text", see ``result.column_kind``). The default features are all numeric columns that have no
    other role."""
    def unknown(field_name: str, value: Any, what: str) -> InvalidSpec:
        return InvalidSpec(f"{what} {value!r} {'are' if isinstance(value, list) else 'is'} not in the data; "
                           f"columns present: {sorted(schema)[:20]}",
                           errors=[{"field": field_name, "value": value, "message": "unknown column"}])

    if spec.target not in schema:
        raise unknown("target", spec.target, "target column")
    special = {spec.target, *spec.categorical, spec.cv.group_by, spec.cv.order_by, spec.cv.row_key, spec.weight}
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
    if spec.weight is not None and spec.weight not in schema:
        raise unknown("weight", spec.weight, "weight column")
    if not features and not spec.categorical:
        raise InvalidSpec("no feature columns: the data has no numeric column besides the target; "
                          "name features or categorical columns")
    if not features and any(b.kind != "linear" for b in spec.bases):
        raise InvalidSpec("polynomial and rbf bases need at least one numeric feature")
    columns = [spec.target, *features, *spec.categorical]
    for extra in (spec.cv.group_by, spec.cv.order_by, spec.cv.row_key, spec.weight):
        if extra and extra not in columns:
            columns.append(extra)
    return features, columns


def basis_settings(spec: TuneSpec, Xs: np.ndarray, keys: np.ndarray | None = None,
                   centers_from=None, sample: np.ndarray | None = None) -> list[BasisSetting]:
    """The grid of basis settings. ``centers_from(count)`` may supply RBF centres (streaming).
    RBF widths are checked on ``sample`` (standardized rows; default: the k-means sample of ``Xs``)."""
    d = Xs.shape[1]
    if sample is None and any(b.kind == "rbf" for b in spec.bases):
        sample = Xs[sample_rows(Xs.shape[0], spec.cv.seed, keys)]
    out: list[BasisSetting] = []
    for i, b in enumerate(spec.bases):
        if b.kind == "linear":
            out.append(BasisSetting("linear"))
        elif b.kind == "polynomial":
            for deg in b.degrees:
                out.append(BasisSetting("polynomial", degree=deg, powers=polynomial_powers(d, deg)))
        else:
            centers = centers_from(b.centers) if centers_from else rbf_centers(Xs, b.centers, spec.cv.seed, keys)
            for w in b.widths:
                check_rbf_width(sample, centers, float(w), f"bases.{i}.widths")
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


PROGRESS_STEPS = 100  # sub-units of one (setting × split) unit in a long job's progress
PACED_STEPS = 1_000  # sub-units of one (setting × split) unit when tune is given a progress_span
PROGRESS_DETAIL_FLOPS = 1e10  # a job estimated above this reports progress inside basis settings
L1_SWEEPS = 50  # coordinate-descent sweeps assumed per strength (and l1 ratio) in the cost estimate


def estimate_cost(spec: Any, n_rows: int, n_features: int, n_category_columns: int = 0) -> dict[str, Any]:
    """Floating-point operations a job will take, estimated from its shape before any work (orders of
    magnitude, not a timing): per basis setting of width p (one-hot columns included), with r = min(n, p),
    the pass over the rows, n·p·r (QR of the design; RBF adds n·centres·d for the distances;
    ``per_fold`` repeats it per split), and per split the factorization r²·p plus the solutions for
    every strength, L·r·p for L2 and L·R·r·p·L1_SWEEPS for the L1 penalties (R l1 ratios). The ``loo``
    scheme is one pass and one factorization per setting plus n·L·p for the hat-matrix diagonals. Polynomial degrees and the linear
    basis share one pass (the widest). Returns ``{"flops", "largest": (label, flops)}``."""
    spec = parse_spec(spec)
    n, d, q = int(n_rows), int(n_features), int(n_category_columns)
    L = len(spec.penalty.strength_grid())
    R = len(spec.penalty.ratio_grid())
    sweeps = 1 if spec.penalty.kind == "l2" else L1_SWEEPS
    splits = spec.cv.folds * (spec.cv.repeats if spec.cv.scheme == "repeated_kfold" else 1)
    widths = basis_width(spec, d, n)
    nested = max((p for label, p in widths if not label.startswith("rbf")), default=0)
    total = 0.0
    largest = ("", -1.0)
    splits = min(splits, n)
    for label, p in widths:
        p += q
        r = float(min(n, p))  # a factorization of a wide design costs min(n, p)² · p
        if spec.cv.scheme == "loo":
            cost = float(n) * p * r + r * r * p + float(n) * L * p
        else:
            shared = label.startswith("rbf") or p - q == nested
            rows = float(n) * p * r * (splits if spec.basis_fit == "per_fold" else 1) if shared else 0.0
            if label.startswith("rbf"):
                rows += float(n) * (p - q) * max(1, d)
            cost = rows + splits * (r * r * p + float(L) * R * r * p * sweeps)
        total += cost
        if cost > largest[1]:
            largest = (label, cost)
    return {"flops": total, "largest": largest}


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
    cost = estimate_cost(spec, n_rows, n_features, n_category_columns)
    if cost["flops"] > budget.max_job_cost:
        label, part = cost["largest"]
        raise BudgetExceeded(
            f"the job is estimated at {cost['flops']:.3g} floating-point operations, above the limit max_job_cost="
            f"{budget.max_job_cost:.3g}; the largest part is {label} ({part:.3g}: rows × width² per pass, width³ and "
            f"strengths × width² per split): use fewer RBF centres or a lower degree, fewer rows, strengths or "
            f"folds, or raise TIKHON_MAX_JOB_COST on the server",
            errors=[{"field": "bases", "value": label, "message": "job too costly"}], limit="max_job_cost",
            allowed=budget.max_job_cost, received=cost["flops"])
    return {"fits": fits, "basis_settings": len(widths), "splits": n_splits, "widest_basis": widest,
            "cost_flops": float(cost["flops"])}


# ---------------------------------------------------------------------------------------------------
def tune(data: Any, spec: Any, *, progress: Callable[[int, int], None] | None = None,
         should_stop: Callable[[], bool] | None = None, budget: Budget | None = None,
         progress_span: Callable[[int, int], None] | None = None, basis=None) -> TuneResult:
    """Choose basis setting and penalty strength jointly by cross-validation, then refit on all rows.

    ``data``: dict name → 1-D array (n,), pandas DataFrame or pyarrow Table. ``spec``: dict or ``TuneSpec``.
    ``progress(done, total)`` is called after each (basis setting × fold) unit; ``should_stop()`` returning
    True raises ``Cancelled``; ``budget`` bounds the work (``Budget``). ``progress_span(start, end)``, if
    given, is called as each basis setting starts: progress stays in ``[start, end)`` until that setting
    is done (the worker moves its shown progress inside that span between the engine's reports); with it,
    every job counts ``PACED_STEPS`` sub-units per unit. ``basis``: a fixed basis definition (input scaling,
    basis settings, categories: ``continued.fixed_basis`` of a stored version) used instead of one fit on
    these rows (a continuation's from-scratch twin). Returns a ``TuneResult``
    (``service.engine.result``); bad data or specs raise ``InvalidData`` / ``InvalidSpec`` naming the
    field, value and fix.
    """
    spec = parse_spec(spec)
    # BLAS on one thread for the whole job: the row passes run on threads of their own (``parallel``),
    # and the rest is small matrices, on which waiting BLAS threads cost more than they give
    with watch_convergence() as unconverged, single_blas() if usable_cores() > 1 else nullcontext():
        result = _tune(data, spec, progress, should_stop, budget, progress_span, basis)
    result.warnings.extend(convergence_warnings(unconverged))
    return result


def _tune(data, spec: TuneSpec, progress, should_stop, budget, span=None, basis=None) -> TuneResult:
    prep = prepare(data, spec, budget)
    n, d = prep.X.shape
    if basis is not None:  # a fixed basis: its scaling, settings and category levels (unseen levels encode as 0)
        scaler, settings, categories = basis
        cats = [categorical_column(prep.cols, c) for c in spec.categorical]
        prep.categories = categories
        prep.cat_block = categories.encode(cats)[0] if cats else np.zeros((n, 0))
    check_budget(spec, n, d, budget, prep.categories.width)
    if basis is None:
        scaler = InputScaler.fit(prep.features, prep.X, prep.w)
    Xs = scaler.transform(prep.X)
    if basis is None:
        settings = basis_settings(spec, Xs, prep.keys)
    strengths = spec.penalty.strength_grid()
    ratios = spec.penalty.ratio_grid()

    if spec.cv.scheme == "loo":
        search = _LooSearch(spec, prep, Xs, settings, strengths)
    elif spec.basis_fit == "per_fold":
        plan = make_plan(spec.cv, n, prep.groups, prep.order, prep.keys)
        search = _PerFoldSearch(spec, prep, settings, strengths, ratios, plan)
    else:
        plan = make_plan(spec.cv, n, prep.groups, prep.order, prep.keys)
        search = _SharedSearch(spec, prep, Xs, settings, strengths, ratios, plan)
        if continued.why_not(spec) is None:  # the nested group's share of the bound first, then RBF settings'
            top = search._nested_top
            nested = 0 if top is None else continued.packed_bytes(top.n_terms(d) + prep.categories.width + 2,
                                                                     plan.n_splits)
            search.kept_bytes = nested
            search.keep_bytes = (budget or Budget()).max_summary_bytes

    # A long job reports progress inside each basis setting too (after each row block of each fold's
    # pass and after each split's fit): its units are then PROGRESS_STEPS sub-units of a (setting × split).
    # With a span reader (the worker), every job counts PACED_STEPS sub-units per unit: room for the worker
    # to move the progress it shows by one sub-unit per heartbeat between the engine's own reports.
    if progress and span is not None:
        steps = PACED_STEPS
    elif progress and estimate_cost(spec, n, d, prep.categories.width)["flops"] > PROGRESS_DETAIL_FLOPS:
        steps = PROGRESS_STEPS
    else:
        steps = 1
    unit = search.units_per_setting * steps
    total = len(settings) * unit
    done = 0
    rows: list[dict[str, Any]] = []
    for s_idx, setting in enumerate(settings):
        if span is not None:
            span(done, done + unit)
            progress(done, total)  # the total is known from the first setting on
        if span is not None:  # the engine's reports stop a twentieth short of the setting's end: the fit on
            # all rows (df) still follows the last split, and the worker's nudges need room there too
            room = unit - max(1, unit // 20)
            search.tick = lambda frac, base=done: progress(base + min(room, int(frac * room)), total)
        elif steps > 1:
            search.tick = lambda frac, base=done: progress(base + min(unit - 1, int(frac * unit)), total)
        for values, df, extra in search.evaluate(s_idx, setting):
            # values: (n_ratios, L, n_splits) metric per split; df: (n_ratios, L) complexity on all rows
            rows.extend(table_rows(s_idx, setting, strengths, ratios, values, df, extra))
        search.tick = None
        done += unit
        if progress:
            progress(done, total)
        if should_stop and should_stop():
            raise Cancelled("the training job was cancelled")

    if not rows:
        raise InvalidSpec("the grid is empty")
    picks = select(rows, settings, spec.selection.metric, spec.selection.rule)
    chosen = rows[picks[0]]
    s_idx = chosen["_setting"]
    model, full, oof_pred = search.refit(s_idx, settings[s_idx], chosen["strength"], chosen["l1_ratio"], strengths,
                                         scaler)
    state = _continuation_state(spec, prep, scaler, settings, search, model, budget)
    result = finish(spec, settings, rows, picks, model, full, n_rows=n, n_splits=search.n_splits,
                  fold_of_row=search.assignment, oof_predictions=oof_pred, oof_observed=prep.y,
                  fingerprint=fingerprint_of(fingerprint_columns(prep.cols, prep.used, 0, label_columns(spec)), n),
                  warnings=search.warnings + data_warnings(
                      spec, {c: column_kind(v) for c, v in prep.cols.items()}
                      | {c: "text" for c in getattr(data, "unused_text", ())},  # left out unread by the reader
                      prep.used, int(n), search.n_splits,
                      len(model.term_names)),
                  drift_inputs=(prep.X, _level_counts(prep)))
    meta, state_arrays, state_warnings = state
    result.continuation = (meta, state_arrays) if meta is not None else None
    result.warnings.extend(state_warnings)
    return result


def _continuation_state(spec: TuneSpec, prep: Prepared, scaler: InputScaler, settings: list[BasisSetting], search,
                        model: FittedModel, budget: Budget | None):
    """What the version keeps to be continued later (``continued.state_of``): the per-fold summaries of
    every summary group the search merged. Nothing for searches that have no shared per-fold summaries."""
    if type(search) is not _SharedSearch or continued.why_not(spec) is not None:
        return None, {}, []
    limit = (budget or Budget()).max_summary_bytes
    if search.keep_bytes is None or search.kept_bytes > limit:  # above the bound: nothing was kept
        return None, {}, [continued.too_large(search.kept_bytes, limit)]
    groups = []
    if search._nested is not None:
        members = [i for i, s in enumerate(settings) if s.kind in ("linear", "polynomial")]
        groups.append((search._nested_top, True, members, search._nested[1]))
    for i, s in enumerate(settings):
        if s.kind == "rbf":
            groups.append((s, False, [i], search.kept[i]))
    weights = None
    if prep.w is not None:
        raw = numeric_column(prep.cols, spec.weight, "weight")
        positive = float(np.count_nonzero(raw > 0))
        weights = {"positive": positive, "raw_sum": float(raw.sum()), "factor": positive / float(raw.sum())}
    n = int(prep.y.size)
    return continued.state_of(spec, prep.features, scaler, prep.categories, settings, groups, rows=n, positions=n,
                              ranges=model.ranges, weights=weights, limit=limit)


def _level_counts(prep: Prepared) -> list[np.ndarray]:
    """Training rows of every level of every categorical column (column sums of the one-hot block)."""
    out, off = [], 0
    for lv in prep.categories.levels:
        out.append(prep.cat_block[:, off:off + len(lv)].sum(axis=0))
        off += len(lv)
    return out


# ---------------------------------------------------------------------------------------------------
def _gather(D: np.ndarray, rows: np.ndarray, start: int = 0) -> np.ndarray:
    """``D[rows, start:]``, column-major when D is: column by column (each a contiguous read; ``rows``
    ascending), where numpy's row gather of a column-major D would give a row-major copy, strided reads."""
    if not D.flags.f_contiguous:
        return D[rows, start:]
    out = np.empty((rows.size, D.shape[1] - start), order="F")
    for j in range(start, D.shape[1]):
        np.take(D[:, j], rows, out=out[:, j - start])
    return out


def _design(setting: BasisSetting, Xs: np.ndarray, cat_block: np.ndarray) -> np.ndarray:
    """[Φ, one-hot]: a polynomial basis or one with one-hot columns built column-major in place (no stacked
    copy; ``BasisSetting.expand``'s row-major fill would be several times slower on many rows)."""
    if not cat_block.shape[1] and setting.kind != "polynomial":
        return setting.expand(Xs)
    p = setting.n_terms(Xs.shape[1])
    Phi = np.empty((Xs.shape[0], p + cat_block.shape[1]), order="F")
    setting.expand_into(Xs, Phi[:, :p])
    Phi[:, p:] = cat_block
    return Phi


def _max_leverage(Phi: np.ndarray, rows: np.ndarray | None, mean: np.ndarray, T: np.ndarray, n: float) -> float:
    """The largest training leverage (``row_leverages``) over the rows ``rows`` of ``Phi`` (None: all), in row
    blocks on every usable core, each block a column-major copy (``Phi`` is left as it is)."""
    total = Phi.shape[0] if rows is None else rows.size
    threads = usable_cores()
    step = max(1, min(CHUNK_ROWS, -(-total // threads)))

    def block(lo: int) -> float:
        pick = slice(lo, min(total, lo + step)) if rows is None else rows[lo:lo + step]
        return float(row_leverages(np.asfortranarray(Phi[pick]), mean, T, n).max())

    return max(ordered_map(block, range(0, total, step), threads), default=float("nan"))


def _model(prep: Prepared, spec: TuneSpec, scaler: InputScaler, setting: BasisSetting, full_summary: Summary,
           strengths: np.ndarray, strength: float, ratio: float | None, Phi: np.ndarray | None,
           fold_fits: list[Fit] | None, oof_abs: np.ndarray, oof_fold: np.ndarray,
           refit: tuple[Fit, int, np.ndarray, float] | None = None) -> tuple[FittedModel, Fit]:
    """The model refit on all rows (``result.build_model``), with its training leverages from ``Phi``; or,
    with ``refit`` (the fit on all rows, its strength's index, F and the largest leverage, computed by a
    pass that never held ``Phi`` whole: ``_SharedSearch._refit_rows``), from those."""
    kept = slice(None) if prep.w is None else prep.w > 0  # zero-weight rows are not training data
    if refit is None:
        full, l_idx, F = refit_all_rows(full_summary, spec, strengths, strength, ratio)
        max_leverage = _max_leverage(Phi, None if prep.w is None else np.flatnonzero(kept), full.mean,
                                     leverage_triangle(F, full.scale), full.n)
    else:
        full, l_idx, F, max_leverage = refit
    finite = np.isfinite(oof_abs)
    if prep.w is not None:
        finite &= prep.w > 0  # intervals from the out-of-fold residuals of rows that weigh something
    X = prep.X[kept]
    ranges = {f: [float(X[:, j].min()), float(X[:, j].max())] for j, f in enumerate(prep.features)}
    model = build_model(spec, prep.features, scaler, setting, prep.categories, full, l_idx, ratio, F, ranges,
                        max_leverage, thin_residuals(oof_abs[finite], oof_fold[finite]), fold_fits)
    return model, full


def _without_svd(f: Fit) -> Fit:
    """An L2 fit over the strength grid without its singular vectors (what a refit's fold fit needs)."""
    return Fit(f.strengths, f.beta, f.intercept, f.mean, f.scale, f.y_mean, f.n)


def _at(f: Fit, l_idx: int, cols: np.ndarray | None = None) -> Fit:
    """The fit at one strength of a fit over the grid (its coefficients are that row's, unchanged), its
    columns taken in the order ``cols`` when given."""
    s = slice(l_idx, l_idx + 1)
    if cols is None:
        return Fit(f.strengths[s], f.beta[s], f.intercept[s], f.mean, f.scale, f.y_mean, f.n)
    return Fit(f.strengths[s], f.beta[s][:, cols], f.intercept[s], f.mean[cols], f.scale[cols], f.y_mean, f.n)


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
        self._nested: tuple[np.ndarray | None, list[Summary]] | None = None
        self._gram_basis: orthobasis.OrthoBasis | None = None  # the nested group's basis, summaries by Gram matrices
        self.kept: dict[int, list[Summary]] = {}  # RBF settings' atom summaries (kept for continued training)
        self.keep_bytes: int | None = None  # keep them up to this many stored bytes (None: keep none)
        self.kept_bytes = 0  # stored bytes of the summary groups seen so far
        self._merged: NestedSplits | None = None
        self.warnings: list[str] = []
        # per setting, the L2 fits of the interval splits over the whole strength grid, without their SVDs
        # (the refit takes its fold fits from them instead of factoring the folds again), within a bound
        self._fold_paths: dict[int, list[Fit]] = {}
        self._fold_paths_bytes = 0
        self._scored: dict[int, tuple[np.ndarray, np.ndarray, list[Fit]]] | None = None  # ``_score_nested``

    tick: Callable[[float], None] | None = None  # progress inside one setting (fraction done), long jobs only

    def _summaries(self, D: np.ndarray, y: np.ndarray, nested: bool = False) -> list[Summary]:
        """One summary per atom, on every usable core (``parallel``: atoms on threads, or the row chunks
        of each atom when progress is reported); with ``tick``, the first half of the setting's progress
        moves after every row block (``Summary.of``'s chunks) of every atom."""
        tick = self.tick
        prep = self.prep
        threads = usable_cores()
        with single_blas() if threads > 1 else nullcontext():
            atoms = self.plan.atoms
            if not atoms:
                return []
            block = None
            if tick is not None:
                total = max(1, sum(len(idx) for idx in atoms))
                seen = [0]

                def block(rows: int) -> None:
                    seen[0] += rows
                    tick(0.5 * seen[0] / total)

            # the nested design has its one-hot block first
            codes = self._group_codes(D) if nested and ONE_HOT_AS_LEVEL_SUMS else None
            q1 = len(self.prep.categories.levels[0]) if codes is not None else 0
            if codes is not None and min(len(idx) for idx in atoms) < q1:
                codes = None  # more levels than rows in an atom: the small (levels + p)² factorization would
                # cost more than factoring the rows with their one-hot columns
            if codes is not None:  # the first categorical column's one-hot block as level sums

                def grouped(idx, pre, row_threads=1):
                    idx = np.sort(idx)
                    return Summary.of_grouped(codes[idx], q1, _gather(D, idx, q1), y[idx], weights=prep.rows_w(idx),
                                              precondition=pre, threads=row_threads)

                first, pre = grouped(atoms[0], None, threads)
                out = [first]
                if tick is not None:
                    block(len(atoms[0]))
                for idx, summary in ordered_map(lambda idx: (idx, grouped(idx, pre)[0]), atoms[1:],
                                                1 if tick else threads):
                    out.append(summary)
                    if tick is not None:
                        block(len(idx))
                return out
            # the first atom factored on its own (its row chunks on every core), the others with its R as
            # their first step: a sibling's rows explore the same directions (``summaries.preconditioned_r``,
            # 2·n·m² flops instead of 5)
            atoms = [np.sort(idx) for idx in atoms]  # a summary does not depend on its rows' order
            first = Summary.of(_gather(D, atoms[0]), y[atoms[0]], on_block=block, threads=threads,
                               weights=prep.rows_w(atoms[0]))
            pre = first.R if first.n > 0 else None
            if tick is None:
                return [first] + list(ordered_map(
                    lambda idx: Summary.of(_gather(D, idx), y[idx], weights=prep.rows_w(idx), precondition=pre),
                    atoms[1:], threads))
            return [first] + [Summary.of(_gather(D, idx), y[idx], on_block=block, threads=threads, weights=prep.rows_w(idx),
                                         precondition=pre) for idx in atoms[1:]]

    def _gram_summaries(self) -> list[Summary] | None:
        """The nested group's atom summaries each from one Gram matrix of a well-conditioned basis with the
        same span (``orthobasis``; the streamed engine's way, see there), or None for the exact way
        (``_summaries``): only for a polynomial group of degree 2 or more without one-hot columns, from
        ``GRAM_MIN_ROWS`` rows, and only when every atom's Gram matrix passes ``OrthoBasis.r_factor``'s
        guard. Below ``GRAM_THREADS_EXPAND_FROM`` rows this thread expands each atom's rows ``CHUNK_ROWS`` at a
        time while the other threads make the chunks' Gram matrices (short chunks: two threads expanding would
        mostly wait for the GIL); from there each thread expands its own chunks into a buffer of its own and
        makes their Gram matrices (measured at 400,000 rows: 0.42 s against 0.58 s; at 100,000 rows even). The
        chunks' Gram matrices are added up per atom in row order, so the result does not depend on the thread
        count or the way."""
        top, prep = self._nested_top, self.prep
        n = self.Xs.shape[0]
        if (top.kind != "polynomial" or (top.degree or 0) < 2 or prep.categories.width or n < GRAM_MIN_ROWS
                or not self.plan.atoms):
            return None
        # the basis from every row (or evenly spaced ones past GRAM_SAMPLE_ROWS): the folds' own guards
        # decide, so the sample's κ is not checked apart (it would cost one more Gram pass)
        sample = _evenly(self.Xs, GRAM_SAMPLE_ROWS)
        basis = orthobasis.build(top.powers, sample, check=False)
        if basis is None:
            return None
        y, w, tick = prep.y, prep.w, self.tick
        root = None if w is None else np.sqrt(w)
        atoms = [np.sort(idx) for idx in self.plan.atoms]  # a summary does not depend on its rows' order
        total, seen = max(1, sum(idx.size for idx in atoms)), 0
        threads = usable_cores()

        def designs():  # in this thread, as ordered_map takes them (short chunks: see above); the Gram matrices
            # run on the threads meanwhile
            for a, idx in enumerate(atoms):
                for lo in range(0, idx.size, CHUNK_ROWS):
                    rows = idx[lo:lo + CHUNK_ROWS]
                    yield a, basis.design(self.Xs[rows], y[rows], None if root is None else root[rows])

        local = threading.local()

        def chunk_gram(job: tuple[int, int]) -> tuple[int, np.ndarray, int]:
            a, lo = job
            buf = getattr(local, "buf", None)
            if buf is None:
                buf = local.buf = np.empty((CHUNK_ROWS, basis.width), order="F")
            rows = atoms[a][lo:lo + CHUNK_ROWS]
            A = basis.design(self.Xs[rows], y[rows], None if root is None else root[rows], buf)
            return a, A.T @ A, rows.size

        jobs = [(a, lo) for a, idx in enumerate(atoms) for lo in range(0, idx.size, CHUNK_ROWS)]
        work = (ordered_map(chunk_gram, jobs, threads) if n >= GRAM_THREADS_EXPAND_FROM else
                ordered_map(lambda job: (job[0], job[1].T @ job[1], job[1].shape[0]), designs(), threads))
        grams = [np.zeros((basis.width, basis.width)) for _ in atoms]
        left = [-(-idx.size // CHUNK_ROWS) for idx in atoms]  # chunks of each atom still to come
        factors: list[np.ndarray | None] = [None] * len(atoms)
        with single_blas():
            for a, G, n_rows in work:
                grams[a] += G  # each atom's chunks in row order, whatever the thread count
                left[a] -= 1
                if not left[a]:  # in this thread while the others make Gram matrices: its eigenvalues hold the GIL
                    factors[a] = basis.r_factor(grams[a])
                    if factors[a] is None:
                        return None  # not accurate enough: every atom the exact way
                if tick is not None:
                    seen += n_rows
                    tick(0.5 * seen / total)
        if any(R is None for R in factors):
            return None  # an atom without rows: every atom the exact way
        self._gram_basis = basis
        return [Summary(R, idx.size if w is None else float(np.sum(w[idx]))) for R, idx in zip(factors, atoms)]

    def _group_codes(self, D: np.ndarray) -> np.ndarray | None:
        """(n,) level of every row in the first categorical column, read from the nested design's leading
        one-hot columns, or None (no categorical column, or a row with no level: a fixed basis's unseen
        level encodes as zeros), in which case the one-hot columns are factored with the others."""
        cats = self.prep.categories
        if not cats.names or not cats.levels[0] or D.shape[1] < len(cats.levels[0]):
            return None
        E1 = D[:, :len(cats.levels[0])]
        codes = np.argmax(E1, axis=1)
        if not np.all(E1[np.arange(E1.shape[0]), codes] == 1.0):
            return None
        return codes

    def _nested_design(self) -> np.ndarray:
        """[one-hot, Φ of the highest degree], column-major, the basis expanded once in place."""
        q = self.prep.categories.width
        D = np.empty((self.Xs.shape[0], q + self._nested_top.n_terms(self.Xs.shape[1])), order="F")
        D[:, :q] = self.prep.cat_block
        self._nested_top.expand_into(self.Xs, D[:, q:])
        return D

    def _atoms(self, setting: BasisSetting) -> tuple[np.ndarray | None, list[Summary]]:
        """(design in the summaries' column order, summaries of each atom) for one setting. The nested
        group's design is None when nothing needs it: summaries by Gram matrices (made chunk by chunk) and a
        metric other than MAE (the refit expands the chosen setting alone)."""
        y = self.prep.y
        if setting.kind in ("linear", "polynomial"):
            mae = self.spec.selection.metric == "mae"
            if self._nested is None:
                atoms = self._gram_summaries()
                D = self._nested_design() if atoms is None or mae else None
                self._nested = (D, atoms if atoms is not None else self._summaries(D, y, nested=True))
                self._merged = NestedSplits(self._nested[1])
            D, atoms = self._nested
            if D is None and mae:  # asked again after the design was freed: summaries only
                D = self._nested_design()
            k = 1 + self.prep.categories.width + setting.n_terms(self.prep.X.shape[1])
            return None if D is None else D[:, :k - 1], [a.leading(k) for a in atoms]
        D = _design(setting, self.Xs, self.prep.cat_block)
        return D, self._summaries(D, y)

    def _combined(self, setting: BasisSetting, atoms: list[Summary]):
        """``combined(atom_ids)`` for ``score_splits``: a nested setting's merged atoms are leading blocks
        of the widest setting's, merged once per atom set (``NestedSplits``)."""
        if setting.kind not in ("linear", "polynomial"):
            return lambda ids: Summary.combine([atoms[i] for i in ids])
        k = atoms[0].R.shape[0] - 1
        return lambda ids: self._merged.of(ids, k)

    def _mae_rows(self, D: np.ndarray):
        """``mae_rows`` for ``score_splits`` over the design D, or None when the metric is not MAE."""
        if self.spec.selection.metric != "mae":
            return None
        y = self.prep.y

        def mae_rows(test_ids: list[int], f: Fit) -> np.ndarray:
            rows = np.concatenate([self.plan.atoms[i] for i in test_ids])
            err = np.abs(y[rows, None] - f.intercept[None, :] - D[rows] @ f.weights.T)
            if self.prep.w is None:
                return metric_value("mae", rows.size, sae=err.sum(axis=0))
            w = self.prep.w[rows]
            return metric_value("mae", float(w.sum()), sae=w @ err)
        return mae_rows

    def _keep_paths(self, s_idx: int, paths: list[Fit]) -> None:
        """Keep the interval splits' L2 fits of setting ``s_idx`` for the refit, within the bound."""
        size = sum(f.beta.nbytes for f in paths)
        if self._fold_paths_bytes + size <= FOLD_PATHS_KEEP_BYTES:
            self._fold_paths[s_idx] = paths
            self._fold_paths_bytes += size

    def _batched(self, setting: BasisSetting) -> bool:
        """Whether the nested group is scored all at once (``_score_nested``): L2, and little small algebra
        (``BATCH_SCORING_FLOPS``), so that the group's progress moving only at its first setting is not seen."""
        if setting.kind not in ("linear", "polynomial") or self.spec.penalty.kind != "l2":
            return False
        d, q = self.prep.X.shape[1], self.prep.categories.width
        widths = [1 + q + s.n_terms(d) for s in self.settings if s.kind in ("linear", "polynomial")]
        flops = self.n_splits * sum(float(m) ** 3 + self.strengths.size * float(m) ** 2 for m in widths)
        return flops <= BATCH_SCORING_FLOPS

    def _score_nested(self) -> dict[int, tuple[np.ndarray, np.ndarray, list[Fit]]]:
        """Every nested setting's CV figures, complexity on all rows and interval fits at once: each atom set
        merged once, then every (setting, split) fit and every setting's fit on all rows as one list of
        independent tasks on every usable core, the widest first, so the cores finish together instead of
        waiting for each other at every setting (a setting's few splits rarely share out evenly)."""
        members = [i for i, s in enumerate(self.settings) if s.kind in ("linear", "polynomial")]
        plan, threads = self.plan, usable_cores()
        parts = {}
        for i in members:
            D, atoms = self._atoms(self.settings[i])
            parts[i] = (atoms, self._combined(self.settings[i], atoms), self._mae_rows(D))
        width = {i: parts[i][0][0].R.shape[0] for i in members}
        sets = list(dict.fromkeys([tuple(ids) for split in plan.splits for ids in split] + [tuple(plan.refit_atoms)]))
        top = max(width.values())
        list(ordered_map(lambda ids: self._merged.of(list(ids), top - 1), sets, threads))  # each set merged once
        tasks = sorted([(i, j) for i in members for j in range(-1, len(plan.splits))], key=lambda t: -width[t[0]])
        tick = self.tick

        def run(task: tuple[int, int]):
            i, j = task
            atoms, combined, mae_rows = parts[i]
            if j < 0:
                return setting_df(combined(plan.refit_atoms), self.spec, self.strengths, self.ratios)
            values, fits = score_splits(atoms, [plan.splits[j]], self.spec, self.strengths, self.ratios, mae_rows,
                                        combined=combined)
            return values, _without_svd(fits[0][0])  # the singular vectors are not kept (their size)

        done: dict[tuple[int, int], Any] = {}
        for k, (task, out) in enumerate(zip(tasks, ordered_map(run, tasks, threads))):
            done[task] = out
            if tick is not None:
                tick(0.5 + 0.5 * (k + 1) / len(tasks))
        out = {}
        for i in members:
            values = np.concatenate([done[(i, j)][0] for j in range(len(plan.splits))], axis=2)
            out[i] = (values, done[(i, -1)], [done[(i, j)][1] for j in plan.interval_splits])
        return out

    def evaluate(self, s_idx: int, setting: BasisSetting):
        if self._batched(setting):
            if self._scored is None:
                self._scored = self._score_nested()
            values, df, paths = self._scored.pop(s_idx)
            self._keep_paths(s_idx, paths)
            self._free_nested_design(s_idx)
            yield values, df, None
            return
        D, atoms = self._atoms(setting)
        if setting.kind == "rbf" and self.keep_bytes is not None:  # kept for continued training, within the bound
            self.kept_bytes += continued.packed_bytes(atoms[0].R.shape[0], len(atoms))
            if self.kept_bytes <= self.keep_bytes:
                self.kept[s_idx] = atoms
            else:  # above the bound: none will be stored, so none is held
                self.kept.clear()
        combined = self._combined(setting, atoms)
        tick = self.tick
        values, fits = score_splits(atoms, self.plan.splits, self.spec, self.strengths, self.ratios, self._mae_rows(D),
                                    tick=None if tick is None else (lambda f: tick(0.5 + 0.5 * f)), combined=combined,
                                    threads=usable_cores())
        if self.spec.penalty.kind == "l2":
            self._keep_paths(s_idx, [_without_svd(fits[j][0]) for j in self.plan.interval_splits])
        df = setting_df(combined(self.plan.refit_atoms), self.spec, self.strengths, self.ratios)
        self._free_nested_design(s_idx)
        yield values, df, None

    def _free_nested_design(self, s_idx: int) -> None:
        """Free the nested design after setting ``s_idx`` when only RBF settings follow it."""
        later = self.settings[s_idx + 1:]
        if self._nested is not None and later and all(s.kind == "rbf" for s in later):
            self._nested = (None, self._nested[1])  # free the largest design once no nested setting is left
            # (with none left at all, the refit takes the chosen setting's columns from it, then frees it)

    def refit(self, s_idx, setting, strength, ratio, strengths, scaler):
        plan = self.plan
        y = self.prep.y
        nested = setting.kind in ("linear", "polynomial")
        # without the nested design (summaries by Gram matrices), the chosen setting's rows are expanded a
        # chunk at a time for the predictions and leverages (``_refit_rows``), never whole
        chunked = nested and self._nested[0] is None and not self.prep.categories.width
        if chunked:
            Phi = None
        elif nested and self._nested[0] is not None and not self.prep.categories.width:
            # the chosen setting's columns are the leading block of the nested design (column-major, so a
            # view); ``_model`` overwrites them, and the design is not used after this refit
            Phi = self._nested[0][:, :setting.n_terms(self.prep.X.shape[1])]
        else:
            Phi = _design(setting, self.Xs, self.prep.cat_block)
        if nested:
            self._nested = (None, self._nested[1])
        if setting.kind in ("linear", "polynomial"):
            # the nested summaries already hold this setting: reorder [1, one-hot, Φ, y] → [1, Φ, one-hot, y]
            _, atoms = self._nested
            q, p = self.prep.categories.width, setting.n_terms(self.prep.X.shape[1])
            order = [0, *range(1 + q, 1 + q + p), *range(1, 1 + q), 1 + q + p]
            atoms = [a.leading(1 + q + p) for a in atoms]
            if q:
                atoms = [a.permuted(order) for a in atoms]
        else:
            atoms = [Summary.of(Phi[idx], y[idx], weights=self.prep.rows_w(idx)) for idx in plan.atoms]

        def combined(ids: list[int]) -> Summary:
            if nested and not self.prep.categories.width and self._merged is not None:
                # the atom sets the scoring merged at the widest setting: their leading block (``NestedSplits``)
                return self._merged.of(ids, 1 + setting.n_terms(self.prep.X.shape[1]))
            return Summary.combine([atoms[i] for i in ids])

        full_summary = combined(plan.refit_atoms)
        n = y.size
        oof_pred = np.full(n, np.nan)
        oof_fold = np.full(n, -1, dtype=np.int64)
        paths = self._fold_paths.get(s_idx)
        if paths is not None:  # the scoring's own fits at the chosen strength
            l_idx = int(np.flatnonzero(strengths == strength)[0])
            q = self.prep.categories.width
            cols = None
            if nested and q:  # scored as [one-hot, Φ], the model's order is [Φ, one-hot]
                p = setting.n_terms(self.prep.X.shape[1])
                cols = np.array([*range(q, q + p), *range(q)])
            fold_fits = [_at(f, l_idx, cols) for f in paths]
        else:
            fold_fits = [fit(combined(plan.splits[j][0]), self.spec.penalty.kind, np.array([strength]), ratio)
                         for j in plan.interval_splits]
        known = None
        W = np.asfortranarray(np.vstack([f.weights[0] for f in fold_fits]).T) if fold_fits else None
        fi = np.array([f.intercept[0] for f in fold_fits])  # the fold fits' intercepts
        for k, j in enumerate(plan.interval_splits):  # the interval split whose fold holds each row
            oof_fold[np.concatenate([plan.atoms[i] for i in plan.splits[j][1]])] = k
        if chunked:
            full, l_idx, F = refit_all_rows(full_summary, self.spec, strengths, strength, ratio)
            pred, top = self._refit_rows(setting, W, fi, oof_fold, full.mean, leverage_triangle(F, full.scale), full.n)
            if pred is not None:
                oof_pred = pred
            known = (full, l_idx, F, top)
        elif fold_fits:  # a tall column-major design by a few columns: dgemm itself, not numpy's slower path
            P = blas3.matmul(Phi, W) if Phi.flags.f_contiguous else Phi @ W
            has = np.flatnonzero(oof_fold >= 0)  # every fold's predictions of every row, each row keeping its own fold's
            oof_pred[has] = fi[oof_fold[has]] + P[has, oof_fold[has]]
        model, full = _model(self.prep, self.spec, scaler, setting, full_summary, strengths, strength, ratio, Phi,
                             fold_fits, np.abs(y - oof_pred), oof_fold, refit=known)
        return model, full, oof_pred

    def _refit_rows(self, setting: BasisSetting, W: np.ndarray | None, fi: np.ndarray, fold_of: np.ndarray,
                    mean: np.ndarray, T: np.ndarray, n: float) -> tuple[np.ndarray | None, float]:
        """(every row's out-of-fold prediction, by the fold fit of the interval split whose fold holds it: column
        k of ``W`` (p × K) plus ``fi[k]`` for ``fold_of`` = k, NaN for -1 (None without ``W``); the largest
        training leverage, ``row_leverages`` with ``mean``, ``T``, ``n``, over the rows that weigh something),
        from the chosen setting's columns expanded ``CHUNK_ROWS`` rows at a time into a buffer of each thread's
        own (fresh pages for every chunk would cost their first-touch faults), on every core. With a leverage
        screen (``_leverage_screen``), the predictions come from the screen's basis and only the rows the
        screen keeps are expanded and given their exact leverage."""
        Xs, w = self.Xs, self.prep.w
        rows, p = Xs.shape[0], setting.n_terms(Xs.shape[1])
        screen = self._leverage_screen(setting, mean, T, n, None if W is None else W.T)
        local = threading.local()
        pred = None if W is None else np.full(rows, np.nan)

        def block(lo: int) -> float:
            hi = min(rows, lo + CHUNK_ROWS)
            buf = getattr(local, "buf", None)
            if buf is None:
                buf = local.buf = np.empty((min(rows, CHUNK_ROWS), p), order="F")
            f = fold_of[lo:hi]
            if screen is None:
                B = buf[:hi - lo]  # the leading rows of a column-major buffer: a column-major view
                setting.expand_into(Xs[lo:hi], B)
                P = None if W is None else blas3.matmul(B, W)
                D = B if w is None else np.asfortranarray(B[w[lo:hi] > 0])
                screen_floor = -math.inf
            else:  # the predictions from the screen's basis; only the rows it keeps expanded
                ubuf = getattr(local, "ubuf", None)
                if ubuf is None:
                    ubuf = local.ubuf = np.empty((min(rows, CHUNK_ROWS), screen.basis.width - 1), order="F")
                keep, P = screen.rows(Xs[lo:hi], ubuf)
                if w is not None:
                    keep = keep[w[lo + keep] > 0]
                if keep.size > orthobasis.SCREEN_MAX_SHARE * (hi - lo):  # too many kept: every row is cheaper
                    keep = np.arange(hi - lo) if w is None else np.flatnonzero(w[lo:hi] > 0)
                D = buf[:keep.size]
                setting.expand_into(Xs[lo:hi][keep], D)
                screen_floor = screen.floor
            if pred is not None:
                has = np.flatnonzero(f >= 0)
                pred[lo + has] = fi[f[has]] + P[has, f[has]]
            lev = row_leverages(D if D.flags.f_contiguous else np.asfortranarray(D), mean, T, n)  # overwrites D
            return max(screen_floor, float(lev.max()) if lev.size else -math.inf)

        top = max(ordered_map(block, range(0, rows, CHUNK_ROWS), usable_cores()))
        return pred, top

    def _leverage_screen(self, setting: BasisSetting, mean: np.ndarray, T: np.ndarray, n: float,
                         fw: np.ndarray | None) -> orthobasis.LeverageScreen | None:
        """The refit's leverage screen (``orthobasis.LeverageScreen``, as the streamed engine's last pass) for a
        polynomial setting of degree 2 or more on ``SCREEN_MIN_ROWS`` rows or more, or None (every row's exact
        leverage). Its floor is the largest exact leverage over ``SCREEN_SAMPLE_ROWS`` evenly spaced training
        rows (a lower bound of the largest over all); its basis is the nested group's own when the setting is
        the group's widest, else one made from ``GRAM_SAMPLE_ROWS`` rows. ``fw`` (K × p): the fold fits whose
        predictions the screen's product also gives."""
        Xs, w = self.Xs, self.prep.w
        if setting.kind != "polynomial" or (setting.degree or 0) < 2 or Xs.shape[0] < SCREEN_MIN_ROWS:
            return None
        top = self._nested_top
        basis = self._gram_basis if (setting.kind, setting.degree) == (top.kind, top.degree) else None
        if basis is None:
            basis = orthobasis.build(setting.powers, _evenly(Xs, GRAM_SAMPLE_ROWS))
            if basis is None:
                return None
        sample = _evenly(Xs, SCREEN_SAMPLE_ROWS, None if w is None else np.flatnonzero(w > 0))
        if not sample.shape[0]:
            return None
        D = np.empty((sample.shape[0], setting.n_terms(Xs.shape[1])), order="F")
        setting.expand_into(sample, D)
        floor = float(row_leverages(D, mean, T, n).max())
        return orthobasis.LeverageScreen.of(basis, mean, T, n, floor, fw)


def _evenly(Xs: np.ndarray, k: int, rows: np.ndarray | None = None) -> np.ndarray:
    """The rows ``rows`` of Xs (None: every row), or k of them evenly spaced when there are more, in row order."""
    n = Xs.shape[0] if rows is None else rows.size
    if n <= k:
        return Xs if rows is None else Xs[rows]
    pick = np.linspace(0, n - 1, k).astype(np.int64)
    return Xs[pick if rows is None else rows[pick]]


class _PerFoldSearch(_SharedSearch):
    """``basis_fit: per_fold``: the input scaling and RBF centres are refit inside every split."""

    def __init__(self, spec, prep, settings, strengths, ratios, plan):
        super().__init__(spec, prep, None, settings, strengths, ratios, plan)

    def _rows(self, atom_ids: list[int]) -> np.ndarray:
        """Row indices of some atoms in their original order: k-means sees the training rows in the order
        a scikit-learn Pipeline fit on ``X[train]`` would, so per-fold centres are reproducible."""
        return np.sort(np.concatenate([self.plan.atoms[i] for i in atom_ids]))

    def _split_design(self, setting: BasisSetting, train_rows: np.ndarray):
        sc = InputScaler.fit(self.prep.features, self.prep.X[train_rows], self.prep.rows_w(train_rows))
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
            tr, te = self._rows(train_ids), self._rows(test_ids)
            Phi = self._split_design(setting, tr)
            w_te = self.prep.rows_w(te)
            train = Summary.of(Phi[tr], y[tr], weights=self.prep.rows_w(tr))
            test = Summary.of(Phi[te], y[te], weights=w_te)
            for r_i, ratio in enumerate(self.ratios):
                f = fit(train, self.spec.penalty.kind, self.strengths, ratio)
                if metric == "mae":
                    err = np.abs(y[te, None] - f.intercept[None, :] - Phi[te] @ f.weights.T)
                    values[r_i, :, j] = (metric_value("mae", te.size, sae=err.sum(axis=0)) if w_te is None else
                                         metric_value("mae", float(w_te.sum()), sae=w_te @ err))
                else:
                    values[r_i, :, j] = metric_value(metric, test.n, sse=test.sse(f.residual_operator()),
                                                     sst=test.total_ss())
            if self.tick is not None:
                self.tick((j + 1) / self.plan.n_splits)
        Xs = InputScaler.fit(self.prep.features, self.prep.X, self.prep.w).transform(self.prep.X)
        df = setting_df(Summary.of(_design(setting, Xs, self.prep.cat_block), y, weights=self.prep.w), self.spec,
                        self.strengths, self.ratios)
        yield values, df, None

    def refit(self, s_idx, setting, strength, ratio, strengths, scaler):
        y = self.prep.y
        n = y.size
        oof_pred = np.full(n, np.nan)
        for j in self.plan.interval_splits:
            train_ids, test_ids = self.plan.splits[j]
            tr, te = self._rows(train_ids), self._rows(test_ids)
            Phi = self._split_design(setting, tr)
            f = fit(Summary.of(Phi[tr], y[tr], weights=self.prep.rows_w(tr)), self.spec.penalty.kind,
                    np.array([strength]), ratio)
            oof_pred[te] = f.intercept[0] + Phi[te] @ f.weights[0]
        Xs = scaler.transform(self.prep.X)
        Phi = _design(setting, Xs, self.prep.cat_block)
        model, full = _model(self.prep, self.spec, scaler, setting, Summary.of(Phi, y, weights=self.prep.w), strengths,
                             strength, ratio,
                             Phi, None, np.abs(y - oof_pred), np.zeros(n, dtype=np.int64))
        return model, full, oof_pred


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
        self.warnings: list[str] = []

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
        one = H >= 1.0 - LEVERAGE_ONE
        with np.errstate(divide="ignore", invalid="ignore"):
            loo = e / (1.0 - H)
        if one.any():
            loo[one] = self._refit_rows(Z, Phi, one)[one]
            lams = ", ".join(f"{v:g}" for v in self.strengths[one.any(axis=0)])
            self.warnings.append(
                f"{setting.label()}: {int(one.any(axis=1).sum())} row(s) have leverage 1 at strength {lams} (a "
                "category level on one row, or fewer rows than basis terms); their leave-one-out errors come from "
                "explicit refits without the row, as eᵢ/(1 − hᵢᵢ) is 0/0 there")
        self.loo[s_idx] = loo
        metric = self.spec.selection.metric
        sst = float(np.sum((y - y.mean()) ** 2))
        rn = math.sqrt(n)
        if metric == "rmse":
            mean = np.sqrt(np.mean(loo ** 2, axis=0))
            # delta method: se(RMSE) ≈ sd(e²) / (2 RMSE √n); reported as std = se · √n
            std = np.std(loo ** 2, axis=0) / (2 * np.maximum(mean, 1e-300))
            se = np.std(loo ** 2, axis=0, ddof=1) / (2 * np.maximum(mean, 1e-300)) / rn
        elif metric == "mae":
            mean = np.mean(np.abs(loo), axis=0)
            std = np.std(np.abs(loo), axis=0)
            se = np.std(np.abs(loo), axis=0, ddof=1) / rn
        else:
            mean = 1.0 - np.sum(loo ** 2, axis=0) / sst
            std = np.std(loo ** 2, axis=0) * n / sst
            se = np.std(loo ** 2, axis=0, ddof=1) * n / sst / rn
        df = full.effective_df()
        rss = np.sum(e ** 2, axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            gcv = (rss / n) / (1.0 - (df + 1.0) / n) ** 2  # the intercept counts in tr(H); inf when df + 1 = n
        L = self.strengths.size
        values = np.empty((1, L, 1))
        values[0, :, 0] = mean
        yield values, df[None, :], {"gcv": gcv[None, :], "_std": std[None, :], "_se": se[None, :]}

    def _refit_rows(self, Z: np.ndarray, Phi: np.ndarray, one: np.ndarray) -> np.ndarray:
        """Leave-one-out residuals by explicit refits, for the (row, strength) pairs marked in ``one``:
        the same fit as the closed form (columns scaled as on all rows, intercept refit unpenalized,
        minimum-norm solution at strength 0) on the other n − 1 rows."""
        y = self.prep.y
        n, p = Z.shape
        rows = np.flatnonzero(one.any(axis=1))
        cost = rows.size * (n - 1) * p * min(n - 1, p)
        if cost > MAX_LOO_REFIT_FLOPS:
            raise InvalidSpec(
                f"exact leave-one-out finds {rows.size} rows with leverage 1 at strength "
                f"{self.strengths[one.any(axis=0)].min():g} (more basis terms than rows, or category levels on "
                "single rows), and refitting each without its row is too costly here; use a positive smallest "
                "strength, or cv.scheme kfold",
                errors=[{"field": "penalty.strengths", "value": float(self.strengths[0]),
                         "message": "leverage 1 under leave-one-out"}])
        Z = np.where(np.ptp(Phi, axis=0) > 0, Z, 0.0)  # constant columns carry nothing, as in the closed form
        out = np.full(one.shape, np.nan)
        for i in rows:
            keep = np.arange(n) != i
            Zk, yk = Z[keep], y[keep]
            mu = Zk.mean(axis=0)
            U, sv, Vt = np.linalg.svd(Zk - mu, full_matrices=False)
            ok = sv > np.finfo(float).eps * max(n - 1, p) * (sv[0] if sv.size else 0.0)
            U, sv, Vt = U[:, ok], sv[ok], Vt[ok]
            uty = U.T @ (yk - yk.mean())
            for l in np.flatnonzero(one[i]):
                beta = Vt.T @ (sv / (sv ** 2 + self.strengths[l]) * uty)
                out[i, l] = y[i] - (yk.mean() + (Z[i] - mu) @ beta)
        return out

    def refit(self, s_idx, setting, strength, ratio, strengths, scaler):
        y = self.prep.y
        Phi = _design(setting, self.Xs, self.prep.cat_block)
        loo = self.loo[s_idx][:, int(np.flatnonzero(strengths == strength)[0])]
        model, full = _model(self.prep, self.spec, scaler, setting, Summary.of(Phi, y), strengths, strength, None,
                             Phi, None, np.abs(loo), np.zeros(y.size, dtype=np.int64))
        return model, full, y - loo
