"""Out-of-core tuning: the same joint search, fed by row batches from partitions.

A *partition* is any object with an ``offset`` (the position of its first row in the whole source) and
``read(columns, batch_rows)`` yielding ``{name: 1-D array}`` batches; the engine never opens a file
itself (``service.sources`` makes partitions of Parquet and CSV files). Three passes, each a
map-reduce over partitions that an executor runs here or on a Dask cluster:

1. scan: row count, Chan et al.'s pairwise-merged means and variances of the inputs, ranges, NaN checks,
   categorical levels, a bottom-k hash sample for RBF centres, and the fingerprint lanes of each column;
2. summaries: for every (partition, basis group) the per-fold R factors of ``[1, Φ, y]``, merged by
   stacking and re-factoring; nested polynomial degrees share one group. Then the grid is scored from
   the fold summaries exactly as in memory (MAE takes one more pass for per-row errors);
3. the chosen setting only: out-of-fold residuals (CV+ intervals), training leverages, and a sample of
   out-of-fold predictions for plots.

Memory depends on the batch size and the basis width, not on the number of rows. Folds are assigned
by hash (see ``folds``), so every pass, and an in-memory run with ``cv.assignment = "hash"``, puts each
row in the same fold; the CV table then matches the in-memory one to rounding.
"""

from __future__ import annotations

import math
from collections import deque
from concurrent.futures import Future, ThreadPoolExecutor
from contextlib import nullcontext
from dataclasses import dataclass, field
from functools import partial
from typing import Any, Callable, Iterator, Protocol, Sequence

from collections import Counter

import numpy as np

from service.errors import InvalidData, InvalidSpec

from .basis import KMEANS_SAMPLE, BasisSetting, Categories, InputScaler, kmeans_centers
from .executors import SerialExecutor
from .parallel import ordered_map, single_blas, usable_cores
from .folds import hash_folds, key_hash
from .model import MAX_INTERVAL_RESIDUALS, FittedModel, thin_residuals
from .solvers import convergence_warnings, fit, leverage_triangle, row_leverages, watch_convergence
from .spec import TuneSpec, parse_spec
from . import blas3, orthobasis
from .orthobasis import SCREEN_MAX_SHARE, LeverageScreen, OrthoBasis
from .summaries import CHUNK_ROWS, Summary, absorb
from .advice import data_warnings
from .table import categorical_column, key_column, numeric_column
from .result import (PLOT_SAMPLE, TuneResult, add_lanes, build_model, check_spread, fingerprint_columns,
                     fingerprint_of, label_columns, finish, metric_value, NestedSplits, refit_all_rows, score_splits, select, setting_df,
                     table_rows)
from .tune import Budget, basis_settings, check_budget, check_levels, resolve_columns

SAMPLE_SALT = 0x5A17
PLOT_SALT = 0x9107
FOLD_BLOCK_ROWS = 4_096  # rows of one fold gathered (across small batches) before its R factor absorbs them
GRAM_MIN_ROWS = 100_000  # rows from which a nested polynomial group is summarized by Gram matrices (``orthobasis``)
GRAM_HOLD_ROWS = 65_536  # rows of a partition kept by its Gram pass, to summarize them the exact way if it must


class Partition(Protocol):
    offset: int

    def read(self, columns: list[str], batch_rows: int) -> Iterator[dict[str, np.ndarray]]: ...


# ---- pass 1: scan ------------------------------------------------------------------------------------
@dataclass
class Scan:
    n: int
    mean: np.ndarray
    m2: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    y_lo: float
    y_hi: float
    levels: list[Counter]  # rows of every level of every categorical column
    groups: set[str]
    sample_h: np.ndarray  # bottom-k key hashes
    sample_pos: np.ndarray
    sample_X: np.ndarray
    lanes: dict[str, np.ndarray] = field(default_factory=dict)  # fingerprint lanes per column (result.py)


@dataclass(frozen=True)
class _Ctx:
    spec: TuneSpec
    features: list[str]
    columns: list[str]
    batch_rows: int
    sample_size: int = KMEANS_SAMPLE
    schema: dict[str, str] | None = None  # every column of the source: "number", "boolean" or "text"
    budget: Budget | None = None  # the scan refuses a categorical column above budget.max_levels
    threads: int = 1  # row batches of one partition worked on at once (``parallel.ordered_map``)


def _keys(ctx: _Ctx, batch: dict[str, np.ndarray], offset: int, rows: int) -> np.ndarray:
    if ctx.spec.cv.row_key:
        return key_column(batch, ctx.spec.cv.row_key, offset)
    return np.arange(offset, offset + rows)


def _fold_ids(ctx: _Ctx, batch: dict[str, np.ndarray], offset: int, rows: int, folds: int) -> np.ndarray:
    """Hash fold of each row of a batch: of its group for ``grouped``, else of its row key."""
    if ctx.spec.cv.scheme == "grouped":
        return hash_folds(categorical_column(batch, ctx.spec.cv.group_by, offset), ctx.spec.cv.seed, folds)
    return hash_folds(_keys(ctx, batch, offset, rows), ctx.spec.cv.seed, folds)


def _numeric_block(ctx: _Ctx, batch: dict[str, np.ndarray], offset: int) -> tuple[np.ndarray, np.ndarray]:
    rows = len(batch[ctx.spec.target])
    X = (np.column_stack([numeric_column(batch, f, "feature", offset) for f in ctx.features])
         if ctx.features else np.zeros((rows, 0)))
    y = numeric_column(batch, ctx.spec.target, "target", offset)
    return X, y


def _bottom_k(h: np.ndarray, k: int) -> np.ndarray:
    if h.size <= k:
        return np.arange(h.size)
    return np.argpartition(h, k - 1)[:k]


def _scan_batch(ctx: _Ctx, item: tuple[dict[str, np.ndarray], int]):
    """What the scan needs of one batch (``item``: the batch and the position of its first row), computed on
    a worker thread: its checked columns, their fingerprint lanes, per-column mean, sum of squared
    deviations and range, categorical values, groups and sample hashes. ``_scan_partition`` adds them up in
    batch order, so the scan's result does not depend on the threads."""
    batch, pos = item
    X, y = _numeric_block(ctx, batch, pos)
    b = y.size
    if b == 0:
        return None
    lanes = fingerprint_columns(batch, ctx.columns, pos, label_columns(ctx.spec))
    bm = X.mean(axis=0)
    bm2 = ((X - bm) ** 2).sum(axis=0)
    ranges = (X.min(axis=0), X.max(axis=0)) if X.shape[1] else None
    cats = [categorical_column(batch, name, pos).tolist() for name in ctx.spec.categorical]
    groups = categorical_column(batch, ctx.spec.cv.group_by, pos).tolist() if ctx.spec.cv.group_by else None
    h = key_hash(_keys(ctx, batch, pos, b), ctx.spec.cv.seed ^ SAMPLE_SALT)
    return X, y, lanes, bm, bm2, ranges, cats, groups, h


def _positioned(ctx: _Ctx, part: Partition) -> Iterator[tuple[dict[str, np.ndarray], int]]:
    pos = part.offset
    for batch in part.read(ctx.columns, ctx.batch_rows):
        yield batch, pos
        pos += len(batch[ctx.spec.target])


def _scan_partition(ctx: _Ctx, part: Partition) -> Scan:
    """The scan of one partition: its batches worked on ``ctx.threads`` at a time (``_scan_batch``) and
    added up here in their order: running means and sums of squares by Chan, Golub & LeVeque's pairwise
    update, ranges, level counts (the level limit checked after each batch, so the error names the rows
    read so far), groups, and the seeded sample of rows kept by smallest hash."""
    d = len(ctx.features)
    n, mean, m2 = 0, np.zeros(d), np.zeros(d)
    lo, hi = np.full(d, np.inf), np.full(d, -np.inf)
    y_lo, y_hi = np.inf, -np.inf
    levels: list[Counter] = [Counter() for _ in ctx.spec.categorical]
    groups: set[str] = set()
    sh, sp, sx = np.zeros(0, np.uint64), np.zeros(0, np.int64), np.zeros((0, d))
    lanes: dict[str, np.ndarray] = {}
    pos = part.offset
    for got in ordered_map(partial(_scan_batch, ctx), _positioned(ctx, part), ctx.threads):
        if got is None:
            continue
        X, y, batch_lanes, bm, bm2, ranges, cats, batch_groups, h = got
        b = y.size
        lanes = add_lanes(lanes, batch_lanes)
        delta = bm - mean
        tot = n + b
        mean = mean + delta * (b / tot)  # Chan, Golub & LeVeque (1979) pairwise update
        m2 = m2 + bm2 + delta ** 2 * (n * b / tot)
        n = tot
        if ranges is not None:
            lo, hi = np.minimum(lo, ranges[0]), np.maximum(hi, ranges[1])
        y_lo, y_hi = min(y_lo, float(y.min())), max(y_hi, float(y.max()))
        for s, name, values in zip(levels, ctx.spec.categorical, cats):
            s.update(values)
            if ctx.budget is not None:  # stop at the first batch past the limit: the sets stay small
                check_levels(name, len(s), ctx.budget, rows_read=pos + b - part.offset)
        if batch_groups is not None:
            groups.update(batch_groups)
        sh = np.concatenate([sh, h])
        sp = np.concatenate([sp, np.arange(pos, pos + b)])
        sx = np.vstack([sx, X])
        keep = _bottom_k(sh, ctx.sample_size)
        sh, sp, sx = sh[keep], sp[keep], sx[keep]
        pos += b
    return Scan(n, mean, m2, lo, hi, y_lo, y_hi, levels, groups, sh, sp, sx, lanes)


def _merge_scan(a: Scan, b: Scan) -> Scan:
    if a.n == 0:
        return _with_lanes(b, add_lanes(a.lanes, b.lanes))
    if b.n == 0:
        return _with_lanes(a, add_lanes(a.lanes, b.lanes))
    tot = a.n + b.n
    delta = b.mean - a.mean
    mean = a.mean + delta * (b.n / tot)
    m2 = a.m2 + b.m2 + delta ** 2 * (a.n * b.n / tot)
    sh = np.concatenate([a.sample_h, b.sample_h])
    keep = _bottom_k(sh, KMEANS_SAMPLE)
    return Scan(tot, mean, m2, np.minimum(a.lo, b.lo), np.maximum(a.hi, b.hi), min(a.y_lo, b.y_lo),
                max(a.y_hi, b.y_hi), [x + y for x, y in zip(a.levels, b.levels)], a.groups | b.groups, sh[keep],
                np.concatenate([a.sample_pos, b.sample_pos])[keep], np.vstack([a.sample_X, b.sample_X])[keep],
                add_lanes(a.lanes, b.lanes))


def _with_lanes(s: Scan, lanes: dict[str, np.ndarray]) -> Scan:
    s.lanes = lanes
    return s


# ---- pass 2: fold summaries --------------------------------------------------------------------------
@dataclass(frozen=True)
class _Model:
    """What a pass over the rows needs to rebuild designs and fold ids."""

    ctx: _Ctx
    scaler: InputScaler
    categories: Categories
    folds: int


def _batches(m: _Model, part: Partition):
    ctx = m.ctx
    pos = part.offset
    for batch in part.read(ctx.columns, ctx.batch_rows):
        X, y = _numeric_block(ctx, batch, pos)
        b = y.size
        if b == 0:
            continue
        cats = [categorical_column(batch, c) for c in m.categories.names]
        block = m.categories.encode(cats)[0] if cats else np.zeros((b, 0))
        fold = _fold_ids(ctx, batch, pos, b, m.folds)
        yield pos, m.scaler.transform(X), y, block, fold, batch
        pos += b


def _group_design(setting: BasisSetting, nested: bool, Xs: np.ndarray, block: np.ndarray) -> np.ndarray:
    """The design of a batch, column-major, built in place: the basis expanded once (``expand_into``)
    and the one-hot block copied beside it (first for a nested group, so every lower degree is a
    leading block; last otherwise)."""
    q, p = block.shape[1], setting.n_terms(Xs.shape[1])
    D = np.empty((Xs.shape[0], q + p), order="F")
    if nested:
        setting.expand_into(Xs, D[:, q:])
        D[:, :q] = block
    else:
        setting.expand_into(Xs, D[:, :p])
        D[:, p:] = block
    return D


def _fold_design(setting: BasisSetting, nested: bool, Xs: np.ndarray, block: np.ndarray, y: np.ndarray
                 ) -> np.ndarray:
    """``[1, design, y]`` of some rows, column-major, built in place (the basis expanded once, see
    ``_group_design``): the block a fold's running R factor absorbs."""
    q, p = block.shape[1], setting.n_terms(Xs.shape[1])
    A = np.empty((Xs.shape[0], q + p + 2), order="F")
    A[:, 0] = 1.0
    if nested:
        setting.expand_into(Xs, A[:, 1 + q:1 + q + p])
        A[:, 1:1 + q] = block
    else:
        setting.expand_into(Xs, A[:, 1:1 + p])
        A[:, 1 + p:1 + p + q] = block
    A[:, -1] = y
    return A


def _absorb_after(prev, setting: BasisSetting, nested: bool, Xs: np.ndarray, block: np.ndarray, y: np.ndarray):
    """One fold's rows of some batches: their design built, then absorbed into the fold's running R factor
    once the fold's previous rows are (``prev``: that R, or the future that gives it), ``CHUNK_ROWS`` rows
    at a time, so a large batch never makes a large design here."""
    R = None
    for lo in range(0, Xs.shape[0], CHUNK_ROWS):
        hi = lo + CHUNK_ROWS
        A = _fold_design(setting, nested, Xs[lo:hi], block[lo:hi], y[lo:hi])
        if lo == 0:
            R = prev.result() if isinstance(prev, Future) else prev
        R = absorb(R, A)
    return R


def _summarize(m: _Model, groups: list[tuple[BasisSetting, bool]], plans: list[OrthoBasis | None],
               task: tuple[Partition, int]) -> dict[int, list[Summary]]:
    """The fold summaries of one partition for one basis group: from one Gram matrix per fold of a
    well-conditioned basis with the group's span where the group has one (``plans[g]``, see ``orthobasis``)
    and its Gram matrices are accurate enough, else the exact way (``_absorbed_folds``): from the rows the
    Gram pass kept when the partition is small (up to ``GRAM_HOLD_ROWS`` rows), else by reading it again."""
    part, g = task
    setting, nested = groups[g]
    plan = plans[g]
    if plan is not None:
        out = _summarize_gram(m, setting, nested, plan, part)
        if out is not None:
            return {g: out}
    return {g: _absorbed_folds(m, setting, nested, _fold_blocks(m, part))}


def _fold_blocks(m: _Model, part: Partition) -> Iterator[tuple[int, np.ndarray, np.ndarray, np.ndarray]]:
    """(fold, standardized inputs, one-hot block, target) of one fold's rows, at least ``FOLD_BLOCK_ROWS`` of
    them (a batch's rows of the fold, or several batches' when batches are small), each fold's in row order;
    the last, shorter blocks at the end."""
    K = m.folds
    held: list[list[tuple[np.ndarray, np.ndarray, np.ndarray]]] = [[] for _ in range(K)]
    held_rows = [0] * K

    def take(f: int):
        parts = held[f]
        out = (parts[0] if len(parts) == 1 else tuple(np.concatenate([x[i] for x in parts]) for i in range(3)))
        held[f], held_rows[f] = [], 0
        return (f, *out)

    for _, Xs, y, block, fold, _ in _batches(m, part):
        order = np.argsort(fold, kind="stable")  # each fold keeps its row order
        bounds = np.searchsorted(fold[order], np.arange(K + 1))
        for f in range(K):
            idx = order[bounds[f]:bounds[f + 1]]
            if idx.size:
                held[f].append((Xs[idx], block[idx], y[idx]))
                held_rows[f] += idx.size
                if held_rows[f] >= FOLD_BLOCK_ROWS:
                    yield take(f)
    for f in range(K):
        if held[f]:
            yield take(f)


def _fold_gram(plan: OrthoBasis, item) -> tuple[int, np.ndarray, int]:
    """(fold, Gram matrix of ``[1, Ψ, y]``, rows) of one fold block (``_fold_blocks``; no one-hot columns
    here), ``CHUNK_ROWS`` rows at a time."""
    f, Xs, _, y = item
    return f, plan.gram(Xs, y), Xs.shape[0]


def _summarize_gram(m: _Model, setting: BasisSetting, nested: bool, plan: OrthoBasis, part: Partition
                    ) -> list[Summary] | None:
    """The fold summaries of one partition for a nested polynomial group without one-hot columns, each from
    the Gram matrix of ``[1, Ψ, y]`` over the fold's rows (``orthobasis``): one expansion and one Gram per
    block, as the least-work floor of ``bench_scale`` does. The blocks run on ``ctx.threads`` threads and
    their Gram matrices are added up in block order, so the result does not depend on the thread count.
    When a fold's Gram matrix is not accurate enough (``OrthoBasis.r_factor``; a fold with fewer rows than
    columns, or a target the basis fits almost exactly): the exact summaries of the rows kept on the way if
    the partition had at most ``GRAM_HOLD_ROWS`` rows (a source of many small partitions then reads each once),
    else None."""
    K = m.folds
    grams = [np.zeros((plan.width, plan.width)) for _ in range(K)]
    rows = [0] * K
    held: list | None = []
    held_rows = 0

    def keep(blocks):
        nonlocal held, held_rows
        for item in blocks:
            if held is not None:
                held.append(item)
                held_rows += item[3].size
                if held_rows > GRAM_HOLD_ROWS:
                    held = None
            yield item

    for f, G, n in ordered_map(partial(_fold_gram, plan), keep(_fold_blocks(m, part)), m.ctx.threads):
        grams[f] += G
        rows[f] += n
    out = []
    for G, n in zip(grams, rows):
        R = plan.r_factor(G) if n else np.zeros((plan.width, plan.width))
        if R is None:
            return None if held is None else _absorbed_folds(m, setting, nested, iter(held))
        out.append(Summary(R, n))
    return out


def _absorbed_folds(m: _Model, setting: BasisSetting, nested: bool, blocks) -> list[Summary]:
    """The fold summaries of the fold blocks ``blocks`` (``_fold_blocks``) the exact way. Each fold's rows are
    added to the fold's running R factor in row order (``summaries.absorb``: a triangular solve and one Gram
    matrix per block). The folds' blocks run on ``ctx.threads`` threads, each fold's in order, so the result
    does not depend on the thread count."""
    K = m.folds
    width = _group_design(setting, nested, np.zeros((1, len(m.ctx.features))),
                          np.zeros((1, m.categories.width))).shape[1]
    state: list = [None] * K  # per fold: its running R, or the future that gives it
    rows = [0] * K
    threads = m.ctx.threads
    pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="tikhon-folds") if threads > 1 else None
    inflight: deque = deque()
    try:
        for f, Xs, block, y in blocks:
            rows[f] += y.size
            if pool is None:
                state[f] = _absorb_after(state[f], setting, nested, Xs, block, y)
                continue
            state[f] = pool.submit(_absorb_after, state[f], setting, nested, Xs, block, y)
            inflight.append(state[f])
            while len(inflight) > 2 * threads + K:  # bounds the rows held by queued blocks
                inflight.popleft().result()
        factors = [s.result() if isinstance(s, Future) else s for s in state]
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
    empty = np.zeros((width + 2, width + 2))
    return [Summary(R, n) if R is not None else Summary(empty, 0) for R, n in zip(factors, rows)]


def _merge_summaries(a: dict[int, list[Summary]], b: dict[int, list[Summary]]) -> dict[int, list[Summary]]:
    out = dict(a)
    for g, fs in b.items():
        out[g] = [Summary.combine([x, y]) for x, y in zip(out[g], fs)] if g in out else fs
    return out


# ---- MAE pass ----------------------------------------------------------------------------------------
def _mae_sums(m: _Model, groups, members, weights, task) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    """Per setting in the group: (sum |residual| over each split's validation rows, rows per split)."""
    part, g = task
    setting, nested = groups[g]
    out = {}
    for s_idx in members[g]:
        W, b0, k = weights[s_idx]  # W: (splits, ratios, L, p), b0: (splits, ratios, L)
        out[s_idx] = (np.zeros(W.shape[:3]), np.zeros(W.shape[0]))
    for _, Xs, y, block, fold, _ in _batches(m, part):
        D = _group_design(setting, nested, Xs, block)
        for s_idx in members[g]:
            W, b0, k = weights[s_idx]
            sums, counts = out[s_idx]
            for j in range(W.shape[0]):
                rows = np.flatnonzero(fold == j)
                if not rows.size:
                    continue
                Dj = D[rows, :k]
                for r in range(W.shape[1]):
                    res = y[rows, None] - b0[j, r][None, :] - Dj @ W[j, r].T
                    sums[j, r] += np.abs(res).sum(axis=0)
                counts[j] += rows.size
    return out


# ---- pass 3: the chosen setting --------------------------------------------------------------------
@dataclass
class _Final:
    residuals: list[np.ndarray]  # per fold, absolute out-of-fold residuals
    max_leverage: float
    sample_h: np.ndarray
    sample_pred: np.ndarray
    sample_obs: np.ndarray


def _final_batch(m: _Model, setting: BasisSetting, fw: np.ndarray, fi: np.ndarray, mean: np.ndarray,
                 T: np.ndarray, n: int, screen: LeverageScreen | None, item):
    """One batch of pass 3: (absolute out-of-fold residuals per fold, largest leverage, plot-sample hashes,
    predictions, observations). ``T``: ``solvers.leverage_triangle`` of the refit's leverage factor;
    ``screen``: which rows can hold the largest leverage (``orthobasis.LeverageScreen``), or None for all."""
    pos, Xs, y, block, fold, batch = item
    pred = np.empty(y.size)
    fw_t = np.asfortranarray(fw.T)
    lev = 0.0 if screen is None else screen.floor
    # ``CHUNK_ROWS`` rows at a time: a design of a whole large batch is a fresh memory map of its own on every
    # batch (above the C library's threshold), whose first touch, page by page, cost more than the arithmetic
    for lo in range(0, y.size, CHUNK_ROWS):
        part = slice(lo, lo + CHUNK_ROWS)
        f = fold[part]
        at = np.arange(f.size)
        if screen is None:
            D = _group_design(setting, False, Xs[part], block[part])
            pred[part] = fi[f] + blas3.matmul(D, fw_t)[at, f]  # (rows, K): numpy's D @ fwᵀ is slower
            lev = max(lev, float(row_leverages(D, mean, T, n).max()))  # D is not needed any more: overwritten
            continue
        # the screen's basis gives the predictions and which rows can hold the largest leverage; only those
        # rows' monomials are expanded (all of them when the screen keeps too many to be worth it)
        rows, P = screen.rows(Xs[part])
        pred[part] = fi[f] + P[at, f]
        if rows.size > SCREEN_MAX_SHARE * f.size:
            rows = at
        if rows.size:
            D = _group_design(setting, False, Xs[part][rows], block[part][rows])
            lev = max(lev, float(row_leverages(D, mean, T, n).max()))
    r = np.abs(y - pred)
    h = key_hash(_keys(m.ctx, batch, pos, y.size), m.ctx.spec.cv.seed ^ PLOT_SALT)
    return [r[fold == f] for f in range(m.folds)], lev, h, pred, y


def _final_pass(m: _Model, setting: BasisSetting, fw: np.ndarray, fi: np.ndarray, mean: np.ndarray,
                T: np.ndarray, n: int, stride: int, screen: LeverageScreen | None, part: Partition) -> _Final:
    """Out-of-fold residuals of one partition, sorted per fold and, when the whole source has more than
    ``MAX_INTERVAL_RESIDUALS`` rows, thinned here to every ``stride``-th order statistic (each kept value
    then stands for ``stride`` residuals, as ``thin_residuals`` does), so only about that many values
    travel back however large the source is."""
    res = [[] for _ in range(m.folds)]
    max_lev = 0.0
    sh, sp, so = np.zeros(0, np.uint64), np.zeros(0), np.zeros(0)
    work = partial(_final_batch, m, setting, fw, fi, mean, T, n, screen)
    for per_fold, lev, h, pred, y in ordered_map(work, _batches(m, part), m.ctx.threads):
        for f in range(m.folds):
            res[f].append(per_fold[f])
        max_lev = max(max_lev, lev)
        sh, sp, so = np.concatenate([sh, h]), np.concatenate([sp, pred]), np.concatenate([so, y])
        keep = _bottom_k(sh, PLOT_SAMPLE)
        sh, sp, so = sh[keep], sp[keep], so[keep]
    def thinned(x: list[np.ndarray]) -> np.ndarray:
        r = np.sort(np.concatenate(x)) if x else np.zeros(0)
        return r[stride // 2::stride] if stride > 1 else r

    kept = list(ordered_map(thinned, res, m.ctx.threads))  # the folds' sorts on the cores (sort drops the GIL)
    return _Final(kept, max_lev, sh, sp, so)


def _leverage_screen(m: _Model, scan: Scan, setting: BasisSetting, mean: np.ndarray, T: np.ndarray,
                     fw: np.ndarray, basis: OrthoBasis | None = None) -> LeverageScreen | None:
    """The screen of pass 3 for a polynomial model of degree 2 or more without one-hot columns, on sources of
    at least ``GRAM_MIN_ROWS`` rows, with its floor: the largest exact leverage over the scan's sample of
    rows (training rows: a lower bound of the largest over all); else None (every row's leverage).
    ``basis``: the model's own ``OrthoBasis`` when one was already built, else it is built here."""
    if (setting.kind != "polynomial" or (setting.degree or 0) < 2 or m.categories.width
            or scan.n < GRAM_MIN_ROWS):
        return None
    sample = _sample(m.scaler, scan)
    basis = basis if basis is not None else orthobasis.build(setting.powers, sample)
    if basis is None:
        return None
    floor = 0.0
    for lo in range(0, sample.shape[0], CHUNK_ROWS):  # the sample's design a chunk at a time, as in pass 3
        rows = sample[lo:lo + CHUNK_ROWS]
        D = _group_design(setting, False, rows, np.zeros((rows.shape[0], 0)))
        floor = max(floor, float(row_leverages(D, mean, T, scan.n).max()))
    return LeverageScreen.of(basis, mean, T, scan.n, floor, fw)


def _merge_final(a: _Final, b: _Final) -> _Final:
    sh = np.concatenate([a.sample_h, b.sample_h])
    keep = _bottom_k(sh, PLOT_SAMPLE)
    return _Final([np.concatenate([x, y]) for x, y in zip(a.residuals, b.residuals)],
                  max(a.max_leverage, b.max_leverage), sh[keep],
                  np.concatenate([a.sample_pred, b.sample_pred])[keep],
                  np.concatenate([a.sample_obs, b.sample_obs])[keep])


# ---- the driver ----------------------------------------------------------------------------------------
def check_stream_spec(spec: TuneSpec) -> None:
    """Refuse what out-of-core training cannot do, naming the field and the alternative."""
    if spec.cv.scheme not in ("kfold", "grouped"):
        raise InvalidSpec(f"cv.scheme {spec.cv.scheme!r} needs all rows in memory; out-of-core training supports "
                          "kfold and grouped (set execution.mode to memory for the others)",
                          errors=[{"field": "cv.scheme", "value": spec.cv.scheme, "message": "not available out of core"}])
    if spec.cv.assignment == "shuffle":
        raise InvalidSpec("cv.assignment 'shuffle' needs all rows in memory; use 'hash' (or 'auto') out of core",
                          errors=[{"field": "cv.assignment", "value": "shuffle", "message": "not available out of core"}])
    if spec.basis_fit == "per_fold":
        raise InvalidSpec("basis_fit 'per_fold' needs all rows in memory; use 'all_rows' out of core",
                          errors=[{"field": "basis_fit", "value": "per_fold", "message": "not available out of core"}])
    if spec.weight is not None:
        raise InvalidSpec(f"row weights (weight {spec.weight!r}) are trained in memory only: set execution.mode to memory "
                          "(up to the service's training row limit), or leave weight out to stream",
                          errors=[{"field": "weight", "value": spec.weight, "message": "not available out of core"}])


def check_partitions(schema: dict[str, str], spec: Any, n_rows: int, budget: Budget | None = None) -> dict[str, int]:
    """Everything that can be checked before reading the rows: spec, columns, and the budget (with the
    row count from the source's metadata or an estimate). Returns the grid counts."""
    spec = parse_spec(spec)
    check_stream_spec(spec)
    features, _ = resolve_columns(spec, schema)
    return check_budget(spec, max(1, n_rows), len(features), budget, rows_in_memory=spec.execution.batch_rows)


def check_batch(schema: dict[str, str], spec: Any, batch: dict[str, np.ndarray], offset: int = 0) -> None:
    """The checks the scan applies to every batch (numbers, labels, row keys), on one batch: the service runs
    them on a streamed source's first block at submission, so a refusal there is a 422 as in memory."""
    spec = parse_spec(spec)
    features, columns = resolve_columns(spec, schema)
    ctx = _Ctx(spec, features, columns, spec.execution.batch_rows, schema=dict(schema))
    _numeric_block(ctx, batch, offset)
    for name in label_columns(spec):
        categorical_column(batch, name, offset)
    _keys(ctx, batch, offset, len(batch[spec.target]))


def score_partitions(model: FittedModel, partitions: Sequence[Partition], spec: Any, metric: str,
                     executor=None) -> float:
    """``model``'s error on streamed rows: the metric per hash fold of ``spec``'s cv, averaged over folds
    (how a CV mean aggregates), so a live version and a new one are compared on the same footing."""
    spec = parse_spec(spec)
    executor = executor or SerialExecutor()
    columns = [spec.target, *model.features, *model.categories.names]
    for extra in (spec.cv.group_by, spec.cv.row_key):
        if extra and extra not in columns:
            columns.append(extra)
    ctx = _Ctx(spec, list(model.features), columns, spec.execution.batch_rows)
    acc = executor.map_reduce(partial(_score_partition, ctx, model), list(partitions), _sum_arrays)
    n, sse, sae, sy, syy = acc
    with np.errstate(divide="ignore", invalid="ignore"):
        per = metric_value(metric, n, sse=sse, sae=sae, sst=syy - sy ** 2 / n)
    per = per[n > 0]
    return float(per.mean()) if per.size else float("nan")


def _score_partition(ctx: _Ctx, model: FittedModel, part: Partition) -> np.ndarray:
    K = ctx.spec.cv.folds
    out = np.zeros((5, K))
    pos = part.offset
    for batch in part.read(ctx.columns, ctx.batch_rows):
        y = numeric_column(batch, ctx.spec.target, "target", pos)
        b = y.size
        fold = _fold_ids(ctx, batch, pos, b, K)
        e = y - model.predict({c: batch[c] for c in [*model.features, *model.categories.names]})
        for row, vals in enumerate((np.ones(b), e ** 2, np.abs(e), y, y ** 2)):
            out[row] += np.bincount(fold, weights=vals, minlength=K)
        pos += b
    return out


def _sum_arrays(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return a + b


def tune_partitions(partitions: Sequence[Partition], schema: dict[str, str], spec: Any, *,
                    executor=None, progress: Callable[[int, int], None] | None = None,
                    should_stop: Callable[[], bool] | None = None, budget: Budget | None = None,
                    threads: int | None = None) -> TuneResult:
    """Tune from partitions read in batches. ``schema`` maps column name → "number", "boolean" or "text".
    ``threads``: row batches worked on at once in this process (default: the usable cores with the
    in-process executor, 1 on Dask, whose workers are the parallelism); with more than one, BLAS runs
    one thread each (``parallel``). The result does not depend on it."""
    spec = parse_spec(spec)
    executor = executor or SerialExecutor()
    if threads is None:
        threads = usable_cores() if isinstance(executor, SerialExecutor) else 1
    # BLAS on one thread whenever there is more than one core, as in memory (``tune``): the blocks of a
    # pass are tall and narrow, on which waiting BLAS threads cost more than they give, even with the
    # row batches on one thread (measured: a million rows took five times longer that way)
    with watch_convergence() as unconverged, (single_blas() if usable_cores() > 1 else nullcontext()):
        result = _tune_partitions(partitions, schema, spec, executor, progress, should_stop, budget, threads)
    result.warnings.extend(convergence_warnings(unconverged))
    return result


def _tune_partitions(partitions, schema, spec: TuneSpec, executor, progress, should_stop, budget,
                     threads: int = 1) -> TuneResult:
    check_stream_spec(spec)
    if not partitions:
        raise InvalidData("the source has no partitions (no files or no rows)")
    features, columns = resolve_columns(spec, schema)
    budget = budget or Budget()
    run = _Run(_Ctx(spec, features, columns, spec.execution.batch_rows, schema=dict(schema), budget=budget,
                    threads=max(1, threads)),
               list(partitions),
               executor or SerialExecutor(), progress, should_stop)
    scan = run.map_reduce(partial(_scan_partition, run.ctx), run.parts, _merge_scan)
    m, settings = _setup(run, scan, budget)
    groups = _Groups(settings, len(features), m.categories.width)
    tasks = [(p, g) for g in range(len(groups.items)) for p in run.parts]
    plans = _gram_plans(m, scan, groups)
    fold_summaries = run.map_reduce(partial(_summarize, m, groups.items, plans), tasks, _merge_summaries)
    empty = [f for f, s in enumerate(fold_summaries[0]) if s.n == 0]
    if empty:
        raise InvalidSpec(f"hash assignment left fold {empty[0]} empty; use fewer folds or more rows/groups",
                          errors=[{"field": "cv.folds", "value": spec.cv.folds, "message": "empty fold"}])
    rows = _score(run, m, settings, groups, fold_summaries)
    picks = select(rows, settings, spec.selection.metric, spec.selection.rule)
    result = _refit(run, m, scan, settings, groups, fold_summaries, rows, picks, plans)
    # the per-fold summaries a later continuation merges into (``continued.state_of``)
    from . import continued

    meta, state_arrays, state_warnings = continued.state_of(
        spec, features, m.scaler, m.categories, settings,
        [(top, nested, groups.members[g], fold_summaries[g]) for g, (top, nested) in enumerate(groups.items)],
        rows=scan.n, positions=scan.n, ranges=result.model.ranges, weights=None, limit=budget.max_summary_bytes,
        streaming=True)
    result.continuation = (meta, state_arrays) if meta is not None else None
    result.warnings.extend(state_warnings)
    return result


@dataclass
class _Run:
    """One streamed run: partitions, executor, and the progress count over every map task."""

    ctx: _Ctx
    parts: list
    executor: Any
    progress: Callable[[int, int], None] | None
    should_stop: Callable[[], bool] | None
    done: int = 0

    @property
    def total(self) -> int:
        spec = self.ctx.spec
        groups = (any(b.kind != "rbf" for b in spec.bases)
                  + sum(len(b.widths) for b in spec.bases if b.kind == "rbf"))
        return len(self.parts) * (2 + groups * (2 if spec.selection.metric == "mae" else 1))

    def tick(self) -> None:
        self.done += 1
        if self.progress:
            self.progress(self.done, self.total)

    def map_reduce(self, fn, tasks, reduce):
        return self.executor.map_reduce(fn, tasks, reduce, on_done=self.tick, should_stop=self.should_stop)


def _setup(run: _Run, scan: Scan, budget: Budget | None) -> tuple[_Model, list[BasisSetting]]:
    """Checks on the scanned data, the input scaling, the categories and the basis settings."""
    spec, features = run.ctx.spec, run.ctx.features
    n, K = scan.n, spec.cv.folds
    if n == 0:
        raise InvalidData("the data has no rows; send at least a few rows per fold")
    if scan.y_lo == scan.y_hi:
        raise InvalidData(f"target column {spec.target!r} is constant ({scan.y_lo:g}); there is nothing to learn — "
                          "check that the right column is named as target")
    if K > n:
        raise InvalidSpec(f"cv.folds is {K} but the data has only {n} rows; use fewer folds",
                          errors=[{"field": "cv.folds", "value": K, "message": "more folds than rows"}])
    if spec.cv.scheme == "grouped" and len(scan.groups) < K:
        raise InvalidSpec(f"cv.folds is {K} but column {spec.cv.group_by!r} has only {len(scan.groups)} distinct "
                          f"groups; use at most {len(scan.groups)} folds",
                          errors=[{"field": "cv.folds", "value": K, "message": "more folds than groups"}])
    check_spread(spec.target, "target", scan.y_lo, scan.y_hi, n)
    for j, f in enumerate(features):
        check_spread(f, "feature", scan.lo[j], scan.hi[j], n)
    for name, s in zip(spec.categorical, scan.levels):  # every partition's own count passed: now all of them
        check_levels(name, len(s), budget or Budget())
    categories = Categories(list(spec.categorical), [sorted(s) for s in scan.levels])
    check_budget(spec, n, len(features), budget, categories.width, rows_in_memory=spec.execution.batch_rows)
    std = np.sqrt(scan.m2 / n)
    scaler = InputScaler(features, scan.mean, np.where(std > 0, std, 1.0))
    sample_Xs = _sample(scaler, scan)

    def centers_from(count: int) -> np.ndarray:
        if count >= n:
            return np.ascontiguousarray(sample_Xs)  # every row (n ≤ sample size here)
        return kmeans_centers(sample_Xs, count, spec.cv.seed)

    settings = basis_settings(spec, np.zeros((0, len(features))), centers_from=centers_from, sample=sample_Xs)
    return _Model(run.ctx, scaler, categories, K), settings


def _sample(scaler: InputScaler, scan: Scan) -> np.ndarray:
    """The scan's sample of rows, standardized, in row order (so whatever order the partitions' scans were
    merged in, what is made from it is the same)."""
    return scaler.transform(scan.sample_X[np.argsort(scan.sample_pos, kind="stable")])


def _gram_plans(m: _Model, scan: Scan, groups: "_Groups") -> list[OrthoBasis | None]:
    """Per basis group, the well-conditioned basis its fold summaries are made from by Gram matrices
    (``orthobasis``), or None for the exact way: only nested polynomial groups of degree 2 or more without
    one-hot columns, on sources of at least ``GRAM_MIN_ROWS`` rows (below, the exact way costs little)."""
    out: list[OrthoBasis | None] = []
    for setting, nested in groups.items:
        use = (nested and setting.kind == "polynomial" and (setting.degree or 0) >= 2
               and m.categories.width == 0 and scan.n >= GRAM_MIN_ROWS)
        out.append(orthobasis.build(setting.powers, _sample(m.scaler, scan)) if use else None)
    return out


class _Groups:
    """Basis settings grouped by the pass that summarizes them: nested linear / polynomial settings share
    the highest degree's pass (one-hot columns first), each RBF setting has its own."""

    def __init__(self, settings: list[BasisSetting], d: int, q: int):
        self.settings, self.d, self.q = settings, d, q
        self.items: list[tuple[BasisSetting, bool]] = []
        self.members: list[list[int]] = []
        self.of: dict[int, int] = {}
        nested = [i for i, s in enumerate(settings) if s.kind in ("linear", "polynomial")]
        if nested:
            self.items.append((settings[max(nested, key=lambda i: settings[i].n_terms(d))], True))
            self.members.append(nested)
            self.of.update({i: 0 for i in nested})
        for i, s in enumerate(settings):
            if s.kind == "rbf":
                self.of[i] = len(self.items)
                self.items.append((s, False))
                self.members.append([i])

    def atoms(self, fold_summaries, i: int, model_order: bool = False) -> tuple[list[Summary], int]:
        """(fold summaries of setting i, its design width). ``model_order`` reorders a nested setting's
        columns [1, one-hot, Φ, y] into the model's [1, Φ, one-hot, y] (``Summary.permuted``, no rows)."""
        g = self.of[i]
        if not self.items[g][1]:
            return fold_summaries[g], self.settings[i].n_terms(self.d) + self.q
        p = self.settings[i].n_terms(self.d)
        k = 1 + self.q + p
        atoms = [a.leading(k) for a in fold_summaries[g]]
        if model_order and self.q:
            order = [0, *range(1 + self.q, k), *range(1, 1 + self.q), k]
            atoms = [a.permuted(order) for a in atoms]
        return atoms, k - 1


def _splits(K: int) -> list[tuple[list[int], list[int]]]:
    return [([i for i in range(K) if i != j], [j]) for j in range(K)]


def _score(run: _Run, m: _Model, settings: list[BasisSetting], groups: _Groups, fold_summaries
           ) -> list[dict[str, Any]]:
    """The CV rows of every setting, scored from the fold summaries (MAE: one more pass over the rows)."""
    spec = run.ctx.spec
    strengths, ratios = spec.penalty.strength_grid(), spec.penalty.ratio_grid()
    values, weights = {}, {}
    merged = [NestedSplits(fold_summaries[g]) for g in range(len(groups.items))]
    combined = {}
    for i in range(len(settings)):
        atoms, k = groups.atoms(fold_summaries, i)
        g = groups.of[i]
        if groups.items[g][1]:  # nested: leading blocks of the widest setting's merged atoms
            combined[i] = partial(lambda ids, g, w: merged[g].of(ids, w), g=g, w=atoms[0].R.shape[0] - 1)
        else:
            combined[i] = partial(lambda ids, a: Summary.combine([a[j] for j in ids]), a=atoms)
        values[i], fits = score_splits(atoms, _splits(m.folds), spec, strengths, ratios, combined=combined[i])
        weights[i] = (np.array([[f.weights for f in per] for per in fits]),
                      np.array([[f.intercept for f in per] for per in fits]), k)
    if spec.selection.metric == "mae":
        tasks = [(p, g) for g in range(len(groups.items)) for p in run.parts]
        sums = run.map_reduce(partial(_mae_sums, m, groups.items, groups.members, weights), tasks, _merge_all_mae)
        values = {i: np.transpose(metric_value("mae", sums[i][1][:, None, None], sae=sums[i][0]), (1, 2, 0))
                  for i in values}
    rows: list[dict[str, Any]] = []
    for i, s in enumerate(settings):
        df = setting_df(combined[i](list(range(m.folds))), spec, strengths, ratios)
        rows.extend(table_rows(i, s, strengths, ratios, values[i], df))
    return rows


def _refit(run: _Run, m: _Model, scan: Scan, settings: list[BasisSetting], groups: _Groups, fold_summaries,
           rows: list[dict[str, Any]], picks: tuple[int, int, int], plans: list[OrthoBasis | None]) -> TuneResult:
    """The chosen setting refit from its fold summaries, then pass 3 over the rows, then the result
    (``plans``: the summaries' bases, ``_gram_plans``)."""
    spec, features = run.ctx.spec, run.ctx.features
    chosen = rows[picks[0]]
    s_idx, strength, ratio = chosen["_setting"], chosen["strength"], chosen["l1_ratio"]
    setting, n = settings[s_idx], scan.n
    atoms, _ = groups.atoms(fold_summaries, s_idx, model_order=True)
    full, l_idx, F = refit_all_rows(Summary.combine(atoms), spec, spec.penalty.strength_grid(), strength, ratio)
    fold_fits = [fit(Summary.combine([atoms[i] for i in tr]), spec.penalty.kind, np.array([strength]), ratio)
                 for tr, _ in _splits(m.folds)]
    fw = np.vstack([f.weights[0] for f in fold_fits])
    fi = np.array([f.intercept[0] for f in fold_fits])
    stride = max(1, math.ceil(n / MAX_INTERVAL_RESIDUALS))
    T = leverage_triangle(F, full.scale)
    plan = plans[groups.of[s_idx]]  # the summaries' basis serves the screen when the model is its top degree
    screen = _leverage_screen(m, scan, setting, full.mean, T, fw,
                              plan if plan is not None and np.array_equal(plan.powers, setting.powers) else None)
    fin = run.map_reduce(partial(_final_pass, m, setting, fw, fi, full.mean, T, n, stride, screen), run.parts,
                         _merge_final)
    abs_res = np.concatenate(fin.residuals)
    res_fold = np.concatenate([np.full(r.size, f, dtype=np.int64) for f, r in enumerate(fin.residuals)])
    kept, kept_fold, _ = thin_residuals(abs_res, res_fold, limit=abs_res.size)  # sorts per fold, keeps all
    ranges = {f: [float(scan.lo[j]), float(scan.hi[j])] for j, f in enumerate(features)}
    model = build_model(spec, features, m.scaler, setting, m.categories, full, l_idx, ratio, F, ranges,
                        fin.max_leverage, (kept, kept_fold, float(stride)), fold_fits)
    return finish(spec, settings, rows, picks, model, full, n_rows=n, n_splits=m.folds,
                  fold_of_row=np.zeros(0, dtype=np.int64), oof_predictions=fin.sample_pred, oof_observed=fin.sample_obs,
                  fingerprint=fingerprint_of(scan.lanes, n),
                  warnings=data_warnings(spec, run.ctx.schema or {}, run.ctx.columns, int(n), m.folds, len(model.term_names)),
                  drift_inputs=(scan.sample_X, [np.array([scan.levels[j][lv] for lv in levels], dtype=np.float64)
                                                for j, levels in enumerate(m.categories.levels)]),
                  summary_extra={"execution": "streaming", "executor": getattr(run.executor, "name", "in-process"),
                                 "partitions": len(run.parts)})


def _merge_all_mae(a, b):
    out = dict(a)
    for i, (s, c) in b.items():
        out[i] = (out[i][0] + s, out[i][1] + c) if i in out else (s, c)
    return out
