"""CV+ bounds: the fast order statistic over K shifted sorted residual sets equals the direct form.

The reference is the definition of CV+ (Barber, Candès, Ramdas & Tibshirani, "Predictive inference with
the jackknife+", Ann. Statist. 49(1), 2021, section 3.2) evaluated by brute force: every row's n values
μ₋ₖ₍ᵢ₎(x) ∓ Rᵢ are formed and sorted, and the ⌊α(n+1)⌋-th / ⌈(1−α)(n+1)⌉-th smallest are taken.
"""

from __future__ import annotations

import dataclasses
import math
import tracemalloc

import numpy as np
import pytest
from sklearn.datasets import load_diabetes

import service.engine.model as model_module
from service.engine import tune
from service.engine.model import thin_residuals


def brute_force_bounds(model, Phi: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """The CV+ bounds by their definition: sort all n shifted residuals of each row."""
    R = model.residuals
    n = R.size
    k_lo = math.floor(alpha * (n + 1))
    k_hi = math.ceil((1 - alpha) * (n + 1))
    mu = model.fold_intercepts[None, :] + Phi @ model.fold_weights.T
    centres = mu[:, model.residual_fold]
    lo = np.sort(centres - R, axis=1)[:, k_lo - 1] if k_lo >= 1 else np.full(Phi.shape[0], -np.inf)
    hi = np.sort(centres + R, axis=1)[:, k_hi - 1] if k_hi <= n else np.full(Phi.shape[0], np.inf)
    return lo, hi


@pytest.fixture(scope="module")
def diabetes_model():
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    data = {f"x{j}": X[:, j] for j in range(4)} | {"y": y}
    res = tune(data, {"target": "y", "bases": [{"kind": "polynomial", "degrees": [2]}],
                      "penalty": {"strengths": [1.0]}, "cv": {"folds": 5, "seed": 2}})
    assert res.model.fold_weights is not None and res.model.residuals.size == y.size
    return res.model, X[:, :4]


def variants(model, rng: np.random.Generator):
    """The tuned model, and random models of the same shape: folds that disagree a little or a lot, tied
    residuals, thinned residuals, unequal and empty folds."""
    yield "tuned", model
    K, p = model.fold_weights.shape
    for trial in range(12):
        spread = [1e-3, 0.05, 1.0, 30.0][trial % 4]
        w = model.fold_weights.mean(axis=0) + rng.normal(0.0, spread, (K, p)) * np.abs(model.fold_weights).mean()
        b = model.fold_intercepts.mean() + rng.normal(0.0, spread, K)
        sizes = rng.integers(1 if trial % 5 else 0, 400, K)
        raw = np.abs(rng.standard_t(3, sizes.sum())) * rng.uniform(1.0, 60.0)
        fold = np.repeat(np.arange(K), sizes)
        if trial % 3 == 0:
            raw = np.round(raw, 0)  # many exact ties, within and across folds
        limit = int(sizes.sum()) // 4 if trial % 3 == 1 else int(sizes.sum()) + 1
        R, f, g = thin_residuals(raw, fold, limit=max(limit, K))
        yield f"random {trial}", dataclasses.replace(model, fold_weights=w, fold_intercepts=b, residuals=R,
                                                     residual_fold=f, residual_weight=g)
    # An exact fit: every out-of-fold residual zero, or nearly all equal (one distinct value per fold).
    yield "all zero", dataclasses.replace(model, residuals=np.zeros_like(model.residuals))
    R = np.where(np.arange(model.residuals.size) % 50 == 0, 3.0, 1.5)
    yield "two values", dataclasses.replace(model, residuals=R)


@pytest.mark.parametrize("window", [model_module._WINDOW, 1])
def test_cv_plus_bounds_equal_the_brute_force_form(diabetes_model, window, monkeypatch):
    # window=1 forces the value bisection on every row, the default exercises the direct snap as well;
    # the 5-row predict_detail below is ranked directly (rows × residuals under _DIRECT_VALUES).
    monkeypatch.setattr(model_module, "_WINDOW", window)
    model, X = diabetes_model
    rng = np.random.default_rng(14)
    cols = [f"x{j}" for j in range(4)]
    inside = X[rng.integers(0, X.shape[0], 300)]
    outside = X[rng.integers(0, X.shape[0], 60)] * rng.uniform(-8.0, 8.0, (60, 4))  # far extrapolation
    Q = np.vstack([inside, outside])
    checked = 0
    for label, m in variants(model, rng):
        Phi, _, _ = m.design({c: Q[:, j] for j, c in enumerate(cols)})
        value = m.intercept + Phi @ m.weights
        for alpha in (0.01, 0.05, 0.1, 0.25, 0.5):
            lo, hi = m._interval(Phi, value, alpha)
            ref_lo, ref_hi = brute_force_bounds(m, Phi, alpha)
            np.testing.assert_allclose(lo, ref_lo, rtol=1e-12, atol=1e-12, err_msg=f"{label}, alpha {alpha}")
            np.testing.assert_allclose(hi, ref_hi, rtol=1e-12, atol=1e-12, err_msg=f"{label}, alpha {alpha}")
            checked += int(np.isfinite(lo).sum() + np.isfinite(hi).sum())
        detail = m.predict_detail({c: Q[:5, j] for j, c in enumerate(cols)}, interval_level=0.8)
        ref_lo, ref_hi = brute_force_bounds(m, Phi[:5], 1.0 - 0.8)  # the level predict_detail uses
        np.testing.assert_allclose(detail["lower"], ref_lo, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(detail["upper"], ref_hi, rtol=1e-12, atol=1e-12)
    assert checked > 15 * 5 * 360  # the bounds were finite (real order statistics), not ±inf everywhere


@pytest.mark.parametrize("direct", [model_module._DIRECT_VALUES, -1])
def test_cv_plus_bounds_with_a_non_finite_fold_prediction(diabetes_model, direct, monkeypatch):
    # A basis value that overflows gives ±inf fold predictions; such rows keep the direct form's answer
    # (a few rows are ranked directly; direct=-1 sends them through the windowed order statistic).
    monkeypatch.setattr(model_module, "_DIRECT_VALUES", direct)
    model, X = diabetes_model
    Phi, _, _ = model.design({f"x{j}": X[:4, j] for j in range(4)})
    Phi[1, 0] = np.inf
    value = model.intercept + Phi @ model.weights
    lo, hi = model._interval(Phi, value, 0.1)
    ref_lo, ref_hi = brute_force_bounds(model, Phi, 0.1)
    np.testing.assert_array_equal(lo, ref_lo)
    np.testing.assert_array_equal(hi, ref_hi)


def test_cv_plus_bounds_do_not_form_every_shifted_residual(diabetes_model):
    # The direct form builds row chunks × n matrices of shifted residuals (123 MiB peak measured here for
    # 20,000 rows and 20,000 residuals); the order statistic over the sorted folds needs a small window per
    # fold and row (8 MiB measured, mostly the (rows, K) arrays).
    model, X = diabetes_model
    rng = np.random.default_rng(5)
    K = model.fold_weights.shape[0]
    raw = np.abs(rng.normal(0.0, 50.0, 20_000))
    R, f, g = thin_residuals(raw, rng.integers(0, K, raw.size))
    m = dataclasses.replace(model, residuals=R, residual_fold=f, residual_weight=g)
    Phi, _, _ = m.design({f"x{j}": X[rng.integers(0, X.shape[0], 20_000), j] for j in range(4)})
    value = m.intercept + Phi @ m.weights
    m._interval(Phi[:10], value[:10], 0.1)  # sorted folds cached
    tracemalloc.start()
    lo, hi = m._interval(Phi, value, 0.1)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 16 * 2**20, f"peak {peak / 2**20:.1f} MiB"
    ref_lo, ref_hi = brute_force_bounds(m, Phi[:200], 0.1)
    np.testing.assert_allclose(lo[:200], ref_lo, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(hi[:200], ref_hi, rtol=1e-12, atol=1e-12)


def test_a_few_rows_rank_only_the_tails_and_equal_the_brute_force_form_bit_for_bit(diabetes_model):
    # A few rows are ranked directly among each fold's k smallest (or n - k + 1 largest) shifted residuals
    # (FittedModel._tail_candidates): the same floating-point values as the definition, so the same bits;
    # the variants have unequal folds, folds smaller than the tail, empty folds, ties and thinned residuals.
    model, X = diabetes_model
    rng = np.random.default_rng(41)
    cols = [f"x{j}" for j in range(4)]
    Q = np.vstack([X[rng.integers(0, X.shape[0], 3)], X[rng.integers(0, X.shape[0], 2)] * 6.0])
    for label, m in variants(model, rng):
        Phi, _, _ = m.design({c: Q[:, j] for j, c in enumerate(cols)})
        assert Phi.shape[0] * m.residuals.size <= model_module._DIRECT_VALUES  # the direct form is taken
        value = m.intercept + Phi @ m.weights
        for alpha in (0.01, 0.05, 0.1, 0.25, 0.5, 0.75):
            lo, hi = m._interval(Phi, value, alpha)
            ref_lo, ref_hi = brute_force_bounds(m, Phi, alpha)
            assert lo.tobytes() == ref_lo.tobytes() and hi.tobytes() == ref_hi.tobytes(), (label, alpha)
