"""A few rows take ``FittedModel._detail_small`` (Python floats for the element-wise steps, numpy for the
products): its answers are those of the vectorized path bit for bit (values, leverages, CV+ bounds and every
warning), and its design matrix is scikit-learn's polynomial features of the standardized inputs."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_diabetes
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

import service.engine.model as model_module
from service.engine import tune


def _data(n: int = 300):
    X, y = load_diabetes(return_X_y=True)  # ships with scikit-learn (Efron et al., 2004)
    X, y = X[:n], y[:n]
    zone = np.array(["north", "south", "east"], dtype=object)[(np.arange(n) * 7) % 3]
    return {"age": X[:, 0], "bmi": X[:, 2], "bp": X[:, 3], "zone": zone, "y": y}


@pytest.fixture(scope="module", params=["polynomial", "linear"])
def model(request):
    bases = [{"kind": "polynomial", "degrees": [3]}] if request.param == "polynomial" else [{"kind": "linear"}]
    res = tune(_data(), {"target": "y", "bases": bases, "categorical": ["zone"],
                         "penalty": {"strengths": [0.01]}, "cv": {"folds": 5, "seed": 3}})
    return res.model


def queries():
    """Rows inside the data, above and below a range, an unseen level, a number as a label, far away (high
    leverage), and so far away that the cubic terms overflow."""
    d = _data()
    inside = {k: v[:3] for k, v in d.items() if k != "y"}
    yield "inside", inside
    yield "one row", {k: v[5:6] for k, v in inside.items()}
    yield "no rows", {k: v[:0] for k, v in inside.items()}
    out = {k: v.copy() for k, v in inside.items()}
    out["age"] = np.array([0.5, -0.4, 0.01])
    out["zone"] = np.array(["west", "north", "south"], dtype=object)
    yield "outside", out
    far = {"age": np.array([1e3, 0.0]), "bmi": np.array([-2e3, 0.0]), "bp": np.array([0.0, 1e103]),
           "zone": np.array(["north", 7.0], dtype=object)}
    yield "far", far


@pytest.mark.parametrize("interval_level", [None, 0.9, 0.5])
def test_few_rows_answer_as_the_vectorized_path_bit_for_bit(model, interval_level, monkeypatch):
    for label, q in queries():
        small = model.predict_detail(q, interval_level=interval_level)
        with monkeypatch.context() as mp:
            mp.setattr(model_module, "SMALL_ROWS", -1)  # every call takes the vectorized path
            mp.setattr(model_module, "_DIRECT_VALUES", -1)  # and the windowed CV+ order statistic
            ref = model.predict_detail(q, interval_level=interval_level)
        for key in ("value", "leverage", "lower", "upper"):
            if ref[key] is None:
                assert small[key] is None, (label, key)
            else:
                assert small[key].tobytes() == ref[key].tobytes(), (label, key, small[key], ref[key])
        assert small["warnings"] == ref["warnings"], label
    outside = model.predict_detail(dict(queries())["outside"])["warnings"]
    assert any("above the training range" in w for w in outside[0])
    assert any("zone='west' was not seen in training" in w for w in outside[0])
    far = model.predict_detail(dict(queries())["far"])["warnings"]
    assert any("leverage" in w for w in far[0]) and any("zone=7 (a number) was not seen" in w for w in far[1])


def test_few_rows_design_is_scikit_learns_polynomial_features(model):
    d = _data()
    X = np.column_stack([d["age"], d["bmi"], d["bp"]])
    q = {"age": X[:4, 0], "bmi": X[:4, 1], "bp": X[:4, 2], "zone": d["zone"][:4]}
    Phi, _, _ = model._design_small(q)
    # scikit-learn as an independent implementation: population-SD standardization, then (polynomial basis)
    # the monomials up to degree 3 in PolynomialFeatures' column order, then one-hot levels in sorted order
    Z = StandardScaler().fit(X).transform(X[:4])
    poly = PolynomialFeatures(3, include_bias=False).fit_transform(Z) if model.basis.kind == "polynomial" else Z
    onehot = (d["zone"][:4, None] == np.array(["east", "north", "south"])[None, :]).astype(float)
    np.testing.assert_allclose(Phi, np.hstack([poly, onehot]), rtol=1e-12, atol=1e-12)
