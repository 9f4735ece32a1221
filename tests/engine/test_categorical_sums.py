"""A categorical column's one-hot block enters the fold summaries as level sums (``Summary.of_grouped``).

References:
- scikit-learn as an independent implementation: ``OneHotEncoder`` (fixed categories) and
  ``PolynomialFeatures`` in a ``ColumnTransformer``, then ``StandardScaler`` and ``Ridge`` inside
  ``GridSearchCV`` with the same ``KFold``, on the diabetes data that ships with scikit-learn (Efron et al.,
  2004), with categorical columns derived from its columns;
- the exact cross-products of the materialized ``[1, E, Φ, y]`` (``AᵀA``, in extended precision), which any R
  factor of the rows must reproduce (``RᵀR = AᵀA``; Golub & Van Loan, *Matrix Computations*, §5.2);
- the same search with the one-hot block factored with the other columns (``ONE_HOT_AS_LEVEL_SUMS`` off),
  which must give the same CV table, chosen point and predictions to 1e-12.
"""

from __future__ import annotations

import sys

import numpy as np
import pytest
from sklearn.compose import ColumnTransformer
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.model_selection import GridSearchCV, KFold
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import OneHotEncoder, PolynomialFeatures, StandardScaler

from service.engine import tune
from service.engine.summaries import Summary

engine = sys.modules["service.engine.tune"]


def _diabetes(levels: int):
    """Diabetes inputs x0..x3 and target (shipped with scikit-learn), with a categorical ``band`` column: the
    quantile band of column 4 in ``levels`` levels, and one row moved to a level of its own ("solo")."""
    X, y = load_diabetes(return_X_y=True)
    edges = np.quantile(X[:, 4], np.linspace(0, 1, levels + 1)[1:-1])
    band = np.array([f"b{v:03d}" for v in np.digitize(X[:, 4], edges)], dtype=object)
    band[17] = "solo"  # a level on a single row: absent from the training rows of the fold that validates it
    data = {f"x{j}": X[:, j] for j in range(4)}
    data["band"] = band
    data["sex"] = np.where(X[:, 1] > 0, "f", "m")
    data["y"] = y
    return X[:, :4], y, band, data


def _exact_gram(A: np.ndarray) -> np.ndarray:
    Al = A.astype(np.longdouble)
    return np.asarray(Al.T @ Al, dtype=np.float64)


@pytest.mark.parametrize("weighted", [False, True])
def test_level_sums_reproduce_the_cross_products_of_the_one_hot_design(weighted):
    rng = np.random.default_rng(4)
    n, p, q = 400, 5, 9
    codes = rng.integers(0, q, n)
    codes[codes == 6] = 7  # level 6 absent from these rows
    codes[codes == 2] = 3
    codes[11] = 2  # level 2 on a single row
    Phi = rng.standard_normal((n, p)) * np.array([1.0, 10.0, 1e-3, 1e4, 3.0]) + 50.0  # scales far apart
    y = Phi @ rng.standard_normal(p) + 3.0 * codes + rng.standard_normal(n)
    w = rng.uniform(0.0, 3.0, n) if weighted else None
    E = np.zeros((n, q))
    E[np.arange(n), codes] = 1.0
    A = np.column_stack([np.ones(n), E, Phi, y])
    if weighted:
        A *= np.sqrt(w)[:, None]
    got, inner = Summary.of_grouped(codes, q, Phi, y, weights=w)
    want = _exact_gram(A)
    assert got.R.shape == (q + p + 2, q + p + 2)
    assert np.allclose(np.triu(got.R), got.R)
    assert got.n == pytest.approx(n if w is None else w.sum(), rel=1e-15)
    # RᵀR = AᵀA entry by entry, relative to the entries' own scale (√(AᵀA)_ii (AᵀA)_jj)
    d = np.sqrt(np.diag(want))
    scale = np.outer(d, d)
    absent = scale == 0  # the column of the level absent from these rows: exactly zero cross-products
    assert absent.any() and np.all((got.R.T @ got.R)[absent] == 0)
    rel = np.abs(got.R.T @ got.R - want)[~absent] / scale[~absent]
    assert rel.max() <= 1e-13, rel.max()
    # the one-hot design factored row by row gives the same cross-products
    ref = Summary.of(np.column_stack([E, Phi]), y, weights=w)
    assert np.max(np.abs(ref.R.T @ ref.R - want)[~absent] / scale[~absent]) <= 1e-13
    # the level-centred inner block: its means are 0 (common practice: centring within groups)
    assert np.max(np.abs(inner[0, 1:])) <= 1e-9 * np.max(np.abs(inner[1:, 1:]))


def _run(data, spec, level_sums: bool, monkeypatch):
    calls = []
    real = Summary.of_grouped

    def counted(*a, **k):
        calls.append(1)
        return real(*a, **k)

    monkeypatch.setattr(engine, "ONE_HOT_AS_LEVEL_SUMS", level_sums)
    monkeypatch.setattr(Summary, "of_grouped", staticmethod(counted))
    res = tune(data, spec)
    monkeypatch.setattr(Summary, "of_grouped", staticmethod(real))
    return res, len(calls)


@pytest.mark.parametrize("levels,categorical,extra,calls", [
    (6, ["band"], {}, 5),
    (60, ["band"], {}, 5),  # many levels: some are absent from some folds' training rows
    (8, ["band", "sex"], {}, 5),  # the second column stays in the factored block
    (6, ["band"], {"weight": "w"}, 5),
    (6, ["band"], {"selection": {"metric": "mae"}}, 5),
    (120, ["band"], {}, 0),  # more levels than rows in a fold: the rows are factored with their one-hot columns
])
def test_level_sums_equal_the_factored_one_hot_block(levels, categorical, extra, calls, monkeypatch):
    _, _, _, data = _diabetes(levels)
    data["w"] = np.random.default_rng(1).uniform(0.0, 2.0, data["y"].size)
    spec = {"target": "y", "features": ["x0", "x1", "x2", "x3"], "categorical": categorical,
            "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e3, "count": 9}},
            "cv": {"scheme": "kfold", "folds": 5, "seed": 3}, **extra}
    sums, used = _run(data, spec, True, monkeypatch)
    factored, unused = _run(data, spec, False, monkeypatch)
    assert used == calls and unused == 0  # one call per fold atom, and none with the switch off
    for a, b in zip(sums.cv_table, factored.cv_table):
        assert a["basis"] == b["basis"] and a["strength"] == b["strength"]
        np.testing.assert_allclose(a["split_values"], b["split_values"], rtol=1e-12)
        assert a["df"] == pytest.approx(b["df"], rel=1e-12, abs=1e-12)
    for key in ("basis", "penalty", "index", "rule"):
        assert sums.chosen[key] == factored.chosen[key]
    for key in ("mean", "std", "se", "df"):
        assert sums.chosen[key] == pytest.approx(factored.chosen[key], rel=1e-12)
    np.testing.assert_allclose(sums.oof_predictions, factored.oof_predictions, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(sums.model.predict(data), factored.model.predict(data), rtol=1e-12)


@pytest.mark.parametrize("levels", [5, 40])
def test_cv_table_with_a_categorical_column_equals_scikit_learn(levels):
    X, y, band, data = _diabetes(levels)
    degrees, alphas = [1, 2], np.geomspace(1e-3, 1e3, 7)
    spec = {"target": "y", "features": ["x0", "x1", "x2", "x3"], "categorical": ["band"],
            "bases": [{"kind": "polynomial", "degrees": degrees}],
            "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e3, "count": 7}},
            "cv": {"scheme": "kfold", "folds": 5, "seed": 7}}
    res = tune(data, spec)
    # scikit-learn reference: inputs standardized on all rows, the one-hot block with the categories of all
    # rows (a level absent from a fold's training rows is a zero column there, which StandardScaler keeps at
    # scale 1 and Ridge at coefficient 0), PolynomialFeatures of the numeric inputs, then per fold
    # StandardScaler and Ridge inside GridSearchCV with the same KFold
    levels_seen = sorted(set(band.tolist()))
    codes = np.array([levels_seen.index(v) for v in band], dtype=float)
    Z = np.column_stack([StandardScaler().fit_transform(X), codes])
    features = ColumnTransformer([
        ("poly", PolynomialFeatures(include_bias=False), [0, 1, 2, 3]),
        ("onehot", OneHotEncoder(categories=[np.arange(len(levels_seen), dtype=float)], sparse_output=False), [4])])
    pipe = Pipeline([("features", features), ("scale", StandardScaler()), ("ridge", Ridge())])
    gs = GridSearchCV(pipe, {"features__poly__degree": degrees, "ridge__alpha": alphas},
                      cv=KFold(5, shuffle=True, random_state=7), scoring="neg_root_mean_squared_error").fit(Z, y)
    cv = gs.cv_results_
    ref = {(p["features__poly__degree"], round(float(np.log(p["ridge__alpha"])), 9)):
           np.array([-cv[f"split{j}_test_score"][i] for j in range(5)]) for i, p in enumerate(cv["params"])}
    assert len(res.cv_table) == len(ref) == 14
    for row in res.cv_table:
        want = ref[(row["basis"]["degree"], round(float(np.log(row["strength"])), 9))]
        np.testing.assert_allclose(row["split_values"], want, rtol=1e-9)
    best = gs.best_params_
    assert res.chosen["basis"] == {"kind": "polynomial", "degree": best["features__poly__degree"]}
    assert res.chosen["penalty"]["strength"] == pytest.approx(best["ridge__alpha"], rel=1e-12)
    np.testing.assert_allclose(res.model.predict(data), gs.best_estimator_.predict(Z), rtol=1e-9)


def test_a_row_without_a_level_keeps_the_factored_block():
    """A fixed basis (a continuation's twin) encodes an unseen level as a zero row: no level sums then."""
    class Search:
        prep = type("P", (), {"categories": type("C", (), {"names": ["c"], "levels": [["a", "b"]]})()})()

    D = np.array([[1.0, 0.0, 0.5], [0.0, 1.0, 0.2], [0.0, 0.0, 0.1]])
    assert engine._SharedSearch._group_codes(Search(), D) is None
    np.testing.assert_array_equal(engine._SharedSearch._group_codes(Search(), D[:2]), [0, 1])
