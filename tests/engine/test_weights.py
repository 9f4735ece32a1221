"""Row weights: weighted least squares through √w-scaled rows, weighted standardization and metrics.

References:
- scikit-learn as an independent implementation: ``StandardScaler.fit(X, sample_weight=w)``,
  ``Ridge.fit(..., sample_weight=w)`` and ``ElasticNet.fit(..., sample_weight=w)`` in a ``Pipeline`` on a
  fixed basis (``PolynomialFeatures``), on the diabetes data that ships with scikit-learn (Efron,
  Hastie, Johnstone & Tibshirani, Annals of Statistics, 2004).
- A fact of weighted least squares (common practice): an integer weight k gives the same fit and the
  same weighted error sums as k copies of the row.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.linear_model import ElasticNet, Ridge
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

from service.engine import tune
from service.errors import InvalidData, InvalidSpec


def diabetes(n=200, d=4):
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    X, y = X[:n, :d], y[:n]
    return X, y, [f"x{j}" for j in range(d)]


def table(X, y, names, **extra):
    return {**{c: X[:, j].copy() for j, c in enumerate(names)}, "y": y.copy(), **extra}


SPEC = {"target": "y", "bases": [{"kind": "polynomial", "degrees": [1, 2]}],
        "penalty": {"kind": "l2", "strengths": {"min": 1e-3, "max": 1e2, "count": 8}},
        "cv": {"scheme": "kfold", "folds": 4, "seed": 5, "assignment": "hash", "row_key": "id"}}


def test_integer_weights_equal_duplicated_rows():
    X, y, names = diabetes()
    n = y.size
    k = np.random.default_rng(0).integers(0, 4, n)  # 0 to 3 copies; a zero weight drops the row
    ids = np.arange(n, dtype=float)
    weighted = tune(table(X, y, names, id=ids, w=k.astype(float)), {**SPEC, "weight": "w"})
    rep = np.repeat(np.arange(n), k)  # copies share their row key, so they share their fold
    # Weights are relative (rescaled to average 1 over rows with k > 0): k copies of each row are the same
    # least-squares problem with the data term Σk/(rows with k > 0) times larger, i.e. the same penalty
    # at that many times the strength.
    factor = k.sum() / np.count_nonzero(k)
    strengths = np.geomspace(1e-3, 1e2, 8)
    copied = tune(table(X[rep], y[rep], names, id=ids[rep]),
                  {**SPEC, "penalty": {"kind": "l2", "strengths": (strengths * factor).tolist()}})
    weighted = tune(table(X, y, names, id=ids, w=k.astype(float)),
                    {**SPEC, "weight": "w", "penalty": {"kind": "l2", "strengths": strengths.tolist()}})
    assert len(weighted.cv_table) == len(copied.cv_table) == 16
    for a, b in zip(weighted.cv_table, copied.cv_table):
        assert a["basis"] == b["basis"] and a["strength"] * factor == pytest.approx(b["strength"], rel=1e-12)
        np.testing.assert_allclose(a["split_values"], b["split_values"], rtol=1e-9)
    assert (weighted.chosen["basis"], weighted.chosen["index"]) == (copied.chosen["basis"], copied.chosen["index"])
    assert weighted.chosen["mean"] == pytest.approx(copied.chosen["mean"], rel=1e-9)
    np.testing.assert_allclose(weighted.model.scaler.mean, copied.model.scaler.mean, rtol=1e-12)
    np.testing.assert_allclose(weighted.model.scaler.scale, copied.model.scaler.scale, rtol=1e-12)
    q = table(X[:30], y[:30], names)
    np.testing.assert_allclose(weighted.model.predict(q), copied.model.predict(q), rtol=1e-9)
    # ranges and leverage come from rows that weigh something
    kept = k > 0
    assert weighted.model.ranges["x0"] == [float(X[kept, 0].min()), float(X[kept, 0].max())]


def test_uniform_weights_change_nothing():
    X, y, names = diabetes()
    ids = np.arange(y.size, dtype=float)
    plain = tune(table(X, y, names, id=ids), SPEC)
    for c in (1.0, 3.5):
        w = tune(table(X, y, names, id=ids, w=np.full(y.size, c)), {**SPEC, "weight": "w"})
        for a, b in zip(w.cv_table, plain.cv_table):
            np.testing.assert_allclose(a["split_values"], b["split_values"], rtol=1e-9)
        q = table(X[:20], y[:20], names)
        np.testing.assert_allclose(w.model.predict(q), plain.model.predict(q), rtol=1e-9)


@pytest.mark.parametrize("kind", ["l2", "elastic_net"])
def test_weighted_fit_equals_scikit_learn_with_sample_weight(kind):
    X, y, names = diabetes(n=300, d=3)
    w = np.random.default_rng(1).uniform(0.2, 3.0, y.size)
    strength = 0.5 if kind == "l2" else 0.1
    spec = {"target": "y", "weight": "w", "bases": [{"kind": "polynomial", "degrees": [2]}],
            "penalty": {"kind": kind, "strengths": [strength], **({"l1_ratios": [0.5]} if kind == "elastic_net" else {})},
            "cv": {"scheme": "kfold", "folds": 3, "seed": 0}}
    res = tune(table(X, y, names, w=w), spec)
    # scikit-learn: weighted standardization of the inputs, the degree-2 basis, weighted standardization of
    # its columns, then the weighted penalized fit; our λ is Ridge's alpha and ElasticNet's alpha.
    mean = (w @ X) / w.sum()
    std = np.sqrt((w @ (X - mean) ** 2) / w.sum())
    np.testing.assert_allclose(res.model.scaler.mean, mean, rtol=1e-12)
    np.testing.assert_allclose(res.model.scaler.scale, std, rtol=1e-12)
    Xs = (X - mean) / std
    last = Ridge(alpha=strength) if kind == "l2" else ElasticNet(alpha=strength, l1_ratio=0.5, tol=1e-14, max_iter=100_000)
    step = "ridge" if kind == "l2" else "enet"
    pipe = Pipeline([("poly", PolynomialFeatures(2, include_bias=False)), ("scale", StandardScaler()), (step, last)])
    rel = w * (w.size / w.sum())  # our weights are relative (average 1); Ridge's are not, ElasticNet rescales its own
    pipe.fit(Xs, y, scale__sample_weight=rel, **{f"{step}__sample_weight": rel})
    q = table(X, y, names)
    np.testing.assert_allclose(res.model.predict(q), pipe.predict(Xs), rtol=1e-7 if kind == "elastic_net" else 1e-9)


@pytest.mark.parametrize("bad,fragment", [
    (-1.0, "negative, missing or infinite"), (np.nan, "NaN or infinite"), (np.inf, "infinite")])
def test_bad_weights_are_refused_naming_the_column(bad, fragment):
    X, y, names = diabetes(n=60)
    w = np.ones(y.size)
    w[7] = bad
    with pytest.raises(InvalidData, match=fragment) as err:
        tune(table(X, y, names, w=w), {"target": "y", "weight": "w", "bases": [{"kind": "linear"}]})
    assert "'w'" in str(err.value) and "[7]" in str(err.value)


def test_all_zero_weights_and_weight_roles_are_refused():
    X, y, names = diabetes(n=60)
    with pytest.raises(InvalidData, match="zero on every row"):
        tune(table(X, y, names, w=np.zeros(y.size)), {"target": "y", "weight": "w", "bases": [{"kind": "linear"}]})
    with pytest.raises(InvalidSpec, match="also an input|cannot also be an input"):
        tune(table(X, y, names, w=np.ones(y.size)), {"target": "y", "weight": "x0", "features": ["x0", "x1"]})
    with pytest.raises(InvalidSpec, match="loo"):
        tune(table(X, y, names, w=np.ones(y.size)), {"target": "y", "weight": "w", "cv": {"scheme": "loo"}})
    with pytest.raises(InvalidSpec, match="weight column"):
        tune(table(X, y, names), {"target": "y", "weight": "w"})
    # the weight column is never a feature by default
    res = tune(table(X, y, names, w=np.ones(y.size)), {"target": "y", "weight": "w", "bases": [{"kind": "linear"}]})
    assert res.model.features == names
