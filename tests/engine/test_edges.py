"""Exact at the edges: small RBF widths, leverage one under leave-one-out, missing categories, time
orders, the one-standard-error rule, per-fold RBF bases, sums of squares that overflow.

Each check names its outside reference beside it: scikit-learn and SciPy as independent
implementations, brute-force refits, Hastie, Tibshirani & Friedman (ESL, 2nd ed.) and Zou, Hastie &
Tibshirani (2007). Data: the diabetes set that ships with scikit-learn (Efron et al., 2004), or small
arrays whose answer the test states.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.cluster import KMeans
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Lasso, LinearRegression, Ridge
from sklearn.model_selection import KFold, TimeSeriesSplit
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

from service.engine import tune
from service.engine.basis import BasisSetting
from service.errors import InvalidData, InvalidSpec


def diabetes(n=None):
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    if n:
        X, y = X[:n], y[:n]
    return X, y, {**{f"x{j}": X[:, j] for j in range(X.shape[1])}, "y": y}


def standardized(X):
    return (X - X.mean(axis=0)) / X.std(axis=0)


def fold_rmse(Phi, y, splits, model):
    out = []
    for tr, te in splits:
        m = model().fit(Phi[tr], y[tr])
        out.append(np.sqrt(np.mean((y[te] - m.predict(Phi[te])) ** 2)))
    return np.array(out)


# ---- 1. small RBF widths ------------------------------------------------------------------------------
def test_rbf_basis_at_tiny_width_is_exact_on_and_near_the_centres():
    rng = np.random.default_rng(4)
    Xs = rng.normal(size=(60, 3)) * 2.0
    near = Xs + 3e-9  # rows a few 1e-9 away from each centre
    w = 1e-8
    Phi = BasisSetting("rbf", width=w, centers=Xs).expand(np.vstack([Xs, near]))
    # SciPy's cdist computes Σ (xₖ − cₖ)² directly: the independent reference for the exact basis.
    ref = np.exp(-cdist(np.vstack([Xs, near]), Xs, "sqeuclidean") / (2 * w * w))
    np.testing.assert_array_equal(np.diag(Phi[:60]), 1.0)  # a row on its centre: exp(0) = 1 exactly
    np.testing.assert_allclose(Phi, ref, rtol=1e-10, atol=1e-300)


def test_rbf_cv_at_tiny_width_equals_scikit_learn_on_the_exact_basis():
    rng = np.random.default_rng(0)
    base = rng.normal(size=(30, 2)) * 3
    X = np.repeat(base, 4, axis=0) + rng.normal(size=(120, 2)) * 1e-8  # tight clusters of 4 rows
    y = np.sin(X[:, 0]) + X[:, 1] + rng.normal(size=120) * 0.1
    w = 1e-8
    res = tune({"a": X[:, 0], "b": X[:, 1], "y": y},
               {"target": "y", "bases": [{"kind": "rbf", "widths": [w], "centers": 1000}],
                "penalty": {"strengths": [1e-3, 1.0]}, "cv": {"folds": 5, "seed": 0}})
    Phi = np.exp(-cdist(standardized(X), standardized(X), "sqeuclidean") / (2 * w * w))  # exact basis (SciPy)
    splits = list(KFold(5, shuffle=True, random_state=0).split(X))
    for row in res.cv_table:
        # scikit-learn reference: StandardScaler + Ridge on the exact basis, same KFold
        want = fold_rmse(Phi, y, splits, lambda: Pipeline([("s", StandardScaler()), ("r", Ridge(alpha=row["strength"]))]))
        np.testing.assert_allclose(row["split_values"], want, rtol=1e-9)


def test_rbf_width_whose_basis_is_the_identity_is_refused():
    X, y, data = diabetes()
    with pytest.raises(InvalidSpec, match=r"rbf width 1e-06 is too narrow.*at least") as err:
        tune(data, {"target": "y", "bases": [{"kind": "rbf", "widths": [1e-6, 1.0], "centers": 20}],
                    "cv": {"folds": 3}})
    assert err.value.errors[0]["field"] == "bases.0.widths"


# ---- 2. exact leave-one-out at strength 0 with leverage one ------------------------------------------
def test_loo_with_two_rows_predicts_each_row_by_the_other():
    # Brute force by hand: leaving one of two rows out leaves one row, whose fit is its own value
    # (the slope is not identified; the minimum-norm solution is 0), so each error is y₁ − y₂ = ±2.
    res = tune({"x": np.array([0.0, 1.0]), "y": np.array([1.0, 3.0])},
               {"target": "y", "bases": [{"kind": "linear"}], "penalty": {"strengths": [0.0]},
                "cv": {"scheme": "loo"}})
    assert res.cv_table[0]["mean"] == pytest.approx(2.0, rel=1e-12)
    np.testing.assert_allclose(res.oof_residuals, [-2.0, 2.0], rtol=1e-12)


@pytest.mark.parametrize("case", ["level_on_one_row", "fewer_rows_than_terms"])
def test_loo_with_leverage_one_equals_brute_force_refits(case):
    X, y, data = diabetes(60 if case == "level_on_one_row" else 12)
    n = y.size
    feats = ["x0", "x2", "x3"]
    data = {f: data[f] for f in feats} | {"y": y}
    if case == "level_on_one_row":
        site = np.array(["a", "b"] * (n // 2), dtype=object)
        site[7] = "solo"  # a level seen on one row: leverage 1 at strength 0
        data["site"] = site
        spec_extra = {"categorical": ["site"], "bases": [{"kind": "linear"}]}
        D = np.column_stack([standardized(X[:, [0, 2, 3]]),
                             *[(site == lv).astype(float) for lv in ("a", "b", "solo")]])
    else:
        spec_extra = {"bases": [{"kind": "polynomial", "degrees": [3]}]}  # 19 terms on 12 rows
        D = PolynomialFeatures(3, include_bias=False).fit_transform(standardized(X[:, [0, 2, 3]]))
    res = tune(data, {"target": "y", **spec_extra, "penalty": {"strengths": [0.0, 0.5]}, "cv": {"scheme": "loo"}})
    Z = StandardScaler().fit_transform(D)  # the loo scheme scales columns once, on all rows
    for lam in (0.0, 0.5):
        errs = []
        for i in range(n):  # brute force: n refits without row i (scikit-learn; lstsq is minimum-norm at λ = 0)
            keep = np.arange(n) != i
            m = (LinearRegression() if lam == 0 else Ridge(alpha=lam)).fit(Z[keep], y[keep])
            errs.append(y[i] - m.predict(Z[i:i + 1])[0])
        row = next(r for r in res.cv_table if r["strength"] == lam)
        assert np.isfinite(row["mean"])
        assert row["mean"] == pytest.approx(np.sqrt(np.mean(np.square(errs))), rel=1e-8)
    assert any("leverage 1" in w for w in res.warnings)
    body, arrays = res.to_artifact()
    assert all(np.isfinite(r["mean"]) for r in body["cv_table"])


# ---- 3. missing values in categorical columns --------------------------------------------------------
@pytest.mark.parametrize("missing", [np.nan, None, "pd.NA"])
def test_missing_category_is_refused_with_column_and_row(missing):
    pd = pytest.importorskip("pandas")
    X, y, data = diabetes(40)
    site = np.array(["a", "b"] * 20, dtype=object)
    site[[5, 11]] = pd.NA if missing == "pd.NA" else missing
    data["site"] = site
    # common practice: a missing value is not a level; it is refused like a numeric NaN
    with pytest.raises(InvalidData, match=r"'site' holds missing values .empty or blank labels. at rows \[5, 11\]"):
        tune(data, {"target": "y", "features": ["x0"], "categorical": ["site"], "cv": {"folds": 3}})


# ---- 4. time_ordered sorts by time ---------------------------------------------------------------------
def test_time_ordered_accepts_iso_timestamps_and_orders_them_in_time():
    X, y, data = diabetes(60)
    rng = np.random.default_rng(3)
    minutes = rng.permutation(60) * 60  # hourly, rows not in time order (as text, +02:00 shifts the order)
    start = dt.datetime(2024, 3, 1, tzinfo=dt.timezone.utc)
    stamps = []
    for i, m in enumerate(minutes):
        t = start + dt.timedelta(minutes=int(m))
        # alternate UTC and a +02:00 offset: the instant decides the order, not the text
        stamps.append(t.isoformat() if i % 2 else t.astimezone(dt.timezone(dt.timedelta(hours=2))).isoformat())
    data["t"] = np.array(stamps)
    res = tune(data, {"target": "y", "features": ["x0", "x2"], "bases": [{"kind": "linear"}],
                      "penalty": {"strengths": [1.0]}, "cv": {"scheme": "time_ordered", "order_by": "t", "folds": 3}})
    order = np.argsort(minutes, kind="stable")
    Xs = standardized(X[:, [0, 2]])
    splits = [(order[tr], order[te]) for tr, te in TimeSeriesSplit(n_splits=3).split(Xs)]  # scikit-learn splitter
    want = fold_rmse(Xs, y, splits, lambda: Pipeline([("s", StandardScaler()), ("r", Ridge(alpha=1.0))]))
    np.testing.assert_allclose(res.cv_table[0]["split_values"], want, rtol=1e-9)


@pytest.mark.parametrize("values,match", [
    ("nan", r"'t' holds missing values \(NaN\) at rows \[4\]"),
    ("text_numbers", r"'t' holds values that are neither numbers nor ISO-8601"),
])
def test_time_ordered_refuses_missing_times_and_plain_text(values, match):
    X, y, data = diabetes(30)
    if values == "nan":
        t = np.arange(30.0)
        t[4] = np.nan  # would sort last and be validated on as the most recent row
    else:
        t = np.array([str(i) for i in range(30)])  # as text "10" < "9"
    data["t"] = t
    with pytest.raises(InvalidData, match=match):
        tune(data, {"target": "y", "features": ["x0"], "cv": {"scheme": "time_ordered", "order_by": "t", "folds": 3}})


# ---- 5. the one-standard-error rule ---------------------------------------------------------------------
def test_one_standard_error_rule_follows_esl_with_df_across_bases():
    X, y, data = diabetes()
    spec = {"target": "y", "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]}],
            "penalty": {"strengths": {"min": 1e-2, "max": 1e4, "count": 25}}, "cv": {"folds": 5, "seed": 0},
            "selection": {"rule": "one_standard_error"}}
    res = tune(data, spec)
    table = res.cv_table
    best = min(table, key=lambda r: r["mean"])
    # ESL §7.10: standard error = sample standard deviation (ddof = 1) of the split errors / √splits
    se = np.std(best["split_values"], ddof=1) / np.sqrt(5)
    assert best["se"] == pytest.approx(se, rel=1e-12)
    within = [r for r in table if r["mean"] <= best["mean"] + se]
    simplest = min(within, key=lambda r: (r["df"], -r["strength"]))
    assert res.chosen["basis"] == simplest["basis"]
    assert res.chosen["penalty"]["strength"] == simplest["strength"]
    # df of every row is ESL eq. 3.50 on all rows: tr[Z (ZᵀZ + λI)⁻¹ Zᵀ], written out here
    Z = StandardScaler().fit_transform(PolynomialFeatures(2, include_bias=False).fit_transform(standardized(X)))
    s2 = np.linalg.svd(Z, compute_uv=False) ** 2
    for row in table:
        if row["basis"] == {"kind": "polynomial", "degree": 2}:
            assert row["df"] == pytest.approx(np.sum(s2 / (s2 + row["strength"])), rel=1e-9)


def test_df_of_lasso_rows_counts_nonzero_coefficients():
    X, y, data = diabetes()
    strengths = [0.1, 1.0, 5.0]
    res = tune(data, {"target": "y", "bases": [{"kind": "linear"}], "penalty": {"kind": "l1", "strengths": strengths},
                      "cv": {"folds": 4, "seed": 1}})
    Z = StandardScaler().fit_transform(X)
    for row in res.cv_table:
        # Zou, Hastie & Tibshirani (2007): df of the lasso = number of nonzero coefficients;
        # the coefficients from scikit-learn's Lasso on all rows (independent implementation).
        coef = Lasso(alpha=row["strength"], tol=1e-12, max_iter=100_000).fit(Z, y).coef_
        assert row["df"] == np.count_nonzero(coef)


# ---- 6. per-fold RBF equals a scikit-learn Pipeline ---------------------------------------------------
class _KMeansRBF(BaseEstimator, TransformerMixin):
    """RBF basis on k-means centres of the (already standardized) training rows: the definition in
    service/engine/basis.py, written with scikit-learn's KMeans."""

    def __init__(self, centers=12, width=1.0, seed=0):
        self.centers, self.width, self.seed = centers, width, seed

    def fit(self, X, y=None):
        self.c_ = KMeans(self.centers, n_init=3, random_state=self.seed).fit(X).cluster_centers_
        return self

    def transform(self, X):
        return np.exp(-cdist(X, self.c_, "sqeuclidean") / (2 * self.width ** 2))


def test_per_fold_rbf_equals_a_scikit_learn_pipeline():
    X, y, data = diabetes(200)
    feats = ["x0", "x2", "x3"]
    res = tune(data, {"target": "y", "features": feats, "bases": [{"kind": "rbf", "widths": [1.5], "centers": 12}],
                      "basis_fit": "per_fold", "penalty": {"strengths": [0.3]}, "cv": {"folds": 4, "seed": 5}})
    Xf = X[:, [0, 2, 3]]
    want = fold_rmse(Xf, y, KFold(4, shuffle=True, random_state=5).split(Xf), lambda: Pipeline([
        ("std", StandardScaler()), ("rbf", _KMeansRBF(12, 1.5, 5)), ("s", StandardScaler()), ("r", Ridge(alpha=0.3))]))
    np.testing.assert_allclose(res.cv_table[0]["split_values"], want, rtol=1e-8)


# ---- 8. sums of squares that overflow -----------------------------------------------------------------
def test_target_whose_squares_overflow_is_named():
    X, y, data = diabetes(50)
    data["y"] = y * 1e158  # values near 1e160: their squares exceed float64's largest value (1.8e308)
    with pytest.raises(InvalidData, match=r"target column 'y' reaches .*overflows float64.*rescale"):
        tune(data, {"target": "y", "features": ["x0"], "cv": {"folds": 3}})
