"""Continued training: a new version from a stored version's per-fold summaries and only the new rows.

What a version stores (``state_of``, written by ``TuneResult.to_artifact`` as ``body["continuation"]`` and
``continuation_*`` arrays): the basis definition it was trained with (input scaling, every basis setting
of the grid with its RBF centres, the category levels) and, for every summary group of the grid (the
nested linear / polynomial settings share the highest degree's group, each RBF setting has its own), the
R factor of ``[1, Φ, y]`` over each fold's rows (K × m(m+1)/2 numbers, m = p + 2, the upper triangle),
with each fold's row count (the sum of its row weights). These are exactly the summaries the search
merged, so nothing about the sweep needs the old rows again.

``continue_tune(body, arrays, new_rows)``:

1. The parent's spec and basis are taken unchanged. The new rows are expanded with that basis; a level
   the parent's categories lack encodes as zeros, and inputs outside the parent's ranges are kept: both
   are named in the version's warnings. A different column set is refused.
2. Each new row goes to the fold a full training would have given it: the seeded hash of ``cv.row_key``
   (grouped: of ``cv.group_by``), or without a key of its position after every row trained so far.
3. Per group and fold, the parent's R factor (scaled by √old_weight) and the new rows' R factor are
   merged (``summaries.merge``: the R factor of the stacked factors, so ``RᵀR`` is the sum of the
   cross-products: exact up to rounding). With a weight column, the weights of all rows are scaled to
   average 1 over every row that weighs something, as a full training scales them (the parent's
   factors are rescaled by the ratio of the two scalings).
4. The whole λ × basis sweep, the selection and the refit then run on the merged summaries
   (``result.score_splits``, ``select``, ``refit_all_rows``): the same algebra as a full training.

Intervals and leverage after a continuation (the old rows are not kept, so two figures are built from
what is kept):
- CV+ residuals: the new rows' out-of-fold absolute residuals under the new fold models, pooled per fold
  with the parent's stored residuals (each standing for the parent's residual weight × old_weight rows),
  and thinned to at most ``MAX_INTERVAL_RESIDUALS`` by weighted order statistics per fold. The parent's
  residuals were made by its own fold models, so they are an approximation that grows stale as the old
  rows' weight falls; ``tests/engine/test_continued.py`` measures the coverage.
- The largest training leverage (the hidden-extrapolation threshold) is the larger of the new rows'
  leverages under the new fit and the parent's own threshold.
- The drift reference keeps the parent's bins, with old and new rows counted in them (``merged_drift``).
"""

from __future__ import annotations

import math
from typing import Any, Callable

import numpy as np

from service.errors import CannotContinue, Cancelled, InvalidData, InvalidSpec

from .basis import BasisSetting, Categories, InputScaler, polynomial_powers
from .folds import hash_folds, uses_hash
from .model import MAX_INTERVAL_RESIDUALS, thin_residuals
from .result import (TuneResult, build_model, column_kind, fingerprint_columns, fingerprint_of, finish, label_columns,
                     refit_all_rows, score_splits, select, setting_df, table_rows)
from .solvers import convergence_warnings, fit, watch_convergence
from .spec import TuneSpec, parse_spec
from .summaries import Summary

FORMAT = 1
MAX_SUMMARY_BYTES = 64 * 2**20  # default bound of the stored summaries of one version (setting max_summary_bytes)


# ---- which trainings can be continued ----------------------------------------------------------------------
def why_not(spec: TuneSpec, streaming: bool = False) -> str | None:
    """Why a version trained with ``spec`` cannot be continued (None: it can)."""
    cv = spec.cv
    if cv.scheme not in ("kfold", "grouped"):
        return (f"its cv.scheme is {cv.scheme!r}, whose splits depend on every row at once (only kfold and grouped "
                "with hash assignment put each row in a fold of its own)")
    if not uses_hash(cv, streaming):
        return (f"its folds were cut by cv.assignment {cv.assignment!r} (a shuffle of all rows, which new rows would "
                "redraw); only hash assignment gives each new row the fold it would have had in a full training")
    if spec.basis_fit == "per_fold":
        return "its basis was refit inside every split (basis_fit 'per_fold'), so no one basis holds for new rows"
    if spec.selection.metric == "mae":
        return "its selection metric is mae, which needs every row's error (only rmse and r2 follow from summaries)"
    return None


def packed_bytes(m: int, folds: int) -> int:
    """Bytes stored for one summary group of m columns ([1, Φ, y]): the upper triangle of each fold's R."""
    return 8 * folds * m * (m + 1) // 2


def too_large(size: int, limit: int) -> str:
    """The warning of a version whose summaries are above ``max_summary_bytes`` (and are not kept)."""
    return (f"this version keeps no per-fold summaries ({size:,} bytes, above the limit "
            f"max_summary_bytes={limit:,}), so it cannot be continued with continue_from; "
            "raise TIKHON_MAX_SUMMARY_BYTES or use fewer RBF centres to keep them")


def _pack(Rs: list[np.ndarray]) -> np.ndarray:
    m = Rs[0].shape[0]
    iu = np.triu_indices(m)
    return np.vstack([R[iu] for R in Rs])


def _unpack(packed: np.ndarray) -> list[np.ndarray]:
    K, t = packed.shape
    m = int((math.isqrt(8 * t + 1) - 1) // 2)
    iu = np.triu_indices(m)
    out = []
    for k in range(K):
        R = np.zeros((m, m))
        R[iu] = packed[k]
        out.append(R)
    return out


# ---- what a version stores ---------------------------------------------------------------------------------
def state_of(spec: TuneSpec, features: list[str], scaler: InputScaler, categories: Categories,
             settings: list[BasisSetting], groups: list[tuple[BasisSetting, bool, list[int], list[Summary]]], *,
             rows: int, positions: int, ranges: dict[str, list[float]], weights: dict[str, float] | None,
             limit: int = MAX_SUMMARY_BYTES, streaming: bool = False
             ) -> tuple[dict[str, Any] | None, dict[str, np.ndarray], list[str]]:
    """(meta, arrays, warnings) a version keeps to be continued; meta None when it cannot be (the warning
    says why, for trainings whose figures say they could have been: above ``limit`` bytes)."""
    if why_not(spec, streaming) is not None:
        return None, {}, []
    K = spec.cv.folds
    size = sum(packed_bytes(a[0].R.shape[0], K) for _, _, _, a in groups)
    if size > limit:
        return None, {}, [too_large(size, limit)]
    arrays: dict[str, np.ndarray] = {"continuation_input_mean": np.asarray(scaler.mean, dtype=np.float64),
                                     "continuation_input_scale": np.asarray(scaler.scale, dtype=np.float64)}
    meta_groups = []
    for g, (top, nested, members, atoms) in enumerate(groups):
        arrays[f"continuation_r{g}"] = _pack([a.R for a in atoms])
        item: dict[str, Any] = {"nested": bool(nested), "members": [int(i) for i in members],
                                "columns": int(atoms[0].R.shape[0]), "top": top.describe()}
        meta_groups.append(item)
    setting_meta = []
    for i, s in enumerate(settings):
        d = s.describe()
        if s.kind == "rbf":
            arrays[f"continuation_centers{i}"] = np.asarray(s.centers, dtype=np.float64)
        setting_meta.append(d)
    atom_n = [float(a.n) for a in groups[0][3]]
    meta = {
        "format": FORMAT, "features": list(features),
        "categorical": {"names": list(categories.names), "levels": [list(map(str, lv)) for lv in categories.levels]},
        "settings": setting_meta, "groups": meta_groups, "folds": K, "fold_rows": atom_n,
        "rows": int(rows), "positions": int(positions), "ranges": {k: [float(a), float(b)] for k, (a, b) in ranges.items()},
        "weights": weights, "bytes": int(size),
    }
    return meta, arrays, []


def check_parent(body: dict[str, Any], version_label: str = "the parent version") -> TuneSpec:
    """The spec of a stored version (its engine ``body``) that can be continued; ``CannotContinue`` saying why
    and what to do otherwise (checked at submission, before the new rows are staged)."""
    meta = body.get("continuation")
    spec_raw = body.get("spec")
    if not isinstance(spec_raw, dict):
        raise CannotContinue(f"{version_label} keeps no spec, so it cannot be continued; train from scratch "
                             "with a spec.", errors=[{"field": "continue_from", "message": "no spec"}])
    spec = parse_spec(spec_raw)
    if meta is None:
        reason = why_not(spec, streaming=(body.get("cv_summary") or {}).get("execution") == "streaming")
        if reason is None:
            reason = ("it keeps no per-fold summaries (trained before continued training existed, or its "
                      "summaries were above max_summary_bytes)")
        raise CannotContinue(
            f"{version_label} cannot be continued: {reason}; train from scratch on all rows (old and new) with "
            "cv.scheme kfold or grouped, cv.assignment 'hash' and selection.metric rmse or r2, and continue "
            "from that version afterwards",
            errors=[{"field": "continue_from", "message": reason}])
    if int(meta.get("format", 0)) != FORMAT:
        raise CannotContinue(f"{version_label} keeps summaries of format {meta.get('format')}, which this "
                             f"release does not read (format {FORMAT}); train from scratch.",
                             errors=[{"field": "continue_from", "message": "unknown summary format"}])
    return spec


def check_new_rows(body: dict[str, Any], data: Any, budget=None, version_label: str = "the parent version"
                   ) -> dict[str, int]:
    """Refuse, before a continuation is queued, new rows that it could not take (no rows, another column set,
    unreadable values), as ``continue_tune`` would. Returns the grid counts (``check_budget``)."""
    from .table import as_columns

    from .table import categorical_column, key_column
    from .tune import Budget, check_budget, check_levels, row_weights

    spec = check_parent(body, version_label)
    budget = budget or Budget()
    cols = as_columns(data)
    features, _, X, _, _ = _new_columns(spec, list(body["continuation"]["features"]), cols, version_label)
    for c in spec.categorical:  # levels counted before any one-hot block, as a full training counts them
        check_levels(c, len(set(categorical_column(cols, c).tolist())), budget)
    if spec.cv.scheme == "grouped":
        categorical_column(cols, spec.cv.group_by)
    elif spec.cv.row_key:
        key_column(cols, spec.cv.row_key)
    if spec.weight:
        row_weights(cols, spec.weight)
    q = sum(len(lv) for lv in body["continuation"]["categorical"]["levels"])
    return check_budget(spec, X.shape[0], len(features), budget, q)


def _new_columns(spec: TuneSpec, expected: list[str], cols: dict[str, np.ndarray], version_label: str):
    """(features, columns used, X (m, d), y (m,), schema) of the new rows, refusing another column set."""
    from .table import numeric_column
    from .tune import resolve_columns

    m_rows = len(next(iter(cols.values()))) if cols else 0
    if m_rows == 0:
        raise InvalidData("the new data has no rows; a continuation needs at least one new row")
    schema = {c: column_kind(v) for c, v in cols.items()}
    try:
        features, used = resolve_columns(spec, schema)
    except InvalidSpec as err:
        raise CannotContinue(f"the new rows lack a column of {version_label}'s spec: {err.detail}",
                             errors=err.errors) from None
    if features != expected:
        raise CannotContinue(
            f"the new rows' feature columns {features} differ from {version_label}'s {expected}: a continuation keeps "
            "the parent's basis, so its columns must be the same; send exactly those columns (or train from scratch "
            "to change the column set)",
            errors=[{"field": "data", "value": features, "message": f"expected features {expected}"}])
    y = numeric_column(cols, spec.target, "target")
    X = np.column_stack([numeric_column(cols, f, "feature") for f in features]) if features else np.zeros((m_rows, 0))
    return features, used, X, y, schema


class _Stored:
    """A stored version's continuation state, rebuilt."""

    def __init__(self, body: dict[str, Any], arrays: dict[str, np.ndarray], version_label: str):
        self.spec = check_parent(body, version_label)
        self.label = version_label
        meta = body["continuation"]
        self.meta = meta
        self.features = list(meta["features"])
        self.categories = Categories(list(meta["categorical"]["names"]), [list(l) for l in meta["categorical"]["levels"]])
        self.scaler = InputScaler(self.features, np.asarray(arrays["continuation_input_mean"], dtype=np.float64),
                                  np.asarray(arrays["continuation_input_scale"], dtype=np.float64))
        d = len(self.features)
        self.settings: list[BasisSetting] = []
        for i, s in enumerate(meta["settings"]):
            if s["kind"] == "linear":
                self.settings.append(BasisSetting("linear"))
            elif s["kind"] == "polynomial":
                self.settings.append(BasisSetting("polynomial", degree=int(s["degree"]),
                                                  powers=polynomial_powers(d, int(s["degree"]))))
            else:
                self.settings.append(BasisSetting("rbf", width=float(s["width"]),
                                                  centers=np.asarray(arrays[f"continuation_centers{i}"], dtype=np.float64)))
        self.groups = []
        for g, item in enumerate(meta["groups"]):
            top = self._setting_of(item["top"], item["members"])
            self.groups.append((top, bool(item["nested"]), list(item["members"]), _unpack(np.asarray(arrays[f"continuation_r{g}"]))))
        self.fold_rows = np.asarray(meta["fold_rows"], dtype=np.float64)

    def _setting_of(self, described: dict[str, Any], members: list[int]) -> BasisSetting:
        """The group's widest setting: always one of its members (``state_of``)."""
        return next(self.settings[i] for i in members if self.settings[i].describe() == described)


def _design(setting: BasisSetting, Xs: np.ndarray, cat_block: np.ndarray, nested: bool) -> np.ndarray:
    """The design of a summary group: [one-hot, Φ] for the nested group, [Φ, one-hot] for an RBF setting."""
    Phi = setting.expand(Xs)
    if not cat_block.shape[1]:
        return Phi
    return np.hstack([cat_block, Phi]) if nested else np.hstack([Phi, cat_block])


# ---- continuing --------------------------------------------------------------------------------------------
def continue_tune(body: dict[str, Any], arrays: dict[str, np.ndarray], data: Any, *, old_weight: float = 1.0,
                  progress: Callable[[int, int], None] | None = None, should_stop: Callable[[], bool] | None = None,
                  budget=None, version_label: str = "the parent version",
                  max_summary_bytes: int = MAX_SUMMARY_BYTES) -> TuneResult:
    """A new ``TuneResult`` from a stored version (its engine ``body`` and ``arrays``) and only the new rows
    ``data`` (dict name → 1-D array, DataFrame or pyarrow Table); see the module docstring. ``old_weight``
    (0 < w ≤ 1) multiplies the weight of every earlier row. ``result.lineage`` records what was merged."""
    if not (isinstance(old_weight, (int, float)) and 0 < float(old_weight) <= 1):
        raise InvalidData(f"old_weight must be in (0, 1], got {old_weight!r}; 1 keeps earlier rows at full weight, "
                          "0.8 lets each continuation weigh earlier rows 0.8 times as much",
                          errors=[{"field": "old_weight", "value": old_weight, "message": "must be in (0, 1]"}])
    from contextlib import nullcontext

    from .parallel import single_blas, usable_cores

    stored = _Stored(body, arrays, version_label)
    # BLAS on one thread, as in ``tune``: everything here is small matrices, on which waiting BLAS threads
    # cost more than they give (the new rows' summaries run their chunks on threads of their own)
    with watch_convergence() as unconverged, single_blas() if usable_cores() > 1 else nullcontext():
        result = _continue(stored, body, arrays, data, float(old_weight), progress, should_stop, budget,
                           max_summary_bytes)
    result.warnings.extend(convergence_warnings(unconverged))
    return result


def _continue(st: _Stored, body, arrays, data, old_weight, progress, should_stop, budget, max_summary_bytes
              ) -> TuneResult:
    from .advice import data_warnings
    from .parallel import usable_cores
    from .table import as_columns, categorical_column, key_column, numeric_column
    from .tune import check_budget, check_levels, Budget

    spec = st.spec
    cols = as_columns(data)
    features, used, X, y, schema = _new_columns(spec, st.features, cols, st.label)
    m_rows = y.size
    budget = budget or Budget()
    cat_cols = [categorical_column(cols, c) for c in spec.categorical]
    for c, values in zip(spec.categorical, cat_cols):
        check_levels(c, len(set(values.tolist())), budget)
    check_budget(spec, m_rows, len(features), budget, st.categories.width)
    cat_block, unseen = st.categories.encode(cat_cols) if cat_cols else (np.zeros((m_rows, 0)), [])
    Xs = st.scaler.transform(X)
    warnings: list[str] = []
    for name, levels, mask in zip(st.categories.names, st.categories.levels, unseen):
        if mask.any():
            new = sorted({str(v) for v in np.asarray(cat_cols[st.categories.names.index(name)], dtype=object)[mask]})
            warnings.append(f"{int(mask.sum())} new row(s) carry level(s) {new[:10]} of categorical column {name!r} that "
                            "the parent version's basis does not have: the basis is fixed by the parent, so they encode "
                            "as zeros (no effect of their own); train from scratch to give them columns")

    # folds: the seeded hash of the key a full training would hash
    K = spec.cv.folds
    if spec.cv.scheme == "grouped":
        source = categorical_column(cols, spec.cv.group_by)
    elif spec.cv.row_key:
        source = key_column(cols, spec.cv.row_key)
    else:
        source = np.arange(st.meta["positions"], st.meta["positions"] + m_rows, dtype=np.int64)
    fold = hash_folds(source, spec.cv.seed, K)

    # weights: old rows × old_weight; with a weight column, every row scaled as a full training scales them
    w_new = None
    old_factor = old_weight
    weights_meta = None
    if spec.weight:
        from .tune import row_weights

        row_weights(cols, spec.weight)  # the same refusals as a full training (negative, missing, all zero)
        raw = numeric_column(cols, spec.weight, "weight")
        before = st.meta.get("weights") or {}
        positive = float(before.get("positive", 0.0)) + float(np.count_nonzero(raw > 0))
        raw_sum = old_weight * float(before.get("raw_sum", 0.0)) + float(raw.sum())
        factor = positive / raw_sum
        old_factor = old_weight * factor / float(before.get("factor", 1.0))
        w_new = raw * factor
        weights_meta = {"positive": positive, "raw_sum": raw_sum, "factor": factor}
    kept_rows = np.ones(m_rows, bool) if w_new is None else w_new > 0

    ranges_old = st.meta["ranges"]
    ranges = {}
    outside = []
    for j, f in enumerate(features):
        lo, hi = ranges_old[f]
        xk = X[kept_rows, j]
        nlo, nhi = (float(xk.min()), float(xk.max())) if xk.size else (lo, hi)
        ranges[f] = [min(lo, nlo), max(hi, nhi)]
        if nlo < lo or nhi > hi:
            outside.append(f"{f} reaches [{nlo:.6g}, {nhi:.6g}] (parent's range [{lo:.6g}, {hi:.6g}])")
    if outside:
        warnings.append("new rows lie outside the parent version's input ranges: " + "; ".join(outside)
                        + ". The input scaling and basis are fixed by the parent, so the model extrapolates its basis "
                        "there; train from scratch if the inputs have moved for good")

    # merge the summaries, group by group and fold by fold
    scale_old = math.sqrt(old_factor)
    total_units = len(st.settings) + len(st.groups)
    done = 0
    merged_groups = []
    for top, nested, members, Rs in st.groups:
        D = _design(top, Xs, cat_block, nested)
        atoms = []
        for k in range(K):
            idx = np.flatnonzero(fold == k)
            old = Summary(Rs[k] * scale_old, float(st.fold_rows[k]) * old_factor)
            if idx.size:
                new = Summary.of(D[idx], y[idx], weights=None if w_new is None else w_new[idx], threads=usable_cores())
                atoms.append(Summary.combine([old, new]))
            else:
                atoms.append(old)
        merged_groups.append((top, nested, members, atoms, D))
        done += 1
        if progress:
            progress(done, total_units)
        if should_stop and should_stop():
            raise Cancelled("the training job was cancelled")

    q = st.categories.width
    d = len(features)
    group_of = {i: g for g, (_, _, members, _, _) in enumerate(merged_groups) for i in members}

    def atoms_of(i: int, model_order: bool = False) -> list[Summary]:
        top, nested, _, atoms, _ = merged_groups[group_of[i]]
        if not nested:
            return atoms
        p = st.settings[i].n_terms(d)
        k = 1 + q + p
        out = [a.leading(k) for a in atoms]
        if model_order and q:
            order = [0, *range(1 + q, k), *range(1, 1 + q), k]
            out = [a.permuted(order) for a in out]
        return out

    splits = [([i for i in range(K) if i != j], [j]) for j in range(K)]
    strengths, ratios = spec.penalty.strength_grid(), spec.penalty.ratio_grid()
    rows: list[dict[str, Any]] = []
    for i, s in enumerate(st.settings):
        atoms = atoms_of(i)
        values, _ = score_splits(atoms, splits, spec, strengths, ratios)
        df = setting_df(Summary.combine(atoms), spec, strengths, ratios)
        rows.extend(table_rows(i, s, strengths, ratios, values, df))
        done += 1
        if progress:
            progress(done, total_units)
        if should_stop and should_stop():
            raise Cancelled("the training job was cancelled")
    picks = select(rows, st.settings, spec.selection.metric, spec.selection.rule)
    chosen = rows[picks[0]]
    s_idx, strength, ratio = chosen["_setting"], chosen["strength"], chosen["l1_ratio"]
    setting = st.settings[s_idx]

    # the refit on every row, the fold models, the new rows' out-of-fold residuals and leverages
    atoms = atoms_of(s_idx, model_order=True)
    full, l_idx, F = refit_all_rows(Summary.combine(atoms), spec, strengths, strength, ratio)
    fold_fits = [fit(Summary.combine([atoms[i] for i in tr]), spec.penalty.kind, np.array([strength]), ratio)
                 for tr, _ in splits]
    Phi = setting.expand(Xs)
    if q:
        Phi = np.hstack([Phi, cat_block])
    oof = np.full(m_rows, np.nan)
    for k, f in enumerate(fold_fits):
        idx = np.flatnonzero(fold == k)
        oof[idx] = f.intercept[0] + Phi[idx] @ f.weights[0]
    FZ = ((Phi[kept_rows] - full.mean) / full.scale) @ F.T
    lev = 1.0 / full.n + np.einsum("ij,ij->i", FZ, FZ)
    parent_model = body.get("model") or {}
    max_lev = max(float(parent_model.get("max_leverage", 0.0)), float(lev.max()) if lev.size else 0.0)
    res, res_fold, g = merge_residuals(np.asarray(arrays["residuals"], dtype=np.float64),
                                       np.asarray(arrays["residual_fold"], dtype=np.int64),
                                       float(parent_model.get("residual_weight", 1.0)) * old_weight,
                                       np.abs(y - oof)[kept_rows], fold[kept_rows])
    model = build_model(spec, features, st.scaler, setting, st.categories, full, l_idx, ratio, F, ranges, max_lev,
                        (res, res_fold, g), fold_fits)
    rows_total = int(st.meta["rows"]) + m_rows
    level_counts, off = [], 0
    for lv in st.categories.levels:
        level_counts.append(cat_block[:, off:off + len(lv)].sum(axis=0))
        off += len(lv)
    fingerprint = fingerprint_of(fingerprint_columns(cols, used, 0, label_columns(spec)), m_rows)
    result = finish(spec, st.settings, rows, picks, model, full, n_rows=rows_total, n_splits=K, fold_of_row=fold,
                    oof_predictions=oof, oof_observed=y, fingerprint=fingerprint,
                    warnings=warnings + data_warnings(spec, schema, used, rows_total, K, len(model.term_names)),
                    summary_extra={"continued": True, "new_rows": m_rows},
                    drift_inputs=(X[kept_rows], level_counts))
    merged = merged_drift(body.get("drift_reference"), old_weight * float(st.fold_rows.sum()), features,
                          X[kept_rows], st.categories, [c[kept_rows] for c in cat_cols], oof[kept_rows])
    if merged is not None:
        result.drift = merged
    meta, state_arrays, state_warnings = state_of(
        spec, features, st.scaler, st.categories, st.settings,
        [(top, nested, members, atoms) for top, nested, members, atoms, _ in merged_groups],
        rows=rows_total, positions=int(st.meta["positions"]) + m_rows, ranges=ranges, weights=weights_meta,
        limit=max_summary_bytes)
    result.continuation = (meta, state_arrays) if meta is not None else None
    result.warnings.extend(state_warnings)
    result.lineage = {"old_weight": old_weight, "new_rows": m_rows, "rows": rows_total,
                      "new_data_fingerprint": fingerprint["sha256"]}
    return result


def merged_drift(parent: dict[str, Any] | None, old_mass: float, features: list[str], X: np.ndarray,
                 categories: Categories, cat_cols: list[np.ndarray], predictions: np.ndarray) -> dict[str, Any] | None:
    """The drift reference of a continued version: the parent's bins (edges and levels kept), their shares
    merged with the new rows' counts, the parent's shares weighing ``old_mass`` rows (its rows × old_weight)
    and each new row one; a new row's unseen level goes to the levels-never-seen bin. None when the parent
    has no reference of this format (the new rows' own reference is used then)."""
    from . import drift

    if not isinstance(parent, dict) or parent.get("format_version") != drift.REFERENCE_VERSION:
        return None
    m = X.shape[0]
    total = old_mass + m

    def mix(shares: list[float], counts: np.ndarray) -> list[float]:
        return ((old_mass * np.asarray(shares, dtype=np.float64) + counts) / total).tolist()

    numeric = []
    by_name = {e["name"]: e for e in parent.get("numeric", [])}
    for j, f in enumerate(features):
        entry = by_name.get(f)
        if entry is None:
            return None
        numeric.append({**entry, "training": mix(entry["training"], drift.numeric_counts(entry["edges"], X[:, j]))})
    categorical = []
    cats = {e["name"]: e for e in parent.get("categorical", [])}
    for name, values in zip(categories.names, cat_cols):
        entry = cats.get(name)
        if entry is None:
            return None
        counts = drift.categorical_counts(entry["levels"], [str(v) for v in values.tolist()])
        categorical.append({**entry, "training": mix(entry["training"], counts)})
    pred = parent.get("prediction") or {"edges": [], "training": [1.0]}
    p = predictions[np.isfinite(predictions)]
    prediction = {**pred, "training": mix(pred["training"], drift.numeric_counts(pred["edges"], p) * (m / max(1, p.size)))}
    return {**parent, "numeric": numeric, "categorical": categorical, "prediction": prediction}


def merge_residuals(old: np.ndarray, old_fold: np.ndarray, old_each: float, new: np.ndarray, new_fold: np.ndarray,
                    limit: int = MAX_INTERVAL_RESIDUALS) -> tuple[np.ndarray, np.ndarray, float]:
    """Pool, per fold, the parent's kept absolute residuals (each standing for ``old_each`` rows) with the new
    rows' (one each), and keep weighted order statistics: per fold, c = round(W / g) values at the centres of
    c equal slices of the fold's weight W, with g = max(1, ⌈ΣW / limit⌉). With every weight 1 and no
    thinning this keeps every residual (the union itself). Returns (sorted residuals by fold, folds, g)."""
    if old.size == 0 or old_each <= 0:
        return thin_residuals(new, new_fold, limit)
    total = old_each * old.size + new.size
    g = max(1.0, math.ceil(total / limit))
    out_r, out_f = [], []
    for k in np.union1d(np.unique(old_fold), np.unique(new_fold)):
        v = np.concatenate([old[old_fold == k], new[new_fold == k]])
        w = np.concatenate([np.full(int((old_fold == k).sum()), old_each), np.ones(int((new_fold == k).sum()))])
        if v.size == 0:
            continue
        order = np.argsort(v, kind="stable")
        v, w = v[order], w[order]
        W = float(w.sum())
        c = max(1, int(round(W / g)))
        cum = np.cumsum(w)
        at = (np.arange(c) + 0.5) * (W / c)
        pick = np.minimum(np.searchsorted(cum, at, side="left"), v.size - 1)
        out_r.append(v[pick])
        out_f.append(np.full(c, k, dtype=np.int64))
    return np.concatenate(out_r), np.concatenate(out_f), float(g)


def fixed_basis(body: dict[str, Any], arrays: dict[str, np.ndarray]
                ) -> tuple[InputScaler, list[BasisSetting], Categories]:
    """(input scaling, basis settings, categories) a stored version was trained with, for ``tune(...,
    basis=...)``: training from scratch with a continuation's fixed basis."""
    st = _Stored(body, arrays, "the version")
    return st.scaler, st.settings, st.categories
